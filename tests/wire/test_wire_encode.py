"""Encoding: round trips through the decoder, zero-copy views, the encoder's own checks."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
import zmq
from wire_frames import (
    body_frame,
    decode,
    full_columns,
    header_frame,
)

from turnstamp.core.batch import MISSING_ID, MISSING_TIME, EventBatch
from turnstamp.core.timebase import Scale
from turnstamp.errors import InputError
from turnstamp.wire.decode import DecodedMessage
from turnstamp.wire.encode import encode_batch, encode_message
from turnstamp.wire.message import WIRE_VERSION, MessageHeader


def test_round_trip_every_column(rng):
    columns = full_columns(257, rng)
    frames = encode_message("array-east.2", 41, Scale.GPS, columns, topic=b"events",
                            sent_utc_ns=123)
    assert len(frames) == 3 and frames[0] == b"events"
    decoded = decode(frames, has_topic=True)
    assert isinstance(decoded, DecodedMessage)
    assert decoded.topic == b"events"
    assert decoded.notes == []
    assert decoded.message_bytes == sum(map(len, frames))
    assert decoded.header == MessageHeader(format="turnstamp.events", version=WIRE_VERSION,
                                           source="array-east.2", sequence=41,
                                           time_scale="GPS", events=257, sent_utc_ns=123)
    batch = decoded.batch
    assert (batch.source, batch.sequence, batch.time_scale) == ("array-east.2", 41, Scale.GPS)
    assert set(batch.columns()) == set(columns)
    for name, values in columns.items():
        got = getattr(batch, name)
        assert got.dtype == values.dtype, name
        np.testing.assert_array_equal(got, values, err_msg=name)


def test_encode_batch_round_trip(rng):
    columns = full_columns(5, rng)
    columns["event_id"][0] = MISSING_ID
    columns["time_ns"][1] = MISSING_TIME
    batch = EventBatch(source="b", sequence=0, time_scale=Scale.UTC, **columns)
    decoded = decode(encode_batch(batch, sent_utc_ns=None))
    assert decoded.header.sent_utc_ns is None
    for name, values in batch.columns().items():
        np.testing.assert_array_equal(getattr(decoded.batch, name), values)


def test_decoded_columns_are_read_only_views_of_the_body(rng):
    frames = encode_message("b", 0, "UTC", full_columns(100, rng))
    whole = np.frombuffer(frames[1], np.uint8)
    batch = decode(frames).batch
    for name, column in batch.columns().items():
        assert np.shares_memory(column, whole), name
        assert not column.flags.writeable, name


def test_frames_as_zmq_frames_and_unaligned_memoryviews(rng):
    columns = full_columns(50, rng)
    header_bytes, body = encode_message("b", 3, "TT", columns)
    shifted = bytearray(len(body) + 1)
    shifted[1:] = body
    for frames in ([zmq.Frame(header_bytes), zmq.Frame(body)],
                   [memoryview(header_bytes), memoryview(shifted)[1:]]):
        batch = decode(frames).batch
        for name, values in columns.items():
            np.testing.assert_array_equal(getattr(batch, name), values)


@pytest.mark.parametrize("batches", [0, 1])
def test_empty_batch(batches):
    columns = {"event_id": pa.array([], pa.uint64()), "time_ns": pa.array([], pa.int32()),
               "weight": pa.array([], pa.float16())}
    decoded = decode([header_frame(events=0), body_frame(columns, batches=batches)])
    batch = decoded.batch
    assert len(batch) == 0
    assert batch.event_id.dtype == np.uint64 and batch.time_ns.dtype == np.int64
    assert batch.weight.dtype == np.float64 and batch.energy_kev is None


def test_encoder_writes_no_batch_for_no_events():
    frames = encode_message("b", 0, "UTC", {"event_id": [], "time_ns": np.array([], np.int64)})
    assert len(decode(frames).batch) == 0


@pytest.mark.parametrize("columns, field", [
    ({"event_id": [1], "time_ns": [1.5]}, "time_ns"),
    ({"event_id": [-1], "time_ns": [1]}, "event_id"),
    ({"event_id": [1, 2], "time_ns": [1]}, "columns"),
    ({"event_id": [1], "time_ns": [1], "colour": [1]}, "columns"),
    ({"event_id": [1], "time_ns": [1], "ra_deg": [1.0]}, "columns"),
    ({"event_id": [1]}, "columns"),
    ({"event_id": [[1]], "time_ns": [[1]]}, "event_id"),
    ({"event_id": [True], "time_ns": [1]}, "event_id"),
])
def test_encoder_refuses_bad_columns(columns, field):
    with pytest.raises(InputError) as info:
        encode_message("b", 0, "UTC", columns)
    assert info.value.field == field


@pytest.mark.parametrize("kwargs, field", [({"source": "bad source"}, "source"),
                                           ({"sequence": -1}, "sequence"),
                                           ({"time_scale": "TDB"}, "time_scale")])
def test_encoder_refuses_bad_header_values(kwargs, field):
    arguments = {"source": "b", "sequence": 0, "time_scale": "UTC", **kwargs}
    with pytest.raises(InputError) as info:
        encode_message(columns={"event_id": [1], "time_ns": [1]}, **arguments)
    assert info.value.field == field


def test_header_json_schema_is_exported():
    schema = MessageHeader.model_json_schema()
    assert schema["additionalProperties"] is False
    assert set(schema["required"]) == {"format", "version", "source", "sequence", "time_scale",
                                       "events"}
