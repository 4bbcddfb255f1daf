"""The two fields of Arrow IPC metadata read by hand, checked against pyarrow itself."""

from __future__ import annotations

import pyarrow as pa
import pytest
from hypothesis import given
from hypothesis import strategies as st

from turnstamp.errors import ArrowMetadataError
from turnstamp.files.arrow_metadata import declared_body_length, uses_compression


def _messages(compression=None) -> list:
    """The IPC messages of a stream with a dictionary column (schema, dictionary, batch)."""
    table = pa.table({"event_id": pa.array([1, 2, 3], pa.uint64()),
                      "target": pa.array(["a", "b", "a"]).dictionary_encode()})
    sink = pa.BufferOutputStream()
    options = pa.ipc.IpcWriteOptions(compression=compression)
    with pa.ipc.new_stream(sink, table.schema, options=options) as writer:
        writer.write_table(table)
    return list(pa.ipc.MessageReader.open_stream(sink.getvalue()))


@pytest.mark.parametrize("compression", [None, "lz4", "zstd"])
def test_body_length_and_compression_agree_with_pyarrow(compression):
    messages = _messages(compression)
    assert [m.type for m in messages] == ["schema", "dictionary", "record batch"]
    for message in messages:
        # pyarrow.ipc.Message.body: pyarrow read exactly the declared body length
        body = 0 if message.body is None else message.body.size
        assert declared_body_length(message.metadata) == body
        assert uses_compression(message) == (compression is not None
                                             and message.type != "schema")


@pytest.mark.parametrize("metadata", [b"", b"\x01\x00", b"\xff\xff\xff\x7f" + bytes(12),
                                      b"\x04\x00\x00\x00" + b"\xf0\xff\xff\x7f"])
def test_offsets_outside_the_metadata_are_refused(metadata):
    with pytest.raises(ArrowMetadataError, match="outside"):
        declared_body_length(metadata)


@given(st.binary(max_size=64))
def test_any_bytes_give_a_length_or_our_error(data):
    try:
        length = declared_body_length(data)
    except ArrowMetadataError:
        return
    assert length >= 0
