"""Finishing footer-less output files at start-up, and cleaning leftover temporaries.

Theory of operation
-------------------
A killed writer leaves its open file without the footer of the IPC file format
(see :mod:`turnstamp.files.writer`). :func:`recover_partial_files` rewrites every
such file as a complete file with the same schema, metadata and complete batches:
temporary name in the same directory, fsync, verification, atomic ``os.replace``,
directory fsync. It leaves alone files whose tail is corrupt rather than cut short
(a human should look) and files a live writer holds locked, and removes ``.part``
files whose first batch was never published (their ``write`` had not returned).
It is idempotent.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as dt
import os
import uuid
from pathlib import Path

import pyarrow as pa

from ..errors import ArrowFileError
from .conform import WRITE_OPTIONS, DictionaryUnifier
from .durable import fsync_directory, try_lock
from .reader import FILE_NAME, PART_NAME, RECOVER_NAME, list_names, read_arrow_batches

__all__ = ["RecoveryReport", "recover_partial_files", "recover_file"]


@dataclasses.dataclass(frozen=True)
class RecoveryReport:
    """What ``recover_partial_files`` did with one file.

    Attributes
    ----------
    path : Path
        The file concerned (for leftovers, the leftover itself).
    action : str
        ``rewritten`` (footer-less file made complete), ``removed`` (a leftover
        temporary file holding no published data), ``in_use`` (locked by a live
        writer, not touched) or ``left_alone`` (corrupt or ambiguous, not touched).
    batches_kept : int
        Complete record batches in the file after recovery.
    rows_kept : int
        Rows in those batches.
    bytes_dropped : int
        Bytes of the original that are not represented in the result.
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
    """Make every footer-less output file in ``directory`` complete (run at start-up).

    For every ``{stem}-{label}-{counter}.arrow`` file without a valid footer, the
    complete batches and the schema metadata (plus ``turnstamp.recovered``) are
    written to a temporary file in the same directory, fsynced, verified and moved
    over the original with ``os.replace``. Files whose tail is corrupt rather than
    cut short, and files locked by a live writer, are left untouched. Leftover
    temporaries are removed: ``.{name}.recover`` (an interrupted recovery, the
    original is still there) and ``.{name}.part`` (a file whose first batch was
    never published because its ``write`` did not return). Idempotent; run it
    before opening writers on the directory.

    Parameters
    ----------
    directory : str or Path
        Output directory (missing: nothing to do).

    Returns
    -------
    list of RecoveryReport
        One entry per file acted on or left alone; empty when everything is complete.
    """
    directory = Path(directory)
    reports: list[RecoveryReport] = []
    for name in list_names(directory):
        path = directory / name
        leftover = RECOVER_NAME.match(name)
        if leftover:
            if (directory / leftover.group("final")).exists():
                size = _size(path)
                with contextlib.suppress(FileNotFoundError):
                    path.unlink()
                reports.append(RecoveryReport(path, "removed", 0, 0, size,
                                              "temporary file of an interrupted recovery"))
            else:
                reports.append(RecoveryReport(path, "left_alone", 0, 0, 0,
                                              "recovery temporary without its original"))
            continue
        part = PART_NAME.match(name)
        if part:
            reports.append(_remove_unpublished(path, directory / part.group("final")))
            continue
        if FILE_NAME.match(name) and path.is_file():
            report = recover_file(path)
            if report is not None:
                reports.append(report)
    return reports


def recover_file(path: Path) -> RecoveryReport | None:
    """Give one footer-less output file a footer; None if it is already complete.

    Parameters
    ----------
    path : Path
        A ``{stem}-{label}-{counter}.arrow`` file.

    Returns
    -------
    RecoveryReport or None
        What was done (``rewritten``, ``in_use``, ``left_alone``).
    """
    with open(path, "rb") as guard:
        if not try_lock(guard.fileno()):
            return RecoveryReport(path, "in_use", 0, 0, 0, "locked by a live writer")
        try:
            schema, batches, info = read_arrow_batches(path, read_complete=False)
        except ArrowFileError as exc:
            return RecoveryReport(path, "left_alone", 0, 0, 0, str(exc))
        if info.complete:
            return None
        if info.format != "file":
            return RecoveryReport(path, "left_alone", info.batches, info.rows, 0,
                                  "IPC stream format, not written by this module")
        if info.tail == "corrupt":
            return RecoveryReport(path, "left_alone", info.batches, info.rows, 0,
                                  f"not a truncation, needs a human: {info.detail}")
        metadata = dict(schema.metadata or {})
        metadata[b"turnstamp.recovered"] = (
            f"batches_kept={info.batches} bytes_dropped={info.bytes_ignored} "
            f"tail={info.tail} at={dt.datetime.now(dt.UTC):%Y-%m-%dT%H:%M:%SZ}"
        ).encode()
        _write_complete(batches, schema.with_metadata(metadata), path)
        return RecoveryReport(path, "rewritten", info.batches, info.rows, info.bytes_ignored,
                              info.detail)


def _write_complete(batches: list[pa.RecordBatch], schema: pa.Schema, target: Path) -> None:
    """Write a complete file next to ``target``, verify it, then replace ``target``."""
    temp = target.parent / f".{target.name}.{uuid.uuid4().hex}.recover"
    try:
        with open(temp, "xb") as handle:
            writer = pa.ipc.new_file(handle, schema, options=WRITE_OPTIONS)
            unifier = DictionaryUnifier(schema)
            for batch in batches:
                writer.write_batch(unifier.apply(batch))
            writer.close()
            handle.flush()
            os.fsync(handle.fileno())
        with pa.memory_map(str(temp), "r") as source:
            check = pa.ipc.open_file(source)
            rows = sum(check.get_batch(i).num_rows for i in range(check.num_record_batches))
        expected = sum(b.num_rows for b in batches)
        if check.num_record_batches != len(batches) or rows != expected:
            raise RuntimeError(f"{temp}: rewritten file holds {check.num_record_batches} "
                               f"batches / {rows} rows instead of {len(batches)} / {expected}")
        os.replace(temp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            temp.unlink()
        raise
    fsync_directory(target.parent)


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


def _size(path: Path) -> int:
    try:
        return path.stat().st_size
    except OSError:
        return 0
