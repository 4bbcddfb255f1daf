"""The wire format: round trips, every refusal, fuzzing, real sockets, sequence tracking."""

from __future__ import annotations

import json
import pickle
from collections import OrderedDict

import numpy as np
import pyarrow as pa
import pytest
import zmq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from turnstamp.core.batch import MISSING_ID, MISSING_TIME, EventBatch
from turnstamp.core.timebase import Scale
from turnstamp.errors import InputError, RejectReason
from turnstamp.io.wire import (
    MAX_HEADER_BYTES,
    WIRE_VERSION,
    DecodedMessage,
    EventPublisher,
    MessageHeader,
    SequenceKind,
    SequenceTracker,
    WireError,
    decode_message,
    encode_batch,
    encode_message,
)

LIMITS = {"max_message_bytes": 1 << 20, "max_events": 10_000}
FLOAT_COLUMNS = ("energy_kev", "ra_deg", "dec_deg", "score", "weight")


def decode(frames, has_topic=False, **limits):
    return decode_message(frames, has_topic=has_topic, **{**LIMITS, **limits})


def header(**changes) -> dict:
    fields = {"format": "turnstamp.events", "version": 1, "source": "builder-7",
              "sequence": 12, "time_scale": "TAI", "events": 3}
    fields.update(changes)
    return {k: v for k, v in fields.items() if v is not _DROP}


_DROP = object()


def header_frame(**changes) -> bytes:
    return json.dumps(header(**changes)).encode()


def body_frame(columns: dict | None = None, batches: int = 1, compression=None) -> bytes:
    """An IPC stream of the given Arrow arrays (default: three valid events)."""
    if columns is None:
        columns = {"event_id": pa.array([1, 2, 3], pa.uint64()),
                   "time_ns": pa.array([10, 20, 30], pa.int64())}
    batch = pa.record_batch(columns)
    sink = pa.BufferOutputStream()
    options = pa.ipc.IpcWriteOptions(compression=compression)
    with pa.ipc.new_stream(sink, batch.schema, options=options) as writer:
        for _ in range(batches):
            writer.write_batch(batch)
    return sink.getvalue().to_pybytes()


def refusal(frames, reason: RejectReason, has_topic=False, **limits) -> WireError:
    with pytest.raises(WireError) as info:
        decode(frames, has_topic=has_topic, **limits)
    error = info.value
    assert error.reason is reason, error
    assert error.detail
    return error


def full_columns(n: int, rng) -> dict[str, np.ndarray]:
    return {
        "event_id": rng.permutation(n).astype(np.uint64) + np.uint64(2**63),
        "time_ns": rng.integers(-(2**62), 2**62, n),
        "energy_kev": rng.uniform(0, 1e3, n),
        "ra_deg": rng.uniform(0, 360, n),
        "dec_deg": rng.uniform(-90, 90, n),
        "score": rng.normal(size=n),
        "weight": rng.uniform(0, 1, n),
        "telescope_mask": rng.integers(0, 2**63, n).astype(np.uint64) | np.uint64(2**63),
    }


# ---------------------------------------------------------------------------------------
# round trips


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


def test_nulls_become_sentinels():
    columns = {
        "event_id": pa.array([None, 5, 6], pa.uint64()),
        "time_ns": pa.array([1, None, 3], pa.int64()),
        "energy_kev": pa.array([1.5, None, None], pa.float32()),
        "ra_deg": pa.array([None, 2, 3], pa.int16()),
        "dec_deg": pa.array([None] * 3, pa.null()),
        "telescope_mask": pa.array([3, None, 1], pa.uint8()),
    }
    batch = decode([header_frame(), body_frame(columns)]).batch
    np.testing.assert_array_equal(batch.event_id, [MISSING_ID, 5, 6])
    np.testing.assert_array_equal(batch.time_ns, [1, MISSING_TIME, 3])
    np.testing.assert_array_equal(batch.energy_kev, [1.5, np.nan, np.nan])
    np.testing.assert_array_equal(batch.ra_deg, [np.nan, 2.0, 3.0])
    assert np.isnan(batch.dec_deg).all() and batch.dec_deg.dtype == np.float64
    np.testing.assert_array_equal(batch.telescope_mask, [3, 0, 1])
    assert batch.telescope_mask.dtype == np.uint64


INTEGER_TYPES = [pa.int8(), pa.int16(), pa.int32(), pa.int64(),
                 pa.uint8(), pa.uint16(), pa.uint32(), pa.uint64()]
SIGNED_TYPES = INTEGER_TYPES[:4]
FLOAT_TYPES = [pa.float16(), pa.float32(), pa.float64()]


@pytest.mark.parametrize("kind", INTEGER_TYPES, ids=str)
def test_event_id_and_mask_accept_every_integer_type(kind):
    columns = {"event_id": pa.array([0, 7, 127], kind), "time_ns": pa.array([1, 2, 3]),
               "telescope_mask": pa.array([1, 0, 100], kind)}
    batch = decode([header_frame(), body_frame(columns)]).batch
    assert batch.event_id.dtype == np.uint64 and batch.telescope_mask.dtype == np.uint64
    np.testing.assert_array_equal(batch.event_id, [0, 7, 127])
    np.testing.assert_array_equal(batch.telescope_mask, [1, 0, 100])


def test_event_id_keeps_the_full_uint64_range():
    values = [0, 2**63, 2**64 - 2]
    columns = {"event_id": pa.array(values, pa.uint64()), "time_ns": pa.array([1, 2, 3])}
    assert decode([header_frame(), body_frame(columns)]).batch.event_id.tolist() == values


@pytest.mark.parametrize("kind", SIGNED_TYPES, ids=str)
def test_time_accepts_signed_integers(kind):
    columns = {"event_id": pa.array([1, 2, 3]), "time_ns": pa.array([-128, 0, 127], kind)}
    batch = decode([header_frame(), body_frame(columns)]).batch
    assert batch.time_ns.dtype == np.int64
    np.testing.assert_array_equal(batch.time_ns, [-128, 0, 127])


@pytest.mark.parametrize("kind", FLOAT_TYPES + INTEGER_TYPES, ids=str)
def test_float_columns_accept_floats_and_integers(kind):
    columns = {"event_id": pa.array([1, 2, 3]), "time_ns": pa.array([1, 2, 3]),
               **{name: pa.array([0, 1, 100], kind) for name in FLOAT_COLUMNS}}
    batch = decode([header_frame(), body_frame(columns)]).batch
    for name in FLOAT_COLUMNS:
        column = getattr(batch, name)
        assert column.dtype == np.float64
        np.testing.assert_array_equal(column, [0.0, 1.0, 100.0])


@pytest.mark.parametrize("kind, shown", [(pa.float64(), "double"), (pa.float32(), "float"),
                                         (pa.float16(), "halffloat")])
def test_floating_point_time_is_refused(kind, shown):
    columns = {"event_id": pa.array([1, 2, 3]), "time_ns": pa.array([1.0, 2.0, 3.5], kind)}
    error = refusal([header_frame(), body_frame(columns)], RejectReason.BAD_SCHEMA)
    assert "time_ns must be an integer column of ns" in error.detail
    assert error.detail.endswith(f"got {shown}")
    assert (error.source, error.sequence, error.events) == ("builder-7", 12, 3)


@pytest.mark.parametrize("kind", [pa.uint64(), pa.uint32(), pa.timestamp("ns"),
                                  pa.string(), pa.bool_()], ids=str)
def test_other_time_types_are_refused(kind):
    values = ["a", "b", "c"] if kind == pa.string() else [True, False, True] \
        if kind == pa.bool_() else [1, 2, 3]
    columns = {"event_id": pa.array([1, 2, 3]), "time_ns": pa.array(values, kind)}
    error = refusal([header_frame(), body_frame(columns)], RejectReason.BAD_SCHEMA)
    assert error.detail.startswith("time_ns must be") and str(kind) in error.detail


@pytest.mark.parametrize("name, kind", [("event_id", pa.float64()), ("energy_kev", pa.string()),
                                        ("telescope_mask", pa.float32()),
                                        ("weight", pa.dictionary(pa.int8(), pa.float64()))])
def test_wrong_column_types_are_refused(name, kind):
    if pa.types.is_dictionary(kind):
        array = pa.array([1.0, 2.0, 1.0]).dictionary_encode().cast(kind)
    elif kind == pa.string():
        array = pa.array(["1", "2", "3"])
    else:
        array = pa.array([1, 2, 3], kind)
    columns = {"event_id": pa.array([1, 2, 3]), "time_ns": pa.array([1, 2, 3]), name: array}
    if name == "event_id":
        columns["event_id"] = array
    error = refusal([header_frame(), body_frame(columns)], RejectReason.BAD_SCHEMA)
    assert error.detail.startswith(f"{name} must be")


@pytest.mark.parametrize("name", ["event_id", "telescope_mask"])
def test_negative_values_in_unsigned_columns_are_refused(name):
    columns = {"event_id": pa.array([1, 2, 3], pa.int32()), "time_ns": pa.array([1, 2, 3]),
               name: pa.array([4, None, -9], pa.int32())}
    error = refusal([header_frame(), body_frame(columns)], RejectReason.BAD_SCHEMA)
    assert name in error.detail and "-9" in error.detail and "row 2" in error.detail


def test_unknown_columns_are_ignored_and_noted():
    columns = {"time_ns": pa.array([1, 2, 3]), "pixel_hits": pa.array([[1], [], [2, 3]]),
               "event_id": pa.array([1, 2, 3]),
               "tag": pa.array(["a", "b", "a"]).dictionary_encode()}
    decoded = decode([header_frame(), body_frame(columns)])
    assert len(decoded.notes) == 2
    assert "'pixel_hits'" in decoded.notes[0] and "'tag'" in decoded.notes[1]
    assert set(decoded.batch.columns()) == {"event_id", "time_ns"}


# ---------------------------------------------------------------------------------------
# refusals


def test_oversized_message_in_bytes_keeps_the_header_context():
    frames = [header_frame(), body_frame()]
    size = sum(map(len, frames))
    assert decode(frames, max_message_bytes=size).message_bytes == size
    error = refusal(frames, RejectReason.OVERSIZED_MESSAGE, max_message_bytes=size - 1)
    assert str(size) in error.detail and "max_message_bytes" in error.detail
    assert (error.source, error.sequence, error.events) == ("builder-7", 12, 3)


def test_oversized_message_in_rows():
    error = refusal([header_frame(), body_frame()], RejectReason.OVERSIZED_MESSAGE, max_events=2)
    assert "events = 3" in error.detail and error.events == 3


def test_body_with_more_rows_than_allowed_is_refused_before_decoding():
    columns = {"event_id": pa.array(np.arange(50)), "time_ns": pa.array(np.arange(50))}
    error = refusal([header_frame(events=3), body_frame(columns)],
                    RejectReason.OVERSIZED_MESSAGE, max_events=10)
    assert "50 rows" in error.detail


def test_wrong_version():
    error = refusal([header_frame(version=2, shiny_new_field=1), body_frame()],
                    RejectReason.WRONG_VERSION)
    assert "version = 2" in error.detail
    assert (error.source, error.sequence, error.events) == ("builder-7", 12, 3)


@pytest.mark.parametrize("text", [b"{not json", b"[1, 2]", b"", b"\xff\xfe{}",
                                  b'{"events": NaN}', b"[" * 3000 + b"]" * 3000,
                                  b'{"sequence": 1, "sequence": 2}'],
                         ids=["syntax", "array", "empty", "not-utf8", "nan", "deep",
                              "duplicate-key"])
def test_header_that_is_not_a_json_object(text):
    error = refusal([text, body_frame()], RejectReason.MALFORMED_MESSAGE)
    assert "header" in error.detail
    assert error.source is None and error.events == 0


def test_header_frame_size_is_limited():
    big = header(source="b")
    big["padding"] = " " * MAX_HEADER_BYTES
    error = refusal([json.dumps(big).encode(), body_frame()], RejectReason.MALFORMED_MESSAGE)
    assert str(MAX_HEADER_BYTES) in error.detail


def test_extra_header_key():
    error = refusal([header_frame(priority="high"), body_frame()], RejectReason.MALFORMED_MESSAGE)
    assert "'priority'" in error.detail and "'high'" in error.detail
    assert (error.source, error.sequence, error.events) == ("builder-7", 12, 3)


@pytest.mark.parametrize("field, value", [
    ("sequence", "12"), ("sequence", 12.0), ("sequence", True), ("sequence", -1),
    ("sequence", 2**63), ("events", -3), ("source", ""), ("source", "has space"),
    ("source", "x" * 65), ("time_scale", "TDB"), ("time_scale", "utc"),
    ("format", "other.events"), ("sent_utc_ns", 1.5), ("version", "1"), ("version", _DROP),
    ("events", _DROP),
])
def test_header_validation(field, value):
    error = refusal([header_frame(**{field: value}), body_frame()],
                    RejectReason.MALFORMED_MESSAGE)
    assert f"'{field}'" in error.detail


def test_header_and_batch_row_counts_must_agree():
    error = refusal([header_frame(events=4), body_frame()], RejectReason.MALFORMED_MESSAGE)
    assert "events = 4" in error.detail and "3 rows" in error.detail
    refusal([header_frame(events=3), body_frame(batches=0)], RejectReason.MALFORMED_MESSAGE)
    refusal([header_frame(events=0), body_frame()], RejectReason.MALFORMED_MESSAGE)


@pytest.mark.parametrize("has_topic, count", [(False, 1), (False, 3), (True, 2), (True, 4),
                                              (False, 0)])
def test_wrong_frame_count(has_topic, count):
    frames = [b"topic", header_frame(), body_frame(), b"extra"]
    frames = frames[1:][:count] if not has_topic else frames[:count]
    error = refusal(frames, RejectReason.MALFORMED_MESSAGE, has_topic=has_topic)
    assert f"has {count} frames" in error.detail


def test_frames_must_be_buffers():
    refusal(["a string", body_frame()], RejectReason.MALFORMED_MESSAGE)
    refusal([header_frame(), 12], RejectReason.MALFORMED_MESSAGE)


@pytest.mark.parametrize("cut", [0, 1, 7, 8, 100, -40, -12])
def test_truncated_arrow_body(cut):
    error = refusal([header_frame(), body_frame()[:cut]], RejectReason.MALFORMED_MESSAGE)
    assert "Arrow" in error.detail or "rows" in error.detail
    assert (error.source, error.sequence, error.events) == ("builder-7", 12, 3)


def test_body_without_end_marker_is_accepted():
    body = body_frame()
    assert body.endswith(b"\xff\xff\xff\xff\x00\x00\x00\x00")
    assert len(decode([header_frame(), body[:-8]]).batch) == 3


def test_two_record_batches_are_refused():
    error = refusal([header_frame(), body_frame(batches=2)], RejectReason.MALFORMED_MESSAGE)
    assert "2 record batches" in error.detail


@pytest.mark.parametrize("codec", ["lz4", "zstd"])
def test_compressed_body_is_refused(codec):
    error = refusal([header_frame(), body_frame(compression=codec)],
                    RejectReason.MALFORMED_MESSAGE)
    assert "compression" in error.detail


@pytest.mark.parametrize("present, absent", [("ra_deg", "dec_deg"), ("dec_deg", "ra_deg")])
def test_ra_and_dec_come_together(present, absent):
    columns = {"event_id": pa.array([1, 2, 3]), "time_ns": pa.array([1, 2, 3]),
               present: pa.array([1.0, 2.0, 3.0])}
    error = refusal([header_frame(), body_frame(columns)], RejectReason.BAD_SCHEMA)
    assert present in error.detail and absent in error.detail


@pytest.mark.parametrize("missing", ["event_id", "time_ns"])
def test_required_columns(missing):
    columns = {"event_id": pa.array([1, 2, 3]), "time_ns": pa.array([1, 2, 3])}
    del columns[missing]
    error = refusal([header_frame(), body_frame(columns)], RejectReason.BAD_SCHEMA)
    assert missing in error.detail


def test_repeated_column_is_refused():
    schema = pa.schema([("event_id", pa.uint64()), ("time_ns", pa.int64()),
                        ("time_ns", pa.int64())])
    batch = pa.record_batch([pa.array([1], pa.uint64()), pa.array([1]), pa.array([2])],
                            schema=schema)
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, schema) as writer:
        writer.write_batch(batch)
    error = refusal([header_frame(events=1), sink.getvalue().to_pybytes()],
                    RejectReason.BAD_SCHEMA)
    assert "'time_ns' appears twice" in error.detail


def test_wire_error_pickles_and_is_an_input_error():
    error = WireError(RejectReason.BAD_SCHEMA, "detail", "s", 4, 10)
    assert isinstance(error, InputError)
    again = pickle.loads(pickle.dumps(error))
    assert (again.reason, again.detail, again.source, again.sequence, again.events) == \
        (RejectReason.BAD_SCHEMA, "detail", "s", 4, 10)


# ---------------------------------------------------------------------------------------
# fuzzing: nothing but WireError, whatever arrives

REASONS = set(RejectReason)
FUZZ_SETTINGS = settings(max_examples=150, deadline=None,
                         suppress_health_check=[HealthCheck.too_slow])


def check_decode(frames, has_topic, max_message_bytes=1 << 16, max_events=1000):
    try:
        decoded = decode_message(frames, has_topic=has_topic,
                                 max_message_bytes=max_message_bytes, max_events=max_events)
    except WireError as error:
        assert error.reason in REASONS
        assert isinstance(error.detail, str) and error.detail
        assert error.events >= 0
        return None
    assert len(decoded.batch) == decoded.header.events <= max_events
    assert decoded.message_bytes <= max_message_bytes
    return decoded


@FUZZ_SETTINGS
@given(frames=st.lists(st.binary(max_size=300), max_size=4), has_topic=st.booleans())
def test_fuzz_random_frames(frames, has_topic):
    check_decode(frames, has_topic)


json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False) | st.text(max_size=20),
    lambda children: st.lists(children, max_size=4)
    | st.dictionaries(st.text(max_size=10), children, max_size=4),
    max_leaves=10)
HEADER_KEYS = list(header()) + ["sent_utc_ns", "extra"]


@FUZZ_SETTINGS
@given(data=st.data())
def test_fuzz_random_headers(data):
    fields = header()
    for key in data.draw(st.lists(st.sampled_from(HEADER_KEYS), max_size=3)):
        action = data.draw(st.sampled_from(["drop", "replace"]))
        if action == "drop":
            fields.pop(key, None)
        else:
            fields[key] = data.draw(json_values)
    if data.draw(st.booleans()):
        text = json.dumps(fields).encode()
    else:
        text = json.dumps(data.draw(json_values)).encode()
    check_decode([text, body_frame()], False)


@st.composite
def valid_messages(draw):
    n = draw(st.integers(0, 20))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    columns = full_columns(n, rng)
    keep = draw(st.sets(st.sampled_from(["energy_kev", "sky", "score", "weight",
                                         "telescope_mask"])))
    chosen = {"event_id": columns["event_id"], "time_ns": columns["time_ns"]}
    for name in keep:
        names = ("ra_deg", "dec_deg") if name == "sky" else (name,)
        chosen.update({k: columns[k] for k in names})
    topic = draw(st.none() | st.binary(max_size=5))
    return encode_message("fuzz", draw(st.integers(0, 2**63 - 1)), "UTC", chosen, topic=topic)


@FUZZ_SETTINGS
@given(frames=valid_messages(), data=st.data())
def test_fuzz_mutated_messages(frames, data):
    has_topic = len(frames) == 3
    assert check_decode(frames, has_topic) is not None
    frames = [bytearray(frame) for frame in frames]
    for _ in range(data.draw(st.integers(1, 4))):
        mutation = data.draw(st.sampled_from(["flip", "truncate", "insert", "drop_frame",
                                              "add_frame", "swap"]))
        index = data.draw(st.integers(0, max(len(frames) - 1, 0)))
        if not frames:
            frames.append(bytearray())
            continue
        frame = frames[index]
        if mutation == "flip" and frame:
            at = data.draw(st.integers(0, len(frame) - 1))
            frame[at] ^= data.draw(st.integers(1, 255))
        elif mutation == "truncate":
            del frame[data.draw(st.integers(0, len(frame))):]
        elif mutation == "insert":
            at = data.draw(st.integers(0, len(frame)))
            frame[at:at] = data.draw(st.binary(min_size=1, max_size=16))
        elif mutation == "drop_frame":
            del frames[index]
        elif mutation == "add_frame":
            frames.insert(index, bytearray(data.draw(st.binary(max_size=40))))
        elif mutation == "swap" and len(frames) > 1:
            frames[0], frames[-1] = frames[-1], frames[0]
    limits = data.draw(st.sampled_from([(1 << 16, 1000), (300, 1000), (1 << 16, 5)]))
    check_decode([bytes(frame) for frame in frames], has_topic, *limits)


# ---------------------------------------------------------------------------------------
# encoder


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


# ---------------------------------------------------------------------------------------
# real sockets on loopback


@pytest.fixture
def context():
    ctx = zmq.Context()
    yield ctx
    ctx.destroy(linger=0)


def receive(socket, timeout_ms=5000):
    assert socket.poll(timeout_ms, zmq.POLLIN), "nothing arrived"
    return socket.recv_multipart(copy=False)


def test_push_publisher_to_pull_socket(context, rng):
    pull = context.socket(zmq.PULL)
    port = pull.bind_to_random_port("tcp://127.0.0.1")
    columns = full_columns(1000, rng)
    with EventPublisher(f"tcp://127.0.0.1:{port}", "builder-3", time_scale="TT",
                        context=context, first_sequence=5) as publisher:
        assert publisher.send(**columns) == 5
        assert publisher.send(event_id=[1, 2], time_ns=[3, 4], weight=None) == 6
        assert publisher.sequence == 7
        first = decode_message(receive(pull), has_topic=False, **LIMITS)
        second = decode_message(receive(pull), has_topic=False, **LIMITS)
    assert publisher.closed
    assert (first.header.source, first.header.sequence, first.header.time_scale) == \
        ("builder-3", 5, "TT")
    assert first.header.sent_utc_ns is not None and first.topic is None
    for name, values in columns.items():
        np.testing.assert_array_equal(getattr(first.batch, name), values)
    assert second.header.sequence == 6 and second.batch.event_id.tolist() == [1, 2]
    pull.close(linger=0)


def test_pub_publisher_with_topic_to_sub_socket(context):
    sub = context.socket(zmq.SUB)
    sub.setsockopt(zmq.SUBSCRIBE, b"fast")
    port = sub.bind_to_random_port("tcp://127.0.0.1")
    publisher = EventPublisher(f"tcp://127.0.0.1:{port}", "builder-4", pattern="pub",
                               topic=b"fast", context=context, stamp_wall_clock=False)
    # A subscriber misses what is sent before the connection is up: send until one arrives.
    decoded = None
    for _ in range(100):
        publisher.send(event_id=[9], time_ns=[-5], energy_kev=[2.5])
        if sub.poll(50, zmq.POLLIN):
            decoded = decode_message(sub.recv_multipart(copy=False), has_topic=True, **LIMITS)
            break
    publisher.close(linger_ms=0)
    sub.close(linger=0)
    assert decoded is not None, "nothing arrived"
    assert decoded.topic == b"fast" and decoded.header.sent_utc_ns is None
    assert decoded.header.sequence < publisher.sequence
    assert decoded.batch.energy_kev.tolist() == [2.5] and decoded.batch.time_ns.tolist() == [-5]


def test_bound_publisher_and_connecting_puller(context):
    with EventPublisher("tcp://127.0.0.1:*", "b", bind=True, context=context) as publisher:
        pull = context.socket(zmq.PULL)
        pull.connect(publisher.last_endpoint)
        publisher.send(event_id=np.arange(3), time_ns=np.arange(3))
        assert decode_message(receive(pull), has_topic=False, **LIMITS).header.events == 3
        pull.close(linger=0)


def test_publisher_sequence_advances_only_on_send(context):
    publisher = EventPublisher("tcp://127.0.0.1:*", "b", bind=True, context=context,
                               send_timeout_ms=20)
    with pytest.raises(InputError):
        publisher.send(event_id=[1, 2], time_ns=[1])
    with pytest.raises(zmq.Again):  # bound PUSH without a peer: nowhere to queue
        publisher.send(event_id=[1], time_ns=[1])
    assert publisher.sequence == 0
    publisher.close(linger_ms=0)
    publisher.close()


@pytest.mark.parametrize("kwargs, field", [({"pattern": "req"}, "pattern"),
                                           ({"topic": b"t"}, "topic"),
                                           ({"source": "a b"}, "source"),
                                           ({"first_sequence": -1}, "first_sequence"),
                                           ({"time_scale": "TCB"}, "time_scale")])
def test_publisher_refuses_bad_settings(context, kwargs, field):
    arguments = {"endpoint": "tcp://127.0.0.1:1", "source": "b", "context": context, **kwargs}
    with pytest.raises(InputError) as info:
        EventPublisher(**arguments)
    assert info.value.field == field


# ---------------------------------------------------------------------------------------
# sequence tracking


def kinds(tracker, source, numbers):
    return [tracker.observe(source, n).kind.value for n in numbers]


def test_sequence_kinds():
    tracker = SequenceTracker()
    assert kinds(tracker, "a", [0, 1, 2]) == ["next"] * 3
    gap = tracker.observe("a", 6)
    assert (gap.kind, gap.expected, gap.missing, gap.outstanding) == (SequenceKind.GAP, 3, 3, 3)
    assert tracker.missing_ranges("a") == [(3, 5)]
    late = tracker.observe("a", 4)
    assert (late.kind, late.outstanding, late.accepted) == (SequenceKind.LATE, 2, True)
    assert tracker.missing_ranges("a") == [(3, 3), (5, 5)]
    duplicate = tracker.observe("a", 4)
    assert (duplicate.kind, duplicate.accepted) == (SequenceKind.DUPLICATE, False)
    assert tracker.observe("a", 6).kind is SequenceKind.DUPLICATE
    restart = tracker.observe("a", 0)
    assert (restart.kind, restart.expected, restart.forgotten) == (SequenceKind.RESTART, 7, 2)
    assert tracker.outstanding("a") == 0
    assert kinds(tracker, "a", [1, 2, 1]) == ["next", "next", "duplicate"]


def test_first_message_of_a_source_is_next_whatever_its_number():
    tracker = SequenceTracker()
    status = tracker.observe("late-joiner", 500)
    assert status.kind is SequenceKind.NEXT and status.new_source and status.missing == 0
    assert kinds(tracker, "late-joiner", [499, 501, 0]) == ["duplicate", "next", "restart"]
    assert kinds(tracker, "other", [0, 0]) == ["next", "duplicate"]


def test_huge_gap_is_bounded():
    tracker = SequenceTracker()
    tracker.observe("a", 0)
    status = tracker.observe("a", 2**63 - 1)
    assert status.missing == 2**63 - 2
    assert status.outstanding == 100_000 and status.forgotten == 2**63 - 2 - 100_000
    assert tracker.missing_ranges("a") == [(2**63 - 100_001, 2**63 - 2)]
    assert tracker.observe("a", 2**63 - 100_001).kind is SequenceKind.LATE
    assert tracker.observe("a", 2**63 - 100_002).kind is SequenceKind.DUPLICATE


def test_window_slides_and_forgets():
    tracker = SequenceTracker(window=4)
    tracker.observe("a", 0)
    assert tracker.observe("a", 2).missing == 1  # 1 missing
    statuses = [tracker.observe("a", n) for n in (3, 4, 5, 6)]
    # the window holds the 4 numbers below the highest: 1 falls out when 6 arrives
    assert [s.forgotten for s in statuses] == [0, 0, 0, 1]
    assert [s.outstanding for s in statuses] == [1, 1, 1, 0]
    assert tracker.observe("a", 1).kind is SequenceKind.DUPLICATE


def test_source_count_is_bounded():
    tracker = SequenceTracker()
    for index in range(10_001):
        tracker.observe(f"s{index}", 0)
    assert len(tracker) == 10_000 and tracker.evicted == 1
    assert "s0" not in tracker and "s10000" in tracker
    tracker.observe("s1", 1)  # now most recent: s2 is evicted next
    tracker.observe("new", 0)
    assert "s1" in tracker and "s2" not in tracker


def test_state_round_trip():
    tracker = SequenceTracker(window=50, max_sources=3)
    for source, numbers in {"a": [0, 1, 5, 9, 3, 20], "b": [7, 8], "c": [0, 30]}.items():
        for n in numbers:
            tracker.observe(source, n)
    state = json.loads(json.dumps(tracker.to_state()))
    again = SequenceTracker.from_state(state)
    assert again.to_state() == tracker.to_state()
    assert again.missing_ranges("a") == [(2, 2), (4, 4), (6, 8), (10, 19)]
    narrower = SequenceTracker.from_state(state, window=12)
    assert narrower.missing_ranges("a") == [(8, 8), (10, 19)] and narrower.window == 12
    fewer = SequenceTracker.from_state(state, max_sources=2)
    assert "a" not in fewer and "b" in fewer and fewer.evicted == 1
    for broken in ({}, {**state, "version": 2}, {**state, "window": -1},
                   {**state, "sources": [{"source": "a", "highest": 3, "missing": [[2, 5]]}]},
                   {**state, "sources": [{"source": "a", "highest": 3}]}):
        with pytest.raises(InputError):
            SequenceTracker.from_state(broken)


def test_sequence_must_be_a_non_negative_integer():
    tracker = SequenceTracker()
    for bad in (-1, 2**63, 1.0, True, "3"):
        with pytest.raises(InputError):
            tracker.observe("a", bad)


class OracleTracker:
    """The same rules written plainly with sets (for small numbers only)."""

    def __init__(self, window, max_sources):
        self.window, self.max_sources = window, max_sources
        self.sources: OrderedDict[str, list] = OrderedDict()

    def observe(self, source, n):
        if source not in self.sources:
            if len(self.sources) >= self.max_sources:
                self.sources.popitem(last=False)
            self.sources[source] = [n, set()]
            return ("next", None, 0, 0, 0)
        self.sources.move_to_end(source)
        highest, missing = self.sources[source]
        if n > highest:
            missing |= set(range(highest + 1, n))
            kept = {m for m in missing if m >= n - self.window}
            forgotten = len(missing) - len(kept)
            self.sources[source] = [n, kept]
            kind = "next" if n == highest + 1 else "gap"
            return (kind, highest + 1, n - highest - 1, len(kept), forgotten)
        if n == 0 and highest > 0:
            self.sources[source] = [0, set()]
            return ("restart", highest + 1, 0, 0, len(missing))
        if n in missing:
            missing.discard(n)
            return ("late", highest + 1, 0, len(missing), 0)
        return ("duplicate", highest + 1, 0, len(missing), 0)


@settings(max_examples=120, deadline=None)
@given(window=st.sampled_from([1, 3, 8, 100_000]), max_sources=st.integers(1, 3),
       ops=st.lists(st.tuples(st.sampled_from("abc"), st.none() | st.integers(0, 40)),
                    max_size=80),
       checkpoint_at=st.integers(0, 80))
def test_tracker_matches_plain_model(window, max_sources, ops, checkpoint_at):
    tracker = SequenceTracker(window=window, max_sources=max_sources)
    oracle = OracleTracker(window, max_sources)
    accepted = duplicates = 0
    for step, (source, choice) in enumerate(ops):
        if step == checkpoint_at:
            tracker = SequenceTracker.from_state(json.loads(json.dumps(tracker.to_state())))
        known = oracle.sources.get(source)
        n = choice if choice is not None else (known[0] + 1 if known else 0)
        before = tracker.outstanding(source)
        status = tracker.observe(source, n)
        expected = oracle.observe(source, n)
        assert (status.kind.value, status.expected, status.missing, status.outstanding,
                status.forgotten) == expected, (step, source, n)
        assert status.outstanding == tracker.outstanding(source)
        if not status.new_source and status.kind is not SequenceKind.RESTART:
            late = status.kind is SequenceKind.LATE
            assert status.outstanding == before + status.missing - late - status.forgotten
        accepted += status.accepted
        duplicates += status.kind is SequenceKind.DUPLICATE
        missing = sorted(oracle.sources[source][1])
        ranges = tracker.missing_ranges(source)
        assert [m for first, last in ranges for m in range(first, last + 1)] == missing
    assert accepted + duplicates == len(ops)
    assert len(tracker) == len(oracle.sources) <= max_sources
