"""Walking the messages of an Arrow IPC file or stream, to tell a cut from corruption.

Theory of operation
-------------------
The output files are in the Arrow IPC *file format*, laid out as::

    "ARROW1\\0\\0"                      8 bytes: magic and padding
    schema message                     } exactly the IPC *stream* format
    dictionary / record-batch messages }
    end-of-stream marker               0xFFFFFFFF 0x00000000
    footer (flatbuffer), int32 footer length, "ARROW1"

Each encapsulated message is ``0xFFFFFFFF``, an int32 metadata length ``L``, ``L``
bytes of flatbuffer ``Message`` metadata (its ``bodyLength`` field gives the size of
the body) and the body. The footer only repeats the schema and the offsets of the
blocks, so everything before it is a valid stream.

:func:`scan_messages` walks the messages from offset 8 (0 for a stream): the 8-byte
prefix of each (continuation marker, metadata length) says whether its metadata is
all there, and ``pa.ipc.read_message`` reads and verifies each message whose
metadata is (its source position afterwards is exactly the message's end). When
pyarrow cannot read a message, the body length its metadata declares
(:func:`~turnstamp.files.arrow_metadata.declared_body_length`, which pyarrow does
not expose) tells a *truncated* tail (a message running past the end of the data)
from *corruption* (a message that is all there but cannot be read). A partial
footer after the end-of-stream marker, or zero fill where the data never came,
also count as truncation.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from ..errors import ArrowMetadataError
from .arrow_metadata import declared_body_length

__all__ = ["MAGIC", "HEADER_BYTES", "CONTINUATION", "scan_messages"]

MAGIC = b"ARROW1"
"""Magic at both ends of the IPC file format."""
HEADER_BYTES = 8
"""The file format's header: magic plus two bytes of padding."""
CONTINUATION = b"\xff" * 4
"""Marker opening every encapsulated message."""

_KINDS = {"schema": "schema", "dictionary": "dictionary", "record batch": "record_batch"}
# pyarrow raises these for truncated or undecodable IPC data.
_READ_ERRORS = (pa.ArrowException, OSError, ValueError, EOFError)


def scan_messages(buffer: pa.Buffer, start: int = HEADER_BYTES
                  ) -> tuple[list[tuple[str, int, int]], str, str]:
    """Complete messages from ``start`` (after the magic), and how the data end.

    Parameters
    ----------
    buffer : pyarrow.Buffer
        The file's bytes.
    start : int
        Offset of the first message: 8 for the file format, 0 for a stream.

    Returns
    -------
    messages : list of (kind, start, end)
        ``kind`` is ``schema``, ``dictionary``, ``record_batch`` (or pyarrow's name of
        another type); ``start`` and ``end`` are byte offsets in the file.
    tail : str
        ``message_boundary``, ``truncated_message``, ``end_of_stream``, ``zero_fill``
        or ``corrupt``.
    detail : str
        Where and why, in words.
    """
    messages: list[tuple[str, int, int]] = []
    position = start
    while True:
        length, tail, detail = _metadata_length(buffer, position)
        if tail:
            return messages, tail, detail
        source = pa.BufferReader(buffer.slice(position))
        try:
            message = pa.ipc.read_message(source)
        except _READ_ERRORS as exc:
            return messages, *_unreadable(buffer, position, length, exc)
        end = position + source.tell()
        messages.append((_KINDS.get(message.type, message.type), position, end))
        position = end


def _metadata_length(buffer: pa.Buffer, position: int) -> tuple[int, str, str]:
    """The metadata length of the message at ``position``, with an empty tail when its
    metadata is all there; else how the data end there."""
    size = buffer.size
    remaining = size - position
    if remaining == 0:
        return 0, "message_boundary", "data ends on a message boundary"
    prefix = buffer.slice(position, min(remaining, 4)).to_pybytes() if remaining > 0 else b""
    if prefix != CONTINUATION[:len(prefix)]:
        if not np.frombuffer(buffer.slice(position), dtype=np.uint8).any():
            return 0, "zero_fill", f"{remaining} zero bytes at offset {position}"
        return 0, "corrupt", f"no message continuation marker at offset {position}"
    if remaining < 8:
        return 0, "truncated_message", f"message prefix cut at offset {size}"
    length = int.from_bytes(buffer.slice(position + 4, 4).to_pybytes(), "little", signed=True)
    if length == 0:
        return 0, "end_of_stream", (f"end-of-stream marker at offset {position}, "
                                    "footer missing or incomplete")
    if length < 0:
        return 0, "corrupt", f"negative metadata length at offset {position}"
    if position + 8 + length > size:
        return 0, "truncated_message", (f"message at offset {position} declares {length} "
                                        f"metadata bytes, {remaining - 8} present")
    return length, "", ""


def _unreadable(buffer: pa.Buffer, position: int, length: int,
                error: Exception) -> tuple[str, str]:
    """Truncated or corrupt: a message whose metadata is all there but pyarrow refused."""
    try:
        body = declared_body_length(buffer.slice(position + 8, length))
    except ArrowMetadataError as exc:
        return "corrupt", f"unreadable message metadata at offset {position}: {exc}"
    present = buffer.size - position - 8 - length
    if body > present:
        return "truncated_message", (f"message at offset {position} declares a {body}-byte "
                                     f"body, {present} present")
    return "corrupt", f"message at offset {position} cannot be read: {error}"
