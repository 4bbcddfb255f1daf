"""``turnstamp watch``: the loop that takes statuses from a source and shows them.

The loop wakes at least once a second (``interval_s``). Before the first status
it waits (with ``--once``, for ``timeout_s`` at most); then it shows every new
status, and on a terminal redraws the last one so that its age stays current:
"no update for N s" once it is older than ``_STALE_S``, or "the service has
stopped" when it says so.
"""

from __future__ import annotations

import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import TextIO

from rich.console import Console

from ..progress import is_terminal
from .display import Display, InPlace, OneAfterAnother, plain_renderer, rich_renderer
from .source import Reading, open_source

__all__ = ["run_watch", "watch_main"]

_STALE_S = 3.0
"""An update older than this many seconds is called out on the screen."""
_FIRST_WAIT_S = 10.0
"""With ``once``: how long to wait for a first status by default, seconds."""
_PLAIN_WIDTH = 100
"""Columns of the plain text when the output is not a terminal."""


@dataclass(frozen=True)
class _Schedule:
    once: bool
    interval_s: float
    first_wait_s: float
    max_frames: int | None

    def timeout_s(self) -> float:
        """How long the source may wait: the interval; with ``once``, short waits."""
        return min(self.interval_s, 0.25) if self.once else self.interval_s


def run_watch(endpoint: str | None = None, folder: str | Path | None = None, *,
              once: bool = False, out: TextIO | None = None, color: bool | None = None,
              blocks: bool | None = None, width: int | None = None,
              interval_s: float = 1.0, timeout_s: float | None = None,
              max_frames: int | None = None) -> int:
    """Show the service's status until Ctrl-C (or once).

    Parameters
    ----------
    endpoint : str, optional
        The service's PUB endpoint (``tcp://127.0.0.1:5556``). Takes precedence.
    folder : str or Path, optional
        Output folder whose ``status.json`` is re-read (when there is no endpoint).
    once : bool
        Show the first status and return.
    out : text stream, optional
        Where to draw (default ``sys.stdout``); a terminal gets in-place redraws.
    color : bool, optional
        The rich screen (True) or plain text (False); default: whether ``out`` is
        a terminal. Colour itself also follows ``NO_COLOR``.
    blocks : bool, optional
        False (``--ascii``): plain ASCII text even on a terminal. For plain text,
        True draws the profile with Unicode blocks (default: on a terminal).
    width : int, optional
        Columns (default: the terminal's, or 100).
    interval_s : float
        Longest wait between redraws, seconds.
    timeout_s : float, optional
        With ``once``: how long to wait for a first status (default 10 s).
    max_frames : int, optional
        Stop after this many drawings (for tests).

    Returns
    -------
    int
        0, or 1 when ``once`` found no status in time.
    """
    if endpoint is None and folder is None:
        raise ValueError("give an endpoint or a folder")
    out = out if out is not None else sys.stdout
    schedule = _Schedule(once, interval_s, _FIRST_WAIT_S if timeout_s is None else timeout_s,
                         max_frames)
    source = open_source(endpoint, folder)
    try:
        with _display(out, once=once, color=color, blocks=blocks, width=width) as display:
            return _loop(source, display, schedule)
    except KeyboardInterrupt:
        return 0
    finally:
        source.close()


def _display(out: TextIO, *, once: bool, color: bool | None, blocks: bool | None,
             width: int | None) -> Display:
    """The rendering and the way of showing it that suit ``out``."""
    terminal = is_terminal(out)
    rich_view = (terminal if color is None else color) and blocks is not False
    console = Console(file=out, width=width if width or terminal else _PLAIN_WIDTH,
                      force_terminal=True if rich_view and not terminal else None,
                      highlight=False)  # colour also off when NO_COLOR is set (rich)
    in_place = terminal and not once
    render = (rich_renderer() if rich_view else
              plain_renderer(console, blocks=terminal if blocks is None else blocks,
                             fit_height=in_place))
    return InPlace(console, render) if in_place else OneAfterAnother(out, console, render)


def _loop(source, display: Display, schedule: _Schedule) -> int:
    started = time.monotonic()
    frames = 0
    last: Reading | None = None
    while True:
        reading = source.next(schedule.timeout_s())
        now = time.monotonic()
        last = reading or last
        if last is None:
            if schedule.once and now - started >= schedule.first_wait_s:
                _no_status(source.name, schedule.first_wait_s)
                return 1
            display.waiting(source.name)
            continue
        frames += display.show(last.status, _age_note(last, now), fresh=reading is not None)
        if schedule.once or (schedule.max_frames is not None and frames >= schedule.max_frames):
            return 0


def _no_status(source: str, waited_s: float) -> None:
    print(f"turnstamp watch: no status from {source} within {waited_s:g} s (is the service "
          "running, with output.publish_endpoint set for --endpoint?)", file=sys.stderr)


def _age_note(reading: Reading, now: float) -> str | None:
    """A line to show when the status is old or the service has stopped."""
    if reading.status.get("state") == "stopped":
        return "the service has stopped; this is its last status"
    age = now - reading.made_at
    if age > _STALE_S:
        return f"no update for {age:.0f} s"
    return None


def watch_main(args) -> int:
    """``turnstamp watch [--endpoint E | --folder F] [--once] [--ascii]``.

    Parameters
    ----------
    args : argparse.Namespace
        ``endpoint`` or ``folder`` (exactly one), ``once``, ``ascii``, and ``wait``
        (with ``once``: seconds to wait for a first status).

    Returns
    -------
    int
        As ``run_watch``, or 2 for a wrong source.
    """
    endpoint = getattr(args, "endpoint", None)
    folder = getattr(args, "folder", None)
    if endpoint and folder:
        print("turnstamp watch: give --endpoint or --folder, not both", file=sys.stderr)
        return 2
    if not endpoint and not folder:
        print("turnstamp watch: give --endpoint (the service's output.publish_endpoint) or "
              "--folder (its output folder)", file=sys.stderr)
        return 2
    if folder and not Path(folder).is_dir():
        print(f"turnstamp watch: {folder}: no such output folder", file=sys.stderr)
        return 2
    blocks = False if getattr(args, "ascii", False) else None
    return run_watch(endpoint=endpoint or None, folder=folder or None,
                     once=bool(getattr(args, "once", False)), blocks=blocks,
                     timeout_s=getattr(args, "wait", None))
