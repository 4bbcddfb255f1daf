"""Reading a stream's Arrow files, complete or cut short, and listing them in write order.

Theory of operation
-------------------
Every output stream (``archive``, ``significance``, ...) is a sequence of Arrow IPC
*file format* files ``{stem}-{UTC start YYYYmmddTHHMMSSZ}-{counter:05d}.arrow``
(written by :mod:`turnstamp.files.writer`); their layout is drawn in
:mod:`turnstamp.files.message_scan`.

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
  never hands out a partial batch. After each ``read_next_batch`` (and each
  ``pa.ipc.read_message``) the source position is exactly the end of that message.
* ``pa.ipc.open_file`` hands every batch the file's final (delta-extended)
  dictionary, the stream reader the dictionary current at that batch: the same
  values, different ``DictionaryArray`` objects (compare decoded values).

Reading (``read_arrow_file_report``): a file whose footer opens with
``pa.ipc.open_file`` is complete. Otherwise
:func:`~turnstamp.files.message_scan.scan_messages` walks the messages after the
magic and tells a *truncated* tail from *corruption*; pyarrow's stream reader then
decodes the prefix up to the end of the last complete record batch.
"""

from __future__ import annotations

import dataclasses
import os
import re
from pathlib import Path

import pyarrow as pa

from ..errors import ArrowFileError
from .message_scan import CONTINUATION, HEADER_BYTES, MAGIC, scan_messages
from .schemas import OUTPUTS

__all__ = [
    "ArrowFileInfo",
    "FILE_NAME",
    "PART_NAME",
    "RECOVER_NAME",
    "list_names",
    "stream_files",
    "read_arrow_batches",
    "read_arrow_file_report",
    "read_arrow_file",
    "read_stream",
]

FILE_NAME = re.compile(r"(?P<stem>.+)-(?P<label>\d{8}T\d{6}Z)-(?P<counter>\d{5,})\.arrow\Z")
"""Name of a stream's file: ``{stem}-{label}-{counter}.arrow``."""
PART_NAME = re.compile(r"\.(?P<final>.+\.arrow)\.part\Z")
"""Hidden name of a file before its first batch is published."""
RECOVER_NAME = re.compile(r"\.(?P<final>.+\.arrow)\.[0-9a-f]{32}\.recover\Z")
"""Hidden name of a file being rewritten by recovery."""

# pyarrow raises these for truncated or undecodable IPC data.
_READ_ERRORS = (pa.ArrowException, OSError, ValueError, EOFError)


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


def list_names(directory: Path) -> list[str]:
    """Names in ``directory``, sorted; none when it does not exist."""
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
    for name in list_names(directory):
        match = FILE_NAME.match(name)
        if match and match.group("stem") == stem:
            found.append((int(match.group("counter")), name))
    return [directory / name for _, name in sorted(found)]


# --------------------------------------------------------------------------- reading


def _open_complete(buffer: pa.Buffer) -> pa.ipc.RecordBatchFileReader | None:
    if buffer.size < 2 * len(MAGIC) + 4 or buffer[-len(MAGIC):].to_pybytes() != MAGIC:
        return None
    try:
        return pa.ipc.open_file(buffer)
    except _READ_ERRORS:
        return None


def _layout(path: Path, buffer: pa.Buffer) -> tuple[int, str]:
    """Offset of the first message and ``file`` or ``stream``; ArrowFileError otherwise."""
    size = buffer.size
    head = buffer[:HEADER_BYTES].to_pybytes()
    if head.startswith(MAGIC):
        return HEADER_BYTES, "file"
    if head[:4] == CONTINUATION:
        return 0, "stream"
    if MAGIC.startswith(head[:len(MAGIC)]) and size < HEADER_BYTES:
        raise ArrowFileError(path, f"only {size} bytes, no complete header")
    raise ArrowFileError(path, "not an Arrow IPC file (no 'ARROW1' magic, no stream message)")


def read_arrow_batches(path: str | Path, *, read_complete: bool = True
                       ) -> tuple[pa.Schema, list[pa.RecordBatch] | None, ArrowFileInfo]:
    """The schema, the complete batches and what was found, of a complete or partial file.

    Parameters
    ----------
    path : str or Path
        The file.
    read_complete : bool
        False: for a complete file, check the footer only and return None as the
        batches (``info.rows`` is then -1).

    Raises
    ------
    ArrowFileError
        The file is not an Arrow IPC file or lacks a complete schema message.
    """
    path = Path(path)
    with pa.memory_map(str(path), "r") as source:
        buffer = source.read_buffer()
    start, kind = _layout(path, buffer)
    reader = _open_complete(buffer) if kind == "file" else None
    if reader is None:
        return _read_partial(path, buffer, start, kind)
    batches = None
    if read_complete:
        batches = [reader.get_batch(i) for i in range(reader.num_record_batches)]
    rows = sum(b.num_rows for b in batches) if batches is not None else -1
    info = ArrowFileInfo(path, True, reader.num_record_batches, rows, buffer.size, 0, "footer",
                         "footer present and valid")
    return reader.schema, batches, info


def _read_partial(path: Path, buffer: pa.Buffer, start: int, kind: str
                  ) -> tuple[pa.Schema, list[pa.RecordBatch], ArrowFileInfo]:
    """A file without a valid footer (or a stream): decoded up to its last complete batch."""
    size = buffer.size
    messages, tail, detail = scan_messages(buffer, start)
    if not messages or messages[0][0] != "schema":
        raise ArrowFileError(path, f"no complete schema message ({detail})")
    batch_ends = [end for what, _, end in messages if what == "record_batch"]
    cut = batch_ends[-1] if batch_ends else messages[0][2]
    source = pa.BufferReader(buffer.slice(start, cut - start))
    try:
        stream = pa.ipc.open_stream(source)
    except _READ_ERRORS as exc:
        raise ArrowFileError(path, f"schema message cannot be decoded: {exc}") from None
    batches, used, problem = _decode_batches(stream, source, start, messages[0][2])
    if problem:
        tail, detail = "corrupt", problem
    elif len(batches) != len(batch_ends):
        tail, detail = "corrupt", (f"{len(batch_ends)} complete record-batch frames but only "
                                   f"{len(batches)} decoded")
    rows = sum(b.num_rows for b in batches)
    complete = kind == "stream" and tail == "end_of_stream"
    if complete:
        detail, used = "IPC stream format, ends with its end-of-stream marker", size
    info = ArrowFileInfo(path, complete, len(batches), rows, size, size - used, tail, detail,
                         kind)
    return stream.schema, batches, info


def _decode_batches(stream: pa.ipc.RecordBatchStreamReader, source: pa.BufferReader,
                    start: int, used: int) -> tuple[list[pa.RecordBatch], int, str]:
    """Every batch the stream reader decodes, the file offset after the last one, and
    what stopped it when that is not the end of the data ('' then)."""
    batches: list[pa.RecordBatch] = []
    while True:
        try:
            batch = stream.read_next_batch()
        except StopIteration:
            return batches, used, ""
        except _READ_ERRORS as exc:
            return batches, used, f"batch {len(batches)} cannot be decoded: {exc}"
        batches.append(batch)
        used = start + source.tell()


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
    schema, batches, info = read_arrow_batches(path)
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
        ``turnstamp.files.schemas.OUTPUTS[stem]`` (no columns for an unknown stem).

    Returns
    -------
    pyarrow.Table
        The rows; schema metadata is that of the first file.
    """
    tables = [read_arrow_file(path) for path in stream_files(directory, stem)]
    if tables:
        return pa.concat_tables(tables)
    if schema is None:
        schema = OUTPUTS.get(stem, pa.schema([]))
    return schema.empty_table()
