"""Ending killed output files at start-up by truncation, and cleaning leftover temporaries.

Theory of operation
-------------------
A killed writer leaves its open file without the end-of-stream marker, perhaps with
part of a message after its last complete batch (see :mod:`turnstamp.files.writer`).
:func:`finish_file` cuts such a file just after its last complete batch (or after an
earlier batch, when the caller keeps fewer: the rows of a message that was never
committed), appends the end-of-stream marker and fsyncs: the bytes before the cut
are never touched. A *closed* file (ending with its marker) is never rewritten, and
a file a live writer holds locked is skipped. :func:`clean_leftovers` removes the
hidden temporaries of interrupted steps: ``.part`` files whose first batch was never
published, and the ``.tmp`` files of an interrupted atomic write (a checkpoint, the
status). Both are idempotent, so a start-up that is itself killed is simply redone.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import re
from pathlib import Path

from ..errors import ArrowFileError
from .durable import fsync_directory, try_lock
from .reader import END_OF_STREAM, FILE_NAME, PART_NAME, RECOVER_NAME, list_names, scan_stream

__all__ = ["RecoveryReport", "recover_partial_files", "finish_file", "clean_leftovers"]

TEMP_NAME = re.compile(r"\..+\.[0-9a-f]{32}\.tmp\Z")
"""Hidden name of a file being written atomically (``durable.atomic_write_bytes``)."""


@dataclasses.dataclass(frozen=True)
class RecoveryReport:
    """What recovery did with one file.

    Attributes
    ----------
    path : Path
        The file concerned (for leftovers, the leftover itself).
    action : str
        ``ended`` (cut after its last kept batch, end-of-stream marker appended),
        ``removed`` (a leftover temporary file holding no published data),
        ``in_use`` (locked by a live writer, not touched) or ``left_alone``
        (closed, unreadable or of the file format: not touched).
    batches_kept : int
        Complete record batches in the file after recovery.
    rows_kept : int
        Rows in those batches (-1 when not counted).
    bytes_dropped : int
        Bytes cut from the end of the file.
    detail : str
        Explanation.
    """

    path: Path
    action: str
    batches_kept: int
    rows_kept: int
    bytes_dropped: int
    detail: str = ""


def recover_partial_files(directory: str | Path) -> list[RecoveryReport]:
    """End every killed output file in ``directory`` after its last complete batch and
    remove leftover temporaries (run at start-up, before writers open).

    Returns
    -------
    list of RecoveryReport
        One entry per file acted on or left alone; empty when everything is closed.
    """
    directory = Path(directory)
    reports = clean_leftovers(directory)
    for name in list_names(directory):
        if FILE_NAME.match(name) and (directory / name).is_file():
            report = finish_file(directory / name)
            if report is not None:
                reports.append(report)
    return reports


def finish_file(path: Path, keep_batches: int | None = None) -> RecoveryReport | None:
    """Cut a killed stream file after its last complete batch (or its first
    ``keep_batches`` batches) and close it with the end-of-stream marker.

    Parameters
    ----------
    path : Path
        A ``{stem}-{label}-{counter}.arrows`` file.
    keep_batches : int, optional
        Batches to keep (all complete ones by default).

    Returns
    -------
    RecoveryReport or None
        None when the file is closed and keeps every batch asked for.
    """
    if keep_batches is None and _ends_closed(path):
        return None
    with open(path, "r+b") as handle:
        if not try_lock(handle.fileno()):
            return RecoveryReport(path, "in_use", 0, -1, 0, "locked by a live writer")
        try:
            scan = scan_stream(path, keep_batches=False)
        except ArrowFileError as exc:
            return RecoveryReport(path, "left_alone", 0, -1, 0, str(exc))
        have = len(scan.ends)
        keep = have if keep_batches is None else min(keep_batches, have)
        if scan.closed or scan.magic:
            if keep == have:
                return None
            why = "closed" if scan.closed else "of the IPC file format"
            return RecoveryReport(path, "left_alone", have, -1, 0,
                                  f"{why}: its last {have - keep} batches hold rows never "
                                  "committed, but such a file is never rewritten")
        if scan.problem and not scan.cut_short and keep == have:
            return RecoveryReport(path, "left_alone", have, -1, 0,
                                  f"damaged, not cut short: needs a human ({scan.problem})")
        cut = scan.ends[keep - 1] if keep else scan.start
        handle.truncate(cut)
        handle.seek(cut)
        handle.write(END_OF_STREAM)
        handle.flush()
        os.fsync(handle.fileno())
    fsync_directory(path.parent)
    detail = (f"{have - keep} uncommitted batches cut" if keep < have
              else scan.problem or "end-of-stream marker added")
    return RecoveryReport(path, "ended", keep, -1, scan.size - cut, detail)


def clean_leftovers(directory: Path) -> list[RecoveryReport]:
    """Remove hidden temporaries of interrupted steps (``.part``, ``.tmp``, ``.recover``)."""
    reports = []
    for name in list_names(directory):
        path = directory / name
        part = PART_NAME.match(name)
        if part:
            reports.append(_remove_unpublished(path, directory / part.group("final")))
        elif TEMP_NAME.match(name) or RECOVER_NAME.match(name):
            size = _size(path)
            with contextlib.suppress(FileNotFoundError):
                path.unlink()
            reports.append(RecoveryReport(path, "removed", 0, 0, size,
                                          "temporary file of an interrupted write"))
    return reports


def _remove_unpublished(path: Path, final: Path) -> RecoveryReport:
    with open(path, "rb") as guard:
        if not try_lock(guard.fileno()):
            return RecoveryReport(path, "in_use", 0, 0, 0, "locked by a live writer")
        size = os.fstat(guard.fileno()).st_size
        if final.exists() and not os.path.samefile(path, final):
            return RecoveryReport(path, "left_alone", 0, 0, 0,
                                  f"differs from the published {final.name}")
        if final.exists():
            detail = f"second name of the published {final.name}"
            size = 0
        else:
            detail = "first batch of a file never published (its write had not returned)"
        path.unlink()
    fsync_directory(path.parent)
    return RecoveryReport(path, "removed", 0, 0, size, detail)


def _ends_closed(path: Path) -> bool:
    """The file ends with the end-of-stream marker (read: its last 8 bytes only)."""
    try:
        with open(path, "rb") as handle:
            handle.seek(-len(END_OF_STREAM), os.SEEK_END)
            return handle.read() == END_OF_STREAM
    except OSError:
        return False


def _size(path: Path) -> int:
    try:
        return path.stat().st_size
    except OSError:
        return 0
