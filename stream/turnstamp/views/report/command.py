"""``turnstamp report OUTPUT_DIR [--out-dir DIR] [--every SECONDS]``: build the report once,
or again and again while a night goes on (the page reloads itself at the same pace).

With ``--every`` a terminal shows a progress bar while the report is built and
another while the next build is awaited; a pipe or log gets one line per build."""

from __future__ import annotations

import datetime as dt
import sys
import time
from pathlib import Path

from ...errors import ArrowFileError, ReportError
from ..progress import progress
from .build import build_report
from .figures import import_matplotlib

__all__ = ["report_main"]


def report_main(args) -> int:
    """``turnstamp report OUTPUT_DIR [--out-dir DIR] [--every SECONDS]``.

    Parameters
    ----------
    args : argparse.Namespace
        ``output_dir``; optional ``out_dir`` (report folder) and ``every`` (seconds).

    Returns
    -------
    int
        0, or 2 when the report cannot be built (no folder, no matplotlib, no
        output; with ``--every``, a folder with no output yet is waited for).
    """
    problem = _problem(args)
    if problem:
        print(f"turnstamp report: {problem}", file=sys.stderr)
        return 2
    folder = Path(args.output_dir)
    report_dir = Path(args.out_dir) if getattr(args, "out_dir", None) else None
    every = getattr(args, "every", None)
    if every is None:
        try:
            path = build_report(folder, report_dir)
        except ReportError as exc:
            print(f"turnstamp report: {exc}", file=sys.stderr)
            return 2
        print(path)
        return 0
    try:
        _repeat(folder, report_dir, every)
    except KeyboardInterrupt:
        return 0
    return 0


def _problem(args) -> str | None:
    """What makes the command impossible, checked before any work."""
    try:
        import_matplotlib()
    except ReportError as exc:
        return str(exc)
    every = getattr(args, "every", None)
    if every is not None and not every > 0:
        return f"--every {every}: must be a positive number of seconds"
    folder = Path(args.output_dir)
    if folder.is_file():
        return (f"{folder} is a file; give the output folder that holds it "
                f"({folder.parent})")
    if not folder.is_dir():
        return f"{folder}: no such output folder"
    return None


def _repeat(folder: Path, report_dir: Path | None, every: float) -> None:
    """Rebuild every ``every`` seconds until interrupted."""
    while True:
        started = time.monotonic()
        _build_logged(folder, report_dir, every)
        _wait(every - (time.monotonic() - started))


def _build_logged(folder: Path, report_dir: Path | None, every: float) -> None:
    stamp = f"{dt.datetime.now(dt.UTC):%H:%M:%S} UTC"
    try:
        with progress("building the report") as advance:
            path = build_report(folder, report_dir, refresh_seconds=every, advance=advance)
        print(f"{stamp}  wrote {path}", flush=True)
    except (ReportError, ArrowFileError, OSError) as exc:
        print(f"{stamp}  not yet: {exc}", file=sys.stderr, flush=True)


def _wait(seconds: float) -> None:
    """Sleep ``seconds`` (at least one zero-length sleep), the time left shown as a bar."""
    with progress("next report", total=max(seconds, 0.0)) as advance:
        end = time.monotonic() + seconds
        while True:
            left = end - time.monotonic()
            step = min(max(left, 0.0), 1.0)
            time.sleep(step)
            advance(step)
            if left <= 1.0:
                return
