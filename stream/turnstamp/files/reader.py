"""Reading a stream's Arrow files, complete or cut short, and listing them in write order.

Theory of operation
-------------------
Every output stream (``archive``, ``significance``, ...) is a sequence of Arrow IPC
*stream format* files ``{stem}-{UTC start YYYYmmddTHHMMSSZ}-{counter:05d}.arrows``
(written by :mod:`turnstamp.files.writer`): a schema message, dictionary and
record-batch messages, and, once closed, the end-of-stream marker
(``0xFFFFFFFF 0x00000000``). Files of the IPC *file format* (``.arrow``, with the
``ARROW1`` magic and a footer) are read too: inputs, and folders of older versions.

What we verified with pyarrow (26.0; the tests keep checking it): a stream reader
opened on a stream cut anywhere hands out every complete batch and then either ends
(a cut on a message boundary) or raises (``ArrowInvalid`` / ``OSError``: a cut inside
a message); it never hands out a partial batch, and after each ``read_next_batch``
the source position is exactly the end of that batch's message, which is where
recovery cuts a killed file (:mod:`turnstamp.files.recovery`). A file-format file
without its footer is the same stream after its 8-byte magic.
"""

from __future__ import annotations

import dataclasses
import os
import re
from pathlib import Path

import pyarrow as pa

from ..errors import ArrowFileError
from .schemas import OUTPUTS

__all__ = [
    "ArrowFileInfo",
    "END_OF_STREAM",
    "FILE_NAME",
    "PART_NAME",
    "RECOVER_NAME",
    "StreamScan",
    "count_batches",
    "list_names",
    "scan_stream",
    "stream_files",
    "read_arrow_batches",
    "read_arrow_file_report",
    "read_arrow_file",
    "read_stream",
]

FILE_NAME = re.compile(r"(?P<stem>.+)-(?P<label>\d{8}T\d{6}Z)-(?P<counter>\d{5,})\.arrows?\Z")
"""Name of a stream's file: ``{stem}-{label}-{counter}.arrows`` (``.arrow``: older)."""
PART_NAME = re.compile(r"\.(?P<final>.+\.arrows?)\.part\Z")
"""Hidden name of a file before its first batch is published."""
RECOVER_NAME = re.compile(r"\.(?P<final>.+\.arrows?)\.[0-9a-f]{32}\.recover\Z")
"""Hidden name of a file being rewritten by the recovery of older versions."""
END_OF_STREAM = b"\xff\xff\xff\xff\x00\x00\x00\x00"
"""The IPC end-of-stream marker: the last 8 bytes of a closed stream file."""
MAGIC = b"ARROW1"

# how pyarrow (26) says that a message runs past the end of the data
_CUT_SHORT = ("Expected to read", "Expected to be able to read", "bytes available")
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
        Closed properly: a stream ending with its end-of-stream marker right after
        the last batch, or a file-format file with a valid footer.
    batches : int
        Complete record batches read.
    rows : int
        Rows in those batches.
    file_bytes : int
        Size of the file when it was read.
    bytes_ignored : int
        Bytes after the end of the last complete record batch that were not read
        (a cut message, a dictionary without its batch). 0 for a complete file.
    tail : str
        How the data ends: ``end_of_stream`` or ``footer`` (complete),
        ``message_boundary`` (cut exactly after a message), ``truncated_message``
        (a message running past the end of the data) or ``corrupt`` (a message that
        is all there but cannot be read; nothing after it is read).
    detail : str
        Human-readable explanation of the tail.
    format : str
        ``stream`` (our output files) or ``file`` (the IPC file format).
    """

    path: Path
    complete: bool
    batches: int
    rows: int
    file_bytes: int
    bytes_ignored: int
    tail: str
    detail: str = ""
    format: str = "stream"

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
        Complete and partial ``{stem}-{label}-{counter}.arrows`` (and ``.arrow``)
        files; hidden temporaries (``.part``) are not included.
    """
    directory = Path(directory)
    found = []
    for name in list_names(directory):
        match = FILE_NAME.match(name)
        if match and match.group("stem") == stem:
            found.append((int(match.group("counter")), name))
    return [directory / name for _, name in sorted(found)]


# --------------------------------------------------------------------------- reading


@dataclasses.dataclass
class StreamScan:
    """One IPC stream read up to its last complete batch (``scan_stream``).

    Attributes
    ----------
    schema : pyarrow.Schema
        The stream's schema, metadata included.
    batches : list of pyarrow.RecordBatch
        The complete batches (empty with ``keep_batches=False``).
    ends : list of int
        File offset just after each complete batch (its dictionaries included).
    start : int
        Offset just after the schema message: the cut that keeps no batch.
    closed : bool
        The end-of-stream marker follows the last batch and ends the file.
    size : int
        Bytes in the file.
    problem : str
        Why reading stopped before the end of the data ('' when it did not).
    magic : bool
        The stream follows the magic of the IPC file format.
    """

    schema: pa.Schema
    batches: list
    ends: list
    start: int
    closed: bool
    size: int
    problem: str = ""
    magic: bool = False

    @property
    def cut_short(self) -> bool:
        """Reading stopped at a message that runs past the end of the data (pyarrow
        says it expected more bytes), not at one that is damaged."""
        return any(words in self.problem for words in _CUT_SHORT)


def _offset(buffer: pa.Buffer, path: Path) -> int:
    head = buffer[:8].to_pybytes()
    if head.startswith(MAGIC):
        return 8
    if head[:4] == END_OF_STREAM[:4]:
        return 0
    if buffer.size < 8:
        raise ArrowFileError(path, f"only {buffer.size} bytes, no complete header")
    raise ArrowFileError(path, "not an Arrow IPC file (no 'ARROW1' magic, no stream message)")


def scan_stream(path: str | Path, *, keep_batches: bool = True) -> StreamScan:
    """Read the IPC stream of ``path`` (after the magic of a file-format file) up to
    its last complete batch, noting where each batch ends.

    Raises
    ------
    ArrowFileError
        Not an Arrow IPC file, or no complete schema message.
    """
    path = Path(path)
    with pa.memory_map(str(path), "r") as source:
        buffer = source.read_buffer()
    offset = _offset(buffer, path)
    reader_source = pa.BufferReader(buffer.slice(offset))
    try:
        reader = pa.ipc.open_stream(reader_source)
    except _READ_ERRORS as exc:
        raise ArrowFileError(path, f"no complete schema message ({exc})") from None
    scan = StreamScan(reader.schema, [], [], offset + reader_source.tell(), False, buffer.size,
                      magic=offset == 8)
    while True:
        try:
            batch = reader.read_next_batch()
        except StopIteration:
            break
        except _READ_ERRORS as exc:
            scan.problem = f"batch {len(scan.ends)} cannot be read: {exc}"
            break
        scan.ends.append(offset + reader_source.tell())
        if keep_batches:
            scan.batches.append(batch)
    last = scan.ends[-1] if scan.ends else scan.start
    scan.closed = (not scan.problem and buffer.size == last + 8
                   and buffer[last:].to_pybytes() == END_OF_STREAM)
    return scan


def count_batches(path: str | Path) -> int:
    """Complete record batches in one of our files (0 when it is unreadable)."""
    try:
        return len(scan_stream(path, keep_batches=False).ends)
    except ArrowFileError:
        return 0


def _open_complete(path: Path) -> pa.ipc.RecordBatchFileReader | None:
    try:
        with pa.memory_map(str(path), "r") as source:
            buffer = source.read_buffer()
        if buffer.size < 12 or buffer[-len(MAGIC):].to_pybytes() != MAGIC:
            return None
        return pa.ipc.open_file(buffer)
    except _READ_ERRORS:
        return None


def read_arrow_batches(path: str | Path
                       ) -> tuple[pa.Schema, list[pa.RecordBatch], ArrowFileInfo]:
    """The schema, the complete batches and what was found, of a complete or partial file.

    Raises
    ------
    ArrowFileError
        The file is not an Arrow IPC file or lacks a complete schema message.
    """
    path = Path(path)
    reader = _open_complete(path)
    if reader is not None:
        batches = [reader.get_batch(i) for i in range(reader.num_record_batches)]
        info = ArrowFileInfo(path, True, len(batches), sum(b.num_rows for b in batches),
                             path.stat().st_size, 0, "footer", "footer present and valid", "file")
        return reader.schema, batches, info
    scan = scan_stream(path)
    used = scan.ends[-1] if scan.ends else scan.start
    kind = "file" if scan.magic else "stream"
    if scan.closed:
        tail, detail, used = "end_of_stream", "ends with its end-of-stream marker", scan.size
    elif scan.problem:
        tail, detail = ("truncated_message" if scan.cut_short else "corrupt"), scan.problem
    else:
        tail, detail = "message_boundary", "data ends after a complete message"
    complete = scan.closed and kind == "stream"
    info = ArrowFileInfo(path, complete, len(scan.batches),
                         sum(b.num_rows for b in scan.batches), scan.size, scan.size - used,
                         tail, detail, kind)
    return scan.schema, scan.batches, info


def read_arrow_file_report(path: str | Path) -> tuple[pa.Table, ArrowFileInfo]:
    """Read an output file, complete or cut short, and say what was found.

    A stream file (ours) is read up to the end of its last complete record batch;
    a truncated final batch is left out and accounted for in ``info.bytes_ignored``.
    A file-format file with a valid footer is read with ``pa.ipc.open_file``, one
    without it as the stream after its 8-byte magic.

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
