"""How the live view puts a status on its output.

Two renderings: the rich screen (``screen.py``) or plain text (``text.py``);
and two ways to show them: in place on a terminal (``rich.live.Live`` redraws
the same lines each second, so the age of the last update stays current), or
one block after another, separated by a blank line, each new status once (a
pipe, a log file, ``--once``).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TextIO

from rich.console import Console, RenderableType
from rich.live import Live
from rich.text import Text

from .screen import status_screen
from .text import PROFILE_ROWS, render_status

__all__ = ["Display", "InPlace", "OneAfterAnother", "plain_renderer", "rich_renderer"]

Renderer = Callable[[dict, "str | None"], "RenderableType | str"]


def rich_renderer() -> Renderer:
    """The rich screen (panels, a table, bars); it fits itself to the console's width."""
    return lambda status, note: status_screen(status, note=note)


def plain_renderer(console: Console, *, blocks: bool, fit_height: bool) -> Renderer:
    """Plain text as wide as the console; with ``fit_height``, the tallest profile bars
    that keep the screen within the console's height."""

    def render(status: dict, note: str | None) -> str:
        width = console.width
        for rows in (PROFILE_ROWS, 3, 0):
            screen = render_status(status, width, blocks=blocks, note=note, profile_rows=rows)
            if not fit_height or screen.count("\n") + 1 < console.height:
                break
        return screen

    return render


class Display:
    """Where statuses go: ``waiting`` until the first, then ``show`` each one."""

    def __enter__(self) -> Display:
        return self

    def __exit__(self, *exc) -> None:
        return None

    def waiting(self, source: str) -> None:
        """No status yet from ``source``."""

    def show(self, status: dict, note: str | None, fresh: bool) -> bool:
        """Show ``status`` (``fresh``: not shown before); whether anything was drawn."""
        raise NotImplementedError


class InPlace(Display):
    """A terminal redrawn in place at every call (``rich.live.Live``, no auto refresh)."""

    def __init__(self, console: Console, render: Renderer):
        self.render = render
        self.live = Live(console=console, auto_refresh=False, vertical_overflow="crop")

    def __enter__(self) -> InPlace:
        self.live.start()
        return self

    def __exit__(self, *exc) -> None:
        self.live.stop()

    def waiting(self, source: str) -> None:
        self.live.update(Text(f"turnstamp watch: waiting for {source} ..."), refresh=True)

    def show(self, status: dict, note: str | None, fresh: bool) -> bool:
        drawn = self.render(status, note)
        self.live.update(Text(drawn) if isinstance(drawn, str) else drawn, refresh=True)
        return True


class OneAfterAnother(Display):
    """Each new status as a block of its own, blocks separated by a blank line."""

    def __init__(self, out: TextIO, console: Console, render: Renderer):
        self.out = out
        self.console = console
        self.render = render
        self.shown = 0

    def show(self, status: dict, note: str | None, fresh: bool) -> bool:
        if not fresh:
            return False
        if self.shown:
            self.out.write("\n")
        drawn = self.render(status, note)
        if isinstance(drawn, str):
            self.out.write(drawn + "\n")  # plain text goes out untouched
        else:
            self.console.print(drawn)
        self.out.flush()
        self.shown += 1
        return True
