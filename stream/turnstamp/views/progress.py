"""A progress display for long commands, on standard error.

::

    with progress("tagging", total=n_events) as advance:
        for batch in batches:
            ...
            advance(len(batch))

On a terminal it is a ``rich`` progress bar (spinner, description, bar, count and
elapsed time) that is wiped when the block ends. Anywhere else (a pipe, a log file,
a test) it draws nothing, so that logs stay clean; with ``summary=True`` it then
writes one plain line when the block ends. ``advance`` takes a number of steps
(any non-negative float) and, optionally, a new ``total`` when the amount of work
is only known once it has started.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import TextIO

__all__ = ["progress", "is_terminal"]


def is_terminal(stream) -> bool:
    """Whether ``stream`` is an interactive terminal (False for files, pipes, StringIO)."""
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):  # no isatty, or a closed file
        return False


class _Count:
    """The work done so far, for the plain line (no terminal)."""

    def __init__(self, total: float | None):
        self.done = 0.0
        self.total = total

    def advance(self, steps: float = 1, *, total: float | None = None) -> None:
        if total is not None:
            self.total = total
        self.done += steps

    def line(self, description: str, seconds: float) -> str:
        of = f" of {self.total:,.6g}" if self.total is not None else ""
        return f"{description}: {self.done:,.6g}{of} done in {seconds:.1f} s"


@contextmanager
def progress(description: str, total: float | None = None, *, stream: TextIO | None = None,
             transient: bool = True,
             summary: bool = False) -> Iterator[Callable[..., None]]:
    """A progress display around a block of work.

    Parameters
    ----------
    description : str
        What is being done ("tagging", "building the report").
    total : float, optional
        Amount of work in steps (events, files, seconds); None: unknown (a pulsing bar).
    stream : text stream, optional
        Where to draw (default ``sys.stderr``).
    transient : bool
        Wipe the bar when the block ends (terminal only).
    summary : bool
        When ``stream`` is not a terminal, write one line at the end
        (``"tagging: 1,000 of 1,000 done in 2.3 s"``); otherwise write nothing.

    Yields
    ------
    callable
        ``advance(steps=1, *, total=None)``: count ``steps`` more done; a given
        ``total`` replaces the amount of work.
    """
    stream = stream if stream is not None else sys.stderr
    if not is_terminal(stream):
        count = _Count(total)
        started = time.monotonic()
        yield count.advance
        if summary:
            stream.write(count.line(description, time.monotonic() - started) + "\n")
            stream.flush()
        return
    with _bar(stream, transient) as bar:
        task = bar.add_task(description, total=total)

        def advance(steps: float = 1, *, total: float | None = None) -> None:
            if total is not None:
                bar.update(task, total=total)
            bar.advance(task, steps)

        yield advance


def _bar(stream: TextIO, transient: bool):
    from rich.console import Console
    from rich.progress import (
        BarColumn,
        MofNCompleteColumn,
        Progress,
        SpinnerColumn,
        TextColumn,
        TimeElapsedColumn,
    )

    return Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(),
                    MofNCompleteColumn(), TimeElapsedColumn(),
                    console=Console(file=stream), transient=transient)
