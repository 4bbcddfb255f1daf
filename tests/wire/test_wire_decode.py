"""The decoder: every refusal of frames, header and body, and fuzzing (nothing but
WireError, whatever arrives)."""

from __future__ import annotations

import json
import pickle

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from wire_frames import (
    DROP,
    body_frame,
    decode,
    full_columns,
    header,
    header_frame,
    refusal,
)

from turnstamp.errors import InputError, RejectReason, WireError
from turnstamp.wire import decode as decode_module
from turnstamp.wire.decode import MAX_IPC_MESSAGES, decode_message
from turnstamp.wire.encode import encode_message
from turnstamp.wire.message import MAX_HEADER_BYTES


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


def test_hostile_row_count_is_refused_before_anything_is_allocated():
    # 288 bytes announcing 2**31 - 1 rows of all-null columns: reading the batch only
    # slices the body, and the row count is refused before any conversion
    nulls = pa.Array.from_buffers(pa.null(), 2**31 - 1, [None])
    body = body_frame({"event_id": nulls, "time_ns": nulls})
    assert len(body) < 1000
    error = refusal([header_frame(), body], RejectReason.OVERSIZED_MESSAGE)
    assert f"{2**31 - 1} rows" in error.detail


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
    ("format", "other.events"), ("sent_utc_ns", 1.5), ("version", "1"), ("version", DROP),
    ("events", DROP),
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
# the body's IPC messages, as pyarrow frames them


def test_ipc_message_count_is_limited():
    columns = {"event_id": pa.array([1], pa.uint64()), "time_ns": pa.array([1], pa.int64())}
    body = body_frame(columns, batches=MAX_IPC_MESSAGES + 5)
    error = refusal([header_frame(events=1), body], RejectReason.MALFORMED_MESSAGE)
    assert f"more than {MAX_IPC_MESSAGES} IPC messages" in error.detail


def _one_batch():
    schema = pa.schema([("event_id", pa.uint64()), ("time_ns", pa.int64())])
    batch = pa.record_batch([pa.array([1, 2, 3], pa.uint64()), pa.array([4, 5, 6])],
                            schema=schema)
    return schema.serialize().to_pybytes(), batch.serialize().to_pybytes()


def test_body_starts_with_its_only_schema():
    schema, batch = _one_batch()
    error = refusal([header_frame(), batch], RejectReason.MALFORMED_MESSAGE)
    assert "does not start with an Arrow schema message" in error.detail
    error = refusal([header_frame(), schema + schema + batch], RejectReason.MALFORMED_MESSAGE)
    assert "second Arrow schema message" in error.detail
    assert len(decode([header_frame(), schema + batch]).batch) == 3


def test_other_ipc_message_types_are_refused():
    schema, _ = _one_batch()
    sink = pa.BufferOutputStream()
    pa.ipc.write_tensor(pa.Tensor.from_numpy(np.arange(4)), sink)
    error = refusal([header_frame(events=0), schema + sink.getvalue().to_pybytes()],
                    RejectReason.MALFORMED_MESSAGE)
    assert "'tensor'" in error.detail


@pytest.mark.parametrize("codec", ["lz4", "zstd"])
def test_compressed_dictionary_batch_is_refused(codec):
    # the dictionary of an ignored column comes before the record batch: its
    # compression is seen first (DictionaryBatch.data.compression)
    columns = {"event_id": pa.array([1, 2, 3]), "time_ns": pa.array([1, 2, 3]),
               "tag": pa.array(["a", "b", "a"]).dictionary_encode()}
    error = refusal([header_frame(), body_frame(columns, compression=codec)],
                    RejectReason.MALFORMED_MESSAGE)
    assert "compression" in error.detail


# ---------------------------------------------------------------------------------------
# the error boundary: our own bugs are never a peer's fault


@pytest.mark.parametrize("name, error", [("uses_compression", TypeError),
                                         ("check_schema", ValueError),
                                         ("event_batch", ValueError)])
def test_our_own_errors_propagate_and_are_not_refusals(monkeypatch, name, error):
    def broken(*args, **kwargs):
        raise error("a bug of ours")

    monkeypatch.setattr(decode_module, name, broken)
    with pytest.raises(error, match="a bug of ours") as info:
        decode([header_frame(), body_frame()])
    assert not isinstance(info.value, WireError)
