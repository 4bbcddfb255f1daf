"""Output files that survive ``kill -9``: rotating Arrow IPC writers and atomic small files.

Theory of operation
-------------------
Every output stream (``archive``, ``significance``, ...) is a sequence of Arrow IPC
*file format* files ``{stem}-{UTC start YYYYmmddTHHMMSSZ}-{counter:05d}.arrow``.
The file format is laid out as::

    "ARROW1\\0\\0"                      8 bytes: magic and padding
    schema message                     } exactly the IPC *stream* format
    dictionary / record-batch messages }
    end-of-stream marker               0xFFFFFFFF 0x00000000
    footer (flatbuffer), int32 footer length, "ARROW1"

Each encapsulated message is ``0xFFFFFFFF``, an int32 metadata length ``L``, ``L``
bytes of flatbuffer ``Message`` metadata (its ``bodyLength`` field gives the size of
the body) and the body. The footer only repeats the schema and the offsets of the
blocks, so everything before it is a valid stream.

What we verified with pyarrow (26.0; the tests keep checking it):

* ``pa.ipc.new_file`` writes nothing until the first batch (or ``close``): the magic,
  the schema and the dictionaries go out together with the first record batch.
* ``close`` writes the end-of-stream marker, then the footer and trailing magic.
* A stream reader opened on ``bytes[8:]`` reads every batch of a complete file and
  stops at the end-of-stream marker, and one opened on a file cut anywhere stops
  after the last complete message: a cut inside a message raises ``ArrowInvalid``
  ("Expected to read N metadata bytes ...", "Corrupted message ...") or ``OSError``
  ("Expected to be able to read N bytes for message body ...") when that message is
  requested, and a cut exactly on a message boundary ends the stream cleanly. It
  never hands out a partial batch. After each ``read_next_batch`` the source
  position is exactly the end of that record-batch message.
* The file format forbids replacing a dictionary between batches ("Dictionary
  replacement detected when writing IPC file format"), but accepts *delta*
  dictionaries (``IpcWriteOptions(emit_dictionary_deltas=True)``) and
  ``pa.ipc.open_file`` reads them back. The writer therefore keeps one growing
  dictionary per dictionary column and file (``_DictionaryUnifier``): each batch's
  indices are remapped onto it, so every batch's dictionary extends the previous
  one and only the new values are written.
* ``pa.ipc.open_file`` hands every batch the file's final (delta-extended)
  dictionary, the stream reader the dictionary current at that batch: the same
  values, different ``DictionaryArray`` objects (compare decoded values).

Durability rules of ``RotatingArrowWriter``:

* A file becomes visible under its final name only once its header and first batch
  are on disk: they are written to a hidden ``.{name}.part``, flushed, fsynced and
  then hard-linked (or renamed) to the final name. Every ``*.arrow`` file therefore
  holds a complete schema and at least one complete batch.
* After each further batch the file object is flushed, so the bytes are in the OS
  cache and a killed process loses at most the batch it was writing
  (``fsync_each_batch=True`` also protects against power loss, at a cost).
* Rotation and ``close`` write the footer, flush and fsync.
* The writer holds an exclusive ``flock`` on its open file; recovery skips locked
  files, so it cannot rewrite a file a live writer is appending to.

Reading (``read_arrow_file_report``): a file whose footer opens with
``pa.ipc.open_file`` is complete. Otherwise ``_scan_messages`` walks the message
frames from offset 8 using only the lengths (continuation marker, metadata length,
``bodyLength`` from the flatbuffer), which tells a *truncated* tail (a message
whose declared size runs past the end of the file, a partial footer after the
end-of-stream marker, or zero fill) from *corruption* (a frame that is complete but
cannot be decoded). pyarrow's stream reader then decodes the prefix up to the end of
the last complete record batch.

Recovery (``recover_partial_files``) rewrites every footer-less file as a complete
file with the same schema, metadata and complete batches (temporary name in the
same directory, fsync, verification, atomic ``os.replace``, directory fsync); it
leaves corrupt files untouched, and removes ``.part`` files whose first batch was
never published (its ``write`` had not returned). It is idempotent.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as dt
import json
import os
import re
import struct
import threading
import time
import uuid
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

try:  # POSIX only; without it recovery cannot see live writers (documented caveat)
    import fcntl
except ImportError:  # pragma: no cover - not on our platforms
    fcntl = None  # type: ignore[assignment]

__all__ = [
    "RotatingArrowWriter",
    "SinkPosition",
    "SchemaMismatchError",
    "ArrowFileError",
    "ArrowFileInfo",
    "RecoveryReport",
    "read_arrow_file",
    "read_arrow_file_report",
    "recover_partial_files",
    "read_stream",
    "stream_files",
    "atomic_write_text",
    "atomic_write_json",
]

MiB = 1 << 20
_MAGIC = b"ARROW1"
_HEADER_BYTES = 8  # magic plus two bytes of padding
_MESSAGE_KINDS = {1: "schema", 2: "dictionary", 3: "record_batch"}
_WRITE_OPTIONS = pa.ipc.IpcWriteOptions(emit_dictionary_deltas=True)
_RESERVED_KEYS = ("turnstamp.stream", "turnstamp.opened_utc", "turnstamp.file_counter")

_STEM = re.compile(r"[A-Za-z0-9_][A-Za-z0-9_.-]*\Z")
_FILE_NAME = re.compile(r"(?P<stem>.+)-(?P<label>\d{8}T\d{6}Z)-(?P<counter>\d{5,})\.arrow\Z")
_PART_NAME = re.compile(r"\.(?P<final>.+\.arrow)\.part\Z")
_RECOVER_NAME = re.compile(r"\.(?P<final>.+\.arrow)\.[0-9a-f]{32}\.recover\Z")

# pyarrow raises these for truncated or undecodable IPC data.
_READ_ERRORS = (pa.ArrowException, OSError, ValueError, EOFError)


class SchemaMismatchError(ValueError):
    """Data handed to a writer does not fit the stream's schema.

    Parameters
    ----------
    stem : str
        Output stream concerned.
    field : str
        Offending column name.
    problem : str
        What is wrong with it.
    """

    def __init__(self, stem: str, field: str, problem: str):
        self.stem = stem
        self.field = field
        self.problem = problem
        super().__init__(f"{stem}: column {field!r}: {problem}")


class ArrowFileError(ValueError):
    """A file cannot be read as an Arrow IPC file at all (no complete schema)."""

    def __init__(self, path: str | Path, problem: str):
        self.path = Path(path)
        self.problem = problem
        super().__init__(f"{path}: {problem}")


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


@dataclasses.dataclass(frozen=True)
class ArrowFileInfo:
    """What ``read_arrow_file_report`` found in one file.

    Attributes
    ----------
    path : Path
        The file.
    complete : bool
        The footer is present and valid (the file was closed properly).
    batches : int
        Complete record batches read.
    rows : int
        Rows in those batches.
    file_bytes : int
        Size of the file when it was read.
    bytes_ignored : int
        Bytes after the end of the last complete record batch that were not read
        (a truncated message, a dictionary without its batch, an end-of-stream marker
        and partial footer, zero fill). 0 for a complete file.
    tail : str
        How the data ends: ``footer`` (complete), ``message_boundary`` (cut exactly
        after a message), ``truncated_message``, ``end_of_stream`` (marker present;
        in the file format the footer is then missing or partial), ``zero_fill`` or
        ``corrupt`` (a complete frame that cannot be decoded; data after it is not
        read).
    detail : str
        Human-readable explanation of the tail.
    format : str
        ``file`` (our output files) or ``stream`` (IPC stream format, accepted for
        input files; complete when it ends with the end-of-stream marker).
    """

    path: Path
    complete: bool
    batches: int
    rows: int
    file_bytes: int
    bytes_ignored: int
    tail: str
    detail: str = ""
    format: str = "file"

    @property
    def state(self) -> str:
        """``complete`` or ``partial``."""
        return "complete" if self.complete else "partial"

    def __str__(self) -> str:
        if self.complete:
            return "complete"
        return (f"partial: {self.batches} complete batches, {self.bytes_ignored} bytes "
                f"ignored ({self.tail})")


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


# --------------------------------------------------------------------------- writing


@dataclasses.dataclass
class _OpenFile:
    path: Path
    handle: Any  # binary file object
    writer: pa.ipc.RecordBatchFileWriter
    unifier: _DictionaryUnifier
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
        self._clock = clock
        self._metadata = _checked_metadata(metadata)
        self._lock = threading.RLock()
        self._open: _OpenFile | None = None
        self._closed = False
        self._position = SinkPosition(None, 0)
        self._next_counter, self._last_label = self._scan_existing()

    # ----------------------------------------------------------------- public API

    @property
    def position(self) -> SinkPosition:
        """``(file_name, batches_in_file)`` after the last write."""
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
        checked = _checked_metadata(metadata)
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
        if _row_count(data) == 0:
            return self.position
        batch = _conform(data, self.schema, self.stem)
        with self._lock:
            if self._closed:
                raise RuntimeError(f"{self.stem}: write() after close()")
            state = self._open
            if state is not None and self._rotation_due(state):
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
        """Close the open file (footer, fsync); the next write opens a new one.

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
        for name in _listdir(self.directory):
            part = _PART_NAME.match(name)
            match = _FILE_NAME.match(part.group("final") if part else name)
            if match and match.group("stem") == self.stem:
                counter = max(counter, int(match.group("counter")))
                label = max(label, match.group("label"))
        return counter + 1, label

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
            name = f"{self.stem}-{label}-{counter:05d}.arrow"
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
            _try_lock(handle.fileno())
            writer = pa.ipc.new_file(handle, schema, options=_WRITE_OPTIONS)
            unifier = _DictionaryUnifier(schema)
            writer.write_batch(unifier.apply(batch))
            handle.flush()
            os.fsync(handle.fileno())
            _publish(temp, final)
        except BaseException:
            handle.close()
            with contextlib.suppress(OSError):
                temp.unlink()
            raise
        _fsync_directory(self.directory)
        self._next_counter, self._last_label = counter + 1, label
        self._open = _OpenFile(final, handle, writer, unifier, now, 1, handle.tell())
        return self._open

    def _append(self, state: _OpenFile, batch: pa.RecordBatch) -> None:
        batch = state.unifier.apply(batch)  # touches no file
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
        release it and try to give it a footer at once (else start-up recovery will)."""
        if self._open is state:
            self._open = None
        with contextlib.suppress(Exception):
            state.handle.flush()
        with contextlib.suppress(Exception):
            state.handle.truncate(state.good_bytes)
        with contextlib.suppress(Exception):
            state.handle.close()
        with contextlib.suppress(Exception):
            _recover_file(state.path)


class _DictionaryUnifier:
    """Keeps one growing dictionary per top-level dictionary column of a file.

    Each batch's indices are remapped onto the running dictionary, so consecutive
    batches carry dictionaries that extend each other and pyarrow writes deltas,
    which the IPC file format accepts (replacements it refuses).
    """

    def __init__(self, schema: pa.Schema):
        self._columns = [i for i, field in enumerate(schema) if pa.types.is_dictionary(field.type)]
        self._values: dict[int, list] = {i: [] for i in self._columns}
        self._lookup: dict[int, dict] = {i: {} for i in self._columns}
        self._arrays: dict[int, pa.Array] = {
            i: pa.array([], type=schema.field(i).type.value_type) for i in self._columns}

    def apply(self, batch: pa.RecordBatch) -> pa.RecordBatch:
        if not self._columns:
            return batch
        columns = list(batch.columns)
        for i in self._columns:
            column = columns[i]
            if column.dictionary.equals(self._arrays[i]):
                continue
            values, lookup = self._values[i], self._lookup[i]
            local = column.dictionary.to_pylist()
            remap = np.empty(len(local), dtype=np.int64)
            grew = False
            for k, value in enumerate(local):
                index = lookup.get(value)
                if index is None:
                    index = lookup[value] = len(values)
                    values.append(value)
                    grew = True
                remap[k] = index
            if grew:
                self._arrays[i] = pa.array(values, type=column.type.value_type)
            index_type = column.type.index_type
            indices = pc.take(pa.array(remap).cast(index_type), column.indices)
            columns[i] = pa.DictionaryArray.from_arrays(
                indices, self._arrays[i], ordered=column.type.ordered)
        return pa.RecordBatch.from_arrays(columns, schema=batch.schema)


def _checked_metadata(metadata: Mapping[str, str] | None) -> dict[str, str]:
    checked = {}
    for key, value in (metadata or {}).items():
        if not isinstance(key, str) or not isinstance(value, str):
            raise TypeError(f"metadata {key!r} = {value!r}: keys and values must be str")
        if key in _RESERVED_KEYS:
            raise ValueError(f"metadata {key!r} is set by the writer itself")
        checked[key] = value
    return checked


def _row_count(data) -> int:
    if isinstance(data, (pa.RecordBatch, pa.Table)):
        return data.num_rows
    if isinstance(data, Mapping):
        for value in data.values():
            return len(value)
        return 0
    raise TypeError("write() takes a pyarrow.RecordBatch, a pyarrow.Table or a mapping of "
                    f"columns, not {type(data).__name__}")


def _conform(data, schema: pa.Schema, stem: str) -> pa.RecordBatch:
    """Columns of ``data`` as a batch of exactly ``schema`` (see ``write``)."""
    if isinstance(data, pa.Table):
        data = data.combine_chunks()
        batches = data.to_batches()
        if len(batches) == 1 and batches[0].schema.equals(schema, check_metadata=False):
            if all(c.null_count == 0 or f.nullable for c, f in zip(batches[0].columns, schema,
                                                                   strict=True)):
                return batches[0]  # already exactly the schema: nothing to convert
    if isinstance(data, (pa.RecordBatch, pa.Table)):
        names = data.schema.names
        columns = dict(zip(names, data.columns, strict=True))
        if len(columns) != len(names):
            duplicate = next(n for n in names if names.count(n) > 1)
            raise SchemaMismatchError(stem, duplicate, "appears more than once")
    else:
        columns = dict(data)
    rows = _row_count(data)
    unknown = [name for name in columns if name not in schema.names]
    if unknown:
        raise SchemaMismatchError(stem, str(unknown[0]), "not in the schema "
                                  f"(known: {', '.join(schema.names)})")
    arrays = []
    for field in schema:
        if field.name not in columns:
            if not field.nullable:
                raise SchemaMismatchError(stem, field.name, "required column is missing")
            arrays.append(pa.nulls(rows, field.type))
            continue
        array = _to_array(columns[field.name], field, stem)
        if len(array) != rows:
            raise SchemaMismatchError(stem, field.name, f"has {len(array)} rows, "
                                      f"expected {rows} like the first column")
        if array.null_count and not field.nullable:
            raise SchemaMismatchError(stem, field.name,
                                      f"{array.null_count} null(s) in a non-nullable column")
        arrays.append(array)
    return pa.RecordBatch.from_arrays(arrays, schema=schema)


def _to_array(value, field: pa.Field, stem: str) -> pa.Array:
    if isinstance(value, pa.ChunkedArray):
        value = value.combine_chunks()
    if not isinstance(value, pa.Array):
        if isinstance(value, np.ndarray) and value.ndim == 2 and pa.types.is_list(field.type):
            value = list(value)
        try:
            return pa.array(value, type=field.type, safe=True)
        except (pa.ArrowException, TypeError, ValueError, OverflowError) as exc:
            try:  # e.g. a numpy string array for a dictionary column
                value = pa.array(value)
            except (pa.ArrowException, TypeError, ValueError, OverflowError):
                raise SchemaMismatchError(stem, field.name, f"cannot convert to {field.type}: "
                                          f"{exc}") from None
    if value.type == field.type:
        return value
    if not _cast_is_meaningful(value.type, field.type):
        raise SchemaMismatchError(stem, field.name, f"type {value.type} does not fit "
                                  f"{field.type}")
    try:
        return value.cast(field.type, safe=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError) as exc:
        raise SchemaMismatchError(stem, field.name, f"cannot cast {value.type} to "
                                  f"{field.type} safely: {exc}") from None


def _type_family(kind: pa.DataType) -> str:
    if pa.types.is_dictionary(kind):
        return _type_family(kind.value_type)
    if pa.types.is_null(kind):
        return "null"
    if pa.types.is_integer(kind) or pa.types.is_floating(kind):
        return "number"
    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        return "string"
    if pa.types.is_binary(kind) or pa.types.is_large_binary(kind):
        return "binary"
    if pa.types.is_boolean(kind):
        return "bool"
    if pa.types.is_list(kind) or pa.types.is_large_list(kind) or pa.types.is_fixed_size_list(kind):
        return "list"
    return str(kind)


def _cast_is_meaningful(source: pa.DataType, target: pa.DataType) -> bool:
    """Casts we allow: within numbers, within strings (incl. dictionary encoding),
    lists of allowed element casts, all-null columns. No parsing, no formatting."""
    family = _type_family(source)
    if family == "null":
        return True
    if family != _type_family(target):
        return False
    if family == "list":
        return _cast_is_meaningful(source.value_type, target.value_type)
    return True


def _publish(temp: Path, final: Path) -> None:
    """Give ``temp`` the name ``final`` without ever replacing an existing file."""
    try:
        os.link(temp, final)
    except FileExistsError:
        raise
    except OSError:  # no hard links on this file system
        if final.exists():
            raise FileExistsError(final) from None
        os.rename(temp, final)
        return
    os.unlink(temp)


def _try_lock(fd: int, *, blocking: bool = False) -> bool:
    """Exclusive ``flock`` (best effort: True where locking is unsupported)."""
    if fcntl is None:
        return True
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | (0 if blocking else fcntl.LOCK_NB))
    except BlockingIOError:
        return False
    except OSError:
        return True
    return True


def _fsync_directory(directory: Path) -> None:
    """Make renames and new names in ``directory`` durable (best effort)."""
    flags = os.O_RDONLY | getattr(os, "O_DIRECTORY", 0)
    try:
        fd = os.open(directory, flags)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _listdir(directory: Path) -> list[str]:
    try:
        return sorted(os.listdir(directory))
    except FileNotFoundError:
        return []


def stream_files(directory: str | Path, stem: str) -> list[Path]:
    """Files of one stream in write order (by counter, then name).

    Parameters
    ----------
    directory : str or Path
        Output directory (a missing directory has no files).
    stem : str
        Stream name.

    Returns
    -------
    list of Path
        Complete and partial ``{stem}-{label}-{counter}.arrow`` files; hidden
        temporaries (``.part``, ``.recover``) are not included.
    """
    directory = Path(directory)
    found = []
    for name in _listdir(directory):
        match = _FILE_NAME.match(name)
        if match and match.group("stem") == stem:
            found.append((int(match.group("counter")), name))
    return [directory / name for _, name in sorted(found)]


# --------------------------------------------------------------------------- reading


def _message_frame(view: memoryview, offset: int, length: int) -> tuple[str, int]:
    """Kind and body length of the flatbuffer ``Message`` of ``length`` bytes at ``offset``.

    Message fields (Arrow ``Message.fbs``): 0 version, 1 header_type, 2 header,
    3 bodyLength, 4 custom_metadata. Raises ValueError if the table is malformed.
    """
    end = offset + length

    def need(position: int, size: int) -> None:
        if not (offset <= position and position + size <= end):
            raise ValueError("flatbuffer offset outside the message metadata")

    need(offset, 4)
    (root,) = struct.unpack_from("<I", view, offset)
    table = offset + root
    need(table, 4)
    (to_vtable,) = struct.unpack_from("<i", view, table)
    vtable = table - to_vtable
    need(vtable, 4)
    (vtable_bytes,) = struct.unpack_from("<H", view, vtable)
    need(vtable, vtable_bytes)

    def field_offset(index: int) -> int:
        slot = 4 + 2 * index
        return struct.unpack_from("<H", view, vtable + slot)[0] if slot + 2 <= vtable_bytes else 0

    where = field_offset(1)
    if where:
        need(table + where, 1)
    kind_code = view[table + where] if where else 0
    where = field_offset(3)
    if where:
        need(table + where, 8)
    body = struct.unpack_from("<q", view, table + where)[0] if where else 0
    if body < 0:
        raise ValueError(f"negative body length {body}")
    return _MESSAGE_KINDS.get(kind_code, f"kind{kind_code}"), body


def _scan_messages(
    view: memoryview, size: int, start: int = _HEADER_BYTES,
) -> tuple[list[tuple[str, int, int]], str, str]:
    """Complete message frames from ``start`` (after the magic), and how the data ends.

    Returns ``(messages, tail, detail)`` with messages as ``(kind, start, end)`` byte
    offsets in the file and tail one of ``message_boundary``, ``truncated_message``,
    ``end_of_stream``, ``zero_fill``, ``corrupt``.
    """
    messages: list[tuple[str, int, int]] = []
    position = start
    while True:
        remaining = size - position
        if remaining == 0:
            return messages, "message_boundary", "data ends on a message boundary"
        prefix = bytes(view[position:position + min(remaining, 4)])
        if prefix != b"\xff" * len(prefix):
            if not np.frombuffer(view[position:size], dtype=np.uint8).any():
                return messages, "zero_fill", f"{remaining} zero bytes at offset {position}"
            return messages, "corrupt", f"no message continuation marker at offset {position}"
        if remaining < 8:
            return messages, "truncated_message", f"message prefix cut at offset {size}"
        (length,) = struct.unpack_from("<i", view, position + 4)
        if length == 0:
            return messages, "end_of_stream", (f"end-of-stream marker at offset {position}, "
                                               "footer missing or incomplete")
        if length < 0:
            return messages, "corrupt", f"negative metadata length at offset {position}"
        if position + 8 + length > size:
            return messages, "truncated_message", (
                f"message at offset {position} declares {length} metadata bytes, "
                f"{remaining - 8} present")
        try:
            kind, body = _message_frame(view, position + 8, length)
        except (ValueError, struct.error, IndexError) as exc:
            return messages, "corrupt", f"unreadable message metadata at offset {position}: {exc}"
        end = position + 8 + length + body
        if end > size:
            return messages, "truncated_message", (
                f"{kind} message at offset {position} declares a {body}-byte body, "
                f"{size - position - 8 - length} present")
        messages.append((kind, position, end))
        position = end


def _open_complete(buffer: pa.Buffer) -> pa.ipc.RecordBatchFileReader | None:
    if buffer.size < 2 * len(_MAGIC) + 4 or buffer[-len(_MAGIC):].to_pybytes() != _MAGIC:
        return None
    try:
        return pa.ipc.open_file(buffer)
    except _READ_ERRORS:
        return None


def _read(path: Path, *, whole_complete: bool = True):
    """``(schema, batches, info)``; ``batches`` is None for a complete file when
    ``whole_complete`` is False (footer check only)."""
    with pa.memory_map(str(path), "r") as source:
        buffer = source.read_buffer()
    size = buffer.size
    head = buffer[:_HEADER_BYTES].to_pybytes()
    if head.startswith(_MAGIC):
        start, kind = _HEADER_BYTES, "file"
    elif head[:4] == b"\xff" * 4:
        start, kind = 0, "stream"
    elif _MAGIC.startswith(head[:len(_MAGIC)]) and size < _HEADER_BYTES:
        raise ArrowFileError(path, f"only {size} bytes, no complete header")
    else:
        raise ArrowFileError(path, "not an Arrow IPC file (no 'ARROW1' magic, no stream "
                             "message)")
    reader = _open_complete(buffer) if kind == "file" else None
    if reader is not None:
        batches = None
        if whole_complete:
            batches = [reader.get_batch(i) for i in range(reader.num_record_batches)]
        rows = sum(b.num_rows for b in batches) if batches is not None else -1
        info = ArrowFileInfo(path, True, reader.num_record_batches, rows, size, 0, "footer",
                             "footer present and valid")
        return reader.schema, batches, info

    view = memoryview(buffer)
    messages, tail, detail = _scan_messages(view, size, start)
    if not messages or messages[0][0] != "schema":
        raise ArrowFileError(path, f"no complete schema message ({detail})")
    batch_ends = [end for what, _, end in messages if what == "record_batch"]
    cut = batch_ends[-1] if batch_ends else messages[0][2]
    source = pa.BufferReader(buffer.slice(start, cut - start))
    try:
        stream = pa.ipc.open_stream(source)
    except _READ_ERRORS as exc:
        raise ArrowFileError(path, f"schema message cannot be decoded: {exc}") from None
    batches, used = [], messages[0][2]
    while True:
        try:
            batch = stream.read_next_batch()
        except StopIteration:
            break
        except _READ_ERRORS as exc:
            tail, detail = "corrupt", f"batch {len(batches)} cannot be decoded: {exc}"
            break
        batches.append(batch)
        used = start + source.tell()
    if tail != "corrupt" and len(batches) != len(batch_ends):
        tail, detail = "corrupt", (f"{len(batch_ends)} complete record-batch frames but only "
                                   f"{len(batches)} decoded")
    rows = sum(b.num_rows for b in batches)
    complete = kind == "stream" and tail == "end_of_stream"
    if complete:
        detail, used = "IPC stream format, ends with its end-of-stream marker", size
    info = ArrowFileInfo(path, complete, len(batches), rows, size, size - used, tail, detail,
                         kind)
    return stream.schema, batches, info


def read_arrow_file_report(path: str | Path) -> tuple[pa.Table, ArrowFileInfo]:
    """Read an output file, complete or cut short, and say what was found.

    A file with a valid footer is read with ``pa.ipc.open_file``. Otherwise the
    IPC stream after the 8-byte magic is read up to the end of the last complete
    record batch; a truncated final batch (or any other incomplete tail) is left
    out and accounted for in ``info.bytes_ignored``. Input in the IPC stream format
    (no magic) is read the same way from its first byte.

    Parameters
    ----------
    path : str or Path
        The file.

    Returns
    -------
    table : pyarrow.Table
        All complete batches, with the file's schema and metadata (memory-mapped).
    info : ArrowFileInfo
        Complete or partial, batches and rows read, bytes ignored, how it ends.

    Raises
    ------
    ArrowFileError
        The file is not an Arrow IPC file or lacks a complete schema message.
    """
    path = Path(path)
    schema, batches, info = _read(path)
    return pa.Table.from_batches(batches, schema=schema), info


def read_arrow_file(path: str | Path) -> pa.Table:
    """All complete batches of an output file (see ``read_arrow_file_report``).

    Parameters
    ----------
    path : str or Path
        The file.

    Returns
    -------
    pyarrow.Table
        The complete batches; a truncated final batch is dropped silently.
    """
    return read_arrow_file_report(path)[0]


def read_stream(directory: str | Path, stem: str, schema: pa.Schema | None = None) -> pa.Table:
    """All files of one stream, complete or partial, concatenated in write order.

    Parameters
    ----------
    directory : str or Path
        Output directory.
    stem : str
        Stream name.
    schema : pyarrow.Schema, optional
        Schema of the empty table returned when there are no files; defaults to
        ``turnstamp.io.schemas.OUTPUTS[stem]`` (no columns for an unknown stem).

    Returns
    -------
    pyarrow.Table
        The rows; schema metadata is that of the first file.
    """
    tables = [read_arrow_file(path) for path in stream_files(directory, stem)]
    if tables:
        return pa.concat_tables(tables)
    if schema is None:
        from .schemas import OUTPUTS

        schema = OUTPUTS.get(stem, pa.schema([]))
    return schema.empty_table()


# --------------------------------------------------------------------------- recovery


def _write_complete(batches: list[pa.RecordBatch], schema: pa.Schema, target: Path) -> None:
    """Write a complete file next to ``target``, verify it, then replace ``target``."""
    temp = target.parent / f".{target.name}.{uuid.uuid4().hex}.recover"
    try:
        with open(temp, "xb") as handle:
            writer = pa.ipc.new_file(handle, schema, options=_WRITE_OPTIONS)
            unifier = _DictionaryUnifier(schema)
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
    _fsync_directory(target.parent)


def _recover_file(path: Path) -> RecoveryReport | None:
    """Give one footer-less output file a footer; None if it is already complete."""
    with open(path, "rb") as guard:
        if not _try_lock(guard.fileno()):
            return RecoveryReport(path, "in_use", 0, 0, 0, "locked by a live writer")
        try:
            schema, batches, info = _read(path, whole_complete=False)
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
    for name in _listdir(directory):
        path = directory / name
        leftover = _RECOVER_NAME.match(name)
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
        part = _PART_NAME.match(name)
        if part:
            reports.append(_remove_unpublished(path, directory / part.group("final")))
            continue
        if _FILE_NAME.match(name) and path.is_file():
            report = _recover_file(path)
            if report is not None:
                reports.append(report)
    return reports


def _remove_unpublished(path: Path, final: Path) -> RecoveryReport:
    with open(path, "rb") as guard:
        if not _try_lock(guard.fileno()):
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
    _fsync_directory(path.parent)
    return RecoveryReport(path, "removed", 0, 0, size, detail)


def _size(path: Path) -> int:
    try:
        return path.stat().st_size
    except OSError:
        return 0


# --------------------------------------------------------------------------- small files


def atomic_write_text(path: str | Path, text: str, *, encoding: str = "utf-8") -> None:
    """Replace ``path`` with ``text`` so that readers see the old or the new file, whole.

    The text goes to a temporary file in the same directory, which is flushed,
    fsynced and moved over ``path`` with ``os.replace``; the directory is then
    fsynced (best effort). An existing file's permissions are kept. On any error
    the temporary file is removed and ``path`` is untouched.

    Parameters
    ----------
    path : str or Path
        Destination (checkpoint, status file).
    text : str
        New content.
    encoding : str, optional
        Text encoding (UTF-8).
    """
    path = Path(path)
    data = text.encode(encoding)
    temp = path.parent / f".{path.name}.{uuid.uuid4().hex}.tmp"
    fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
    try:
        with contextlib.suppress(FileNotFoundError):
            os.fchmod(fd, path.stat().st_mode & 0o7777)
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(temp)
        raise
    _fsync_directory(path.parent)


def atomic_write_json(path: str | Path, obj: Any, *, indent: int | None = 2) -> None:
    """``atomic_write_text`` of ``obj`` as JSON (sorted keys, trailing newline).

    Parameters
    ----------
    path : str or Path
        Destination.
    obj : any
        JSON-serialisable object; it is serialised before anything touches the disk.
    indent : int or None, optional
        Indentation (2); None for one line.
    """
    text = json.dumps(obj, indent=indent, sort_keys=True, ensure_ascii=False) + "\n"
    atomic_write_text(path, text)
