"""The two facts of Arrow IPC message metadata that pyarrow does not expose.

Theory of operation
-------------------
pyarrow's message API reads everything else we need: ``pa.ipc.MessageReader`` and
``pa.ipc.read_message`` frame the encapsulated messages, verify their FlatBuffers
metadata and hand out a ``Message`` with its ``type`` (``'schema'``,
``'dictionary'``, ``'record batch'``, ...), ``metadata`` (the ``Message`` table)
and ``body``; ``pa.ipc.read_schema`` and the stream reader decode schema and
batches. Two facts are missing from that API (pyarrow 26):

* **whether a batch body is compressed** (``RecordBatch.compression``, also inside
  a ``DictionaryBatch``). pyarrow only finds out while decoding, and then
  allocates whatever uncompressed size the sender wrote in front of each buffer,
  so a hostile message of a few bytes could ask for gigabytes;
* **the body length a message declares** (``Message.bodyLength``) when its body
  is cut short: pyarrow reads the body before it hands out the ``Message`` and its
  refusal does not say whether the metadata itself was sound, which is what tells
  a truncated file from a corrupt one.

This module reads just these two fields, and only from metadata that is complete.
Layout from Arrow's ``format/Message.fbs``: ``Message {version, header_type,
header, bodyLength, custom_metadata}``, ``DictionaryBatch {id, data, isDelta}``,
``RecordBatch {length, nodes, buffers, compression, ...}``; FlatBuffers tables per
the FlatBuffers binary format (a uoffset to the root table, an soffset from a table
to its vtable, the vtable's uint16 field offsets). Every read is bounds-checked and
refuses with :class:`~turnstamp.errors.ArrowMetadataError`.
"""

from __future__ import annotations

import struct
from typing import Any

from ..errors import ArrowMetadataError

__all__ = ["declared_body_length", "uses_compression"]

# field indexes of the tables (Message.fbs)
_MESSAGE_HEADER, _MESSAGE_BODY_LENGTH = 2, 3
_DICTIONARY_DATA = 1
_RECORD_BATCH_COMPRESSION = 3


def _read(data: memoryview, fmt: str, position: int) -> int:
    if position < 0 or position + struct.calcsize(fmt) > len(data):
        raise ArrowMetadataError(f"FlatBuffers offset {position} outside the "
                                 f"{len(data)}-byte metadata")
    return struct.unpack_from(fmt, data, position)[0]


class _Table:
    """One FlatBuffers table inside ``data``, at byte ``position``."""

    def __init__(self, data: memoryview, position: int):
        self.data = data
        self.position = position
        self._vtable = position - _read(data, "<i", position)
        self._vtable_bytes = _read(data, "<H", self._vtable)

    def field(self, index: int) -> int | None:
        """Byte position of field ``index``, None when the field is absent."""
        slot = 4 + 2 * index
        if slot + 2 > self._vtable_bytes:
            return None
        offset = _read(self.data, "<H", self._vtable + slot)
        return self.position + offset if offset else None

    def int64(self, index: int) -> int:
        """Field ``index`` as an int64 (0, its default, when absent)."""
        at = self.field(index)
        return 0 if at is None else _read(self.data, "<q", at)

    def table(self, index: int) -> _Table | None:
        """The table field ``index`` points to, None when absent."""
        at = self.field(index)
        return None if at is None else _Table(self.data, at + _read(self.data, "<I", at))


def _root(metadata: Any) -> _Table:
    data = memoryview(metadata).cast("B")
    return _Table(data, _read(data, "<I", 0))


def declared_body_length(metadata: Any) -> int:
    """The ``bodyLength`` of one message's FlatBuffers metadata, in bytes.

    Parameters
    ----------
    metadata : bytes-like
        The metadata alone (after the continuation marker and length prefix).

    Raises
    ------
    ArrowMetadataError
        An offset points outside the metadata, or the length is negative.
    """
    length = _root(metadata).int64(_MESSAGE_BODY_LENGTH)
    if length < 0:
        raise ArrowMetadataError(f"negative body length {length}")
    return length


def uses_compression(message: Any) -> bool:
    """True when a ``dictionary`` or ``record batch`` message compresses its body.

    Parameters
    ----------
    message : pyarrow.ipc.Message
        A message pyarrow has read (its metadata verified); other types are False.

    Raises
    ------
    ArrowMetadataError
        The batch table cannot be found in the metadata.
    """
    if message.type not in ("dictionary", "record batch"):
        return False
    batch = _root(message.metadata).table(_MESSAGE_HEADER)
    if batch is not None and message.type == "dictionary":
        batch = batch.table(_DICTIONARY_DATA)
    if batch is None:
        raise ArrowMetadataError(f"{message.type} message without its batch table")
    return batch.field(_RECORD_BATCH_COMPRESSION) is not None
