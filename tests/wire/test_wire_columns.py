"""The body's columns: accepted types, nulls, casts and every schema refusal."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from wire_frames import (
    FLOAT_COLUMNS,
    body_frame,
    decode,
    header_frame,
    refusal,
)

from turnstamp.core.batch import MISSING_ID, MISSING_TIME
from turnstamp.errors import RejectReason


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
@pytest.mark.parametrize("middle", [None, 5])  # with nulls, and without (read from the buffer)
def test_negative_values_in_unsigned_columns_are_refused(name, middle):
    columns = {"event_id": pa.array([1, 2, 3], pa.int32()), "time_ns": pa.array([1, 2, 3]),
               name: pa.array([4, middle, -9], pa.int32())}
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
