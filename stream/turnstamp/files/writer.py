"""Output files that survive ``kill -9``: one stream as rotating Arrow IPC stream files.

Theory of operation
-------------------
Every output stream (``archive``, ``significance``, ...) is a sequence of Arrow IPC
*stream format* files ``{stem}-{UTC start YYYYmmddTHHMMSSZ}-{counter:05d}.arrows``:
the schema message, then dictionary and record-batch messages, and, once the file is
closed, the 8-byte end-of-stream marker. The stream format allows a dictionary to be
replaced between batches, so batches are written as they come (fitted to the schema
by :mod:`turnstamp.files.conform`), and a stream cut anywhere reads back to its last
complete batch (:mod:`turnstamp.files.reader`).

Durability rules of ``RotatingArrowWriter``:

* A file becomes visible under its final name only once its schema and first batch
  are on disk: they are written to a hidden ``.{name}.part``, flushed, fsynced and
  then hard-linked (or renamed) to the final name.
* After each further batch the file object is flushed, so the bytes are in the OS
  cache and a killed process loses at most the batch it was writing
  (``fsync_each_batch=True`` also protects against power loss, at a cost).
* Rotation and ``close`` write the end-of-stream marker, flush and fsync. A file
  with its end-of-stream marker is *closed*: nothing ever writes to it again,
  recovery included.
* The writer holds an exclusive ``flock`` on its open file; recovery
  (:mod:`turnstamp.files.recovery`) skips locked files. A write that fails cuts the
  file back to its last complete batch and closes it at once.
* ``rotate_on_write=False`` leaves rotation to ``check_rotation`` (the service calls
  it between messages, so that one message's rows never straddle a closed file).
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as dt
import os
import re
import threading
import time
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any, NamedTuple

import pyarrow as pa

from .conform import checked_metadata, conform_batch, row_count
from .durable import fsync_directory, publish, try_lock
from .reader import END_OF_STREAM, FILE_NAME, PART_NAME, count_batches, list_names, stream_files

__all__ = ["RotatingArrowWriter", "SinkPosition"]

MiB = 1 << 20  # bytes
_STEM = re.compile(r"[A-Za-z0-9_][A-Za-z0-9_.-]*\Z")


class SinkPosition(NamedTuple):
    """Where a writer stands after its last write.

    Attributes
    ----------
    file_name : str or None
        Base name of the file that received the last batch (None before any write).
    batches_in_file : int
        Record batches in that file, the last one included.
    """

    file_name: str | None
    batches_in_file: int


@dataclasses.dataclass
class _OpenFile:
    path: Path
    handle: Any  # binary file object
    writer: pa.ipc.RecordBatchStreamWriter
    opened_at: float
    batches: int = 0
    good_bytes: int = 0  # file size after the last complete batch


class RotatingArrowWriter:
    """One output stream as a sequence of Arrow IPC files in a directory.

    Files are opened lazily by the first non-empty ``write`` after construction or a
    rotation, so a stream that receives nothing leaves no files.

    Parameters
    ----------
    directory : str or Path
        Output directory (created if missing).
    stem : str
        Stream name, the first part of every file name (for example ``archive``).
    schema : pyarrow.Schema
        Schema of the batches; its field metadata (unit, description) is kept.
    rotate_seconds : float or None, optional
        Start a new file before a write when the open file was opened at least this
        many seconds ago by ``clock``. None disables. Default 3600 s.
    rotate_bytes : int or None, optional
        Start a new file before a write when the open file holds at least this many
        bytes. None disables. Default 512 MiB.
    metadata : dict of str to str, optional
        Schema-level metadata for every file (provenance: configuration, model ids,
        table provenance, software version). ``turnstamp.stream``,
        ``turnstamp.opened_utc`` and ``turnstamp.file_counter`` are added by the writer.
    clock : callable, optional
        Returns the current time in seconds since 1970-01-01 UTC (``time.time``).
        Drives rotation, the file-name label and ``turnstamp.opened_utc``.
    fsync_each_batch : bool, optional
        Also fsync after every batch (survives power loss, not only a killed
        process). Default False: flush only.
    rotate_on_write : bool, optional
        Check rotation before every write (default). False: only ``check_rotation``
        and ``rotate`` close a file.

    Notes
    -----
    The label in a file name is the UTC time the file was opened, clamped so that it
    never precedes the label of the stream's previous file; with the counter this
    keeps lexicographic order equal to write order even if the wall clock steps
    backwards. The counter continues after the highest one found in the directory.
    One writer per stem and directory. Thread-safe.
    """

    def __init__(
        self,
        directory: str | Path,
        stem: str,
        schema: pa.Schema,
        *,
        rotate_seconds: float | None = 3600.0,
        rotate_bytes: int | None = 512 * MiB,
        metadata: Mapping[str, str] | None = None,
        clock: Callable[[], float] = time.time,
        fsync_each_batch: bool = False,
        rotate_on_write: bool = True,
    ):
        if not _STEM.match(stem):
            raise ValueError(f"stem = {stem!r}: use letters, digits, '_', '.', '-' "
                             "and do not start with '.' or '-'")
        if not isinstance(schema, pa.Schema):
            raise TypeError(f"schema must be a pyarrow.Schema, not {type(schema).__name__}")
        if rotate_seconds is not None and not rotate_seconds > 0:
            raise ValueError(f"rotate_seconds = {rotate_seconds!r}: must be > 0 or None")
        if rotate_bytes is not None and not rotate_bytes > 0:
            raise ValueError(f"rotate_bytes = {rotate_bytes!r}: must be > 0 or None")
        self.directory = Path(directory)
        self.directory.mkdir(parents=True, exist_ok=True)
        self.stem = stem
        self.schema = schema
        self.rotate_seconds = rotate_seconds
        self.rotate_bytes = rotate_bytes
        self.fsync_each_batch = fsync_each_batch
        self.rotate_on_write = rotate_on_write
        self._clock = clock
        self._metadata = checked_metadata(metadata)
        self._lock = threading.RLock()
        self._open: _OpenFile | None = None
        self._closed = False
        self._next_counter, self._last_label = self._scan_existing()
        self._position = self._end_of_existing()

    # ----------------------------------------------------------------- public API

    @property
    def position(self) -> SinkPosition:
        """``(file_name, batches_in_file)`` after the last write; before the first,
        the end of the stream's last file already in the directory."""
        with self._lock:
            return self._position

    @property
    def current_file(self) -> Path | None:
        """Path of the open file, or None between files."""
        with self._lock:
            return self._open.path if self._open else None

    @property
    def closed(self) -> bool:
        """True after ``close``."""
        return self._closed

    def set_metadata(self, metadata: Mapping[str, str] | None) -> None:
        """Replace the provenance metadata for files opened from now on.

        Parameters
        ----------
        metadata : dict of str to str or None
            New schema-level metadata. Call ``rotate`` to start a file with it now.
        """
        checked = checked_metadata(metadata)
        with self._lock:
            self._metadata = checked

    def write(self, data: pa.RecordBatch | pa.Table | Mapping[str, Any]) -> SinkPosition:
        """Append one batch.

        Parameters
        ----------
        data : pyarrow.RecordBatch, pyarrow.Table or mapping of column name to values
            The rows. Columns are matched by name and cast to the schema where the
            cast is safe (no overflow, truncation or string parsing); nullable
            columns may be omitted (all null). A table is written as one batch.
            Input with zero rows writes nothing (and is not validated).

        Returns
        -------
        SinkPosition
            ``(file_name, batches_in_file)`` after the write.

        Raises
        ------
        SchemaMismatchError
            A column is missing, unknown, of an incompatible type, of the wrong
            length, or holds nulls where the schema forbids them. Nothing is written.
        """
        if row_count(data) == 0:
            return self.position
        batch = conform_batch(data, self.schema, self.stem)
        with self._lock:
            if self._closed:
                raise RuntimeError(f"{self.stem}: write() after close()")
            state = self._open
            if state is not None and self.rotate_on_write and self._rotation_due(state):
                self._close_current()
                state = None
            if state is None:
                state = self._open_new(batch)
            else:
                self._append(state, batch)
            self._position = SinkPosition(state.path.name, state.batches)
            return self._position

    def check_rotation(self) -> bool:
        """Close the open file now if it is due for rotation (for idle periods).

        Returns
        -------
        bool
            True if a file was closed.
        """
        with self._lock:
            if self._open is not None and self._rotation_due(self._open):
                self._close_current()
                return True
            return False

    def rotate(self) -> Path | None:
        """Close the open file (end-of-stream marker, fsync); the next write opens a
        new one.

        Returns
        -------
        Path or None
            The file closed, or None if none was open.
        """
        with self._lock:
            if self._open is None:
                return None
            return self._close_current()

    def close(self) -> None:
        """Finalise the open file; further writes raise. Idempotent."""
        with self._lock:
            try:
                if self._open is not None:
                    self._close_current()
            finally:
                self._closed = True

    def release(self) -> None:
        """Let go of the open file without ending it, as a killed process would; further
        writes raise. Start-up recovery then cuts what was never committed (a file
        ended here could no longer be cut: a closed file is never rewritten)."""
        with self._lock:
            state, self._open = self._open, None
            self._closed = True
            if state is not None:
                with contextlib.suppress(Exception):
                    state.handle.flush()
                state.handle.close()

    def files(self) -> list[Path]:
        """This stream's files in the directory, in write order (open file last)."""
        return stream_files(self.directory, self.stem)

    def __enter__(self) -> RotatingArrowWriter:
        return self

    def __exit__(self, *exc_info) -> None:
        self.close()

    def __repr__(self) -> str:
        return (f"RotatingArrowWriter({str(self.directory)!r}, {self.stem!r}, "
                f"position={tuple(self.position)!r}, closed={self._closed})")

    # ----------------------------------------------------------------- internals

    def _scan_existing(self) -> tuple[int, str]:
        counter, label = 0, ""
        for name in list_names(self.directory):
            part = PART_NAME.match(name)
            match = FILE_NAME.match(part.group("final") if part else name)
            if match and match.group("stem") == self.stem:
                counter = max(counter, int(match.group("counter")))
                label = max(label, match.group("label"))
        return counter + 1, label

    def _end_of_existing(self) -> SinkPosition:
        files = stream_files(self.directory, self.stem)
        if not files:
            return SinkPosition(None, 0)
        return SinkPosition(files[-1].name, count_batches(files[-1]))

    def _rotation_due(self, state: _OpenFile) -> bool:
        if self.rotate_bytes is not None and state.good_bytes >= self.rotate_bytes:
            return True
        if self.rotate_seconds is not None:
            return self._clock() - state.opened_at >= self.rotate_seconds
        return False

    def _open_new(self, batch: pa.RecordBatch) -> _OpenFile:
        now = float(self._clock())
        opened = dt.datetime.fromtimestamp(now, tz=dt.UTC)
        label = max(opened.strftime("%Y%m%dT%H%M%SZ"), self._last_label)
        counter = self._next_counter
        while True:
            name = f"{self.stem}-{label}-{counter:05d}.arrows"
            final = self.directory / name
            temp = self.directory / f".{name}.part"
            if not (final.exists() or temp.exists()):
                break
            counter += 1
        metadata = dict(self.schema.metadata or {})  # bytes keys and values
        metadata.update({k.encode(): v.encode() for k, v in self._metadata.items()})
        metadata.update({
            b"turnstamp.stream": self.stem.encode(),
            b"turnstamp.opened_utc": opened.strftime("%Y-%m-%dT%H:%M:%S.%fZ").encode(),
            b"turnstamp.file_counter": str(counter).encode(),
        })
        schema = self.schema.with_metadata(metadata)
        handle = open(temp, "xb")  # noqa: SIM115 - lives as long as the file is open
        try:
            try_lock(handle.fileno())
            writer = pa.ipc.new_stream(handle, schema)
            writer.write_batch(batch)
            handle.flush()
            os.fsync(handle.fileno())
            publish(temp, final)
        except BaseException:
            handle.close()
            with contextlib.suppress(OSError):
                temp.unlink()
            raise
        fsync_directory(self.directory)
        self._next_counter, self._last_label = counter + 1, label
        self._open = _OpenFile(final, handle, writer, now, 1, handle.tell())
        return self._open

    def _append(self, state: _OpenFile, batch: pa.RecordBatch) -> None:
        try:
            state.writer.write_batch(batch)
            state.handle.flush()
            if self.fsync_each_batch:
                os.fsync(state.handle.fileno())
        except BaseException:
            self._abandon(state)
            raise
        state.batches += 1
        state.good_bytes = state.handle.tell()

    def _close_current(self) -> Path:
        state, self._open = self._open, None
        assert state is not None
        try:
            state.writer.close()
            state.handle.flush()
            os.fsync(state.handle.fileno())
        except BaseException:
            self._abandon(state)
            raise
        state.handle.close()
        return state.path

    def _abandon(self, state: _OpenFile) -> None:
        """After a failed write or close: cut the file back to its last complete batch,
        end it and release it."""
        if self._open is state:
            self._open = None
        with contextlib.suppress(Exception):
            state.handle.flush()
        with contextlib.suppress(Exception):
            state.handle.truncate(state.good_bytes)
            state.handle.seek(state.good_bytes)
            state.handle.write(END_OF_STREAM)
            state.handle.flush()
            os.fsync(state.handle.fileno())
        with contextlib.suppress(Exception):
            state.handle.close()
