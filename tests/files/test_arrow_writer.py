"""Rotating Arrow IPC stream writers: round trips of every output schema, changing
dictionaries, schema checks, rotation by time and size, and a failed write."""

from __future__ import annotations

import os

import numpy as np
import pyarrow as pa
import pytest
from arrow_samples import (
    PROVENANCE,
    T0,
    FakeClock,
    archive_columns,
    realistic_columns,
    same_rows,
)

from turnstamp.errors import SchemaMismatchError
from turnstamp.files.reader import (
    count_batches,
    read_arrow_file,
    read_arrow_file_report,
    read_stream,
    stream_files,
)
from turnstamp.files.recovery import recover_partial_files
from turnstamp.files.schemas import OUTPUTS
from turnstamp.files.writer import RotatingArrowWriter, SinkPosition

# ---------------------------------------------------------------- round trips


@pytest.mark.parametrize("stem", sorted(OUTPUTS))
def test_round_trip_of_every_output_schema(tmp_path, rng, stem):
    schema = OUTPUTS[stem]
    parts = [realistic_columns(schema, rows, batch, rng) for batch, rows in enumerate((7, 5, 9))]
    with RotatingArrowWriter(tmp_path, stem, schema, metadata=PROVENANCE) as writer:
        assert writer.write(parts[0]) == (writer.files()[0].name, 1)  # mapping of columns
        writer.write(pa.RecordBatch.from_pydict(parts[1], schema=schema))
        half = {k: v[:4] for k, v in parts[2].items()}
        rest = {k: v[4:] for k, v in parts[2].items()}
        two_chunks = pa.concat_tables([pa.Table.from_pydict(half, schema=schema),
                                       pa.Table.from_pydict(rest, schema=schema)])
        position = writer.write(two_chunks)
    assert position == SinkPosition(writer.files()[0].name, 3)

    (path,) = writer.files()
    assert count_batches(path) == 3  # a table is written as one batch
    table = pa.ipc.open_stream(path.read_bytes()).read_all()
    assert table.schema.equals(schema)  # names, types (dictionaries kept), nullability
    for field in schema:
        assert table.schema.field(field.name).metadata == field.metadata  # unit, description
    metadata = {k.decode(): v.decode() for k, v in table.schema.metadata.items()}
    assert {k: metadata[k] for k in PROVENANCE} == PROVENANCE
    assert metadata["turnstamp.stream"] == stem
    assert metadata["turnstamp.opened_utc"].endswith("Z")
    expected = {name: sum((part[name] for part in parts), []) for name in schema.names}
    assert table.to_pydict() == expected
    assert same_rows(read_arrow_file(path), table)
    assert read_stream(tmp_path, stem).to_pydict() == expected


def test_changing_dictionaries_are_written_as_they_come(tmp_path):
    # The IPC file format refuses a second, different dictionary ("Dictionary
    # replacement detected"); the stream format the writers use allows it.
    schema = pa.schema([pa.field("target", pa.dictionary(pa.int32(), pa.string()))],
                       metadata={"description": "schema-level metadata is kept"})
    with RotatingArrowWriter(tmp_path, "clock", schema, metadata=PROVENANCE) as writer:
        for words in (["b", "a"], ["c"], ["a", "c", "d"], [None, "b"]):
            writer.write(pa.record_batch([pa.array(words).dictionary_encode()], schema=schema))
    table = pa.ipc.open_stream(writer.files()[0].read_bytes()).read_all()
    assert table.column("target").to_pylist() == ["b", "a", "c", "a", "c", "d", None, "b"]
    assert table.schema.metadata[b"description"] == b"schema-level metadata is kept"
    assert table.schema.metadata[b"turnstamp.software_version"] == b"0.1.0"


def test_schema_mismatch_names_the_field_and_writes_nothing(tmp_path):
    schema = OUTPUTS["ledger"]
    good = {"received_utc_ns": [1, 2], "source": ["builder-north"] * 2, "sequence": [5, 6],
            "outcome": ["accepted"] * 2,
            "events": [10, 12], "tagged": [9, 12], "filtered": [1, 0], "rejected": [0, 0],
            "missing_before": [0, 0]}
    writer = RotatingArrowWriter(tmp_path, "ledger", schema)
    cases = {
        "events": {k: v for k, v in good.items() if k != "events"},  # missing, required
        "evnets": {**good, "evnets": [1, 2]},  # unknown column
        "sequence": {**good, "sequence": [-1, 2]},  # negative into uint64
        "tagged": {**good, "tagged": ["nine", "twelve"]},  # no string parsing
        "filtered": {**good, "filtered": [1, None]},  # null in a non-nullable column
        "rejected": {**good, "rejected": [0, 0, 0]},  # wrong length
        "missing_before": {**good, "missing_before": pa.array([0.5, 1.0])},  # float truncation
    }
    for name, columns in cases.items():
        with pytest.raises(SchemaMismatchError, match=repr(name)) as caught:
            writer.write(columns)
        assert caught.value.field == name
    assert os.listdir(tmp_path) == []
    # omitted nullable columns are written as nulls; safe casts are accepted
    writer.write({**good, "events": np.array([10, 12], dtype=np.int32)})
    writer.close()
    table = read_stream(tmp_path, "ledger")
    assert table.column("first_tt_ns").null_count == 2
    assert table.column("events").type == pa.int64()


def test_empty_input_writes_nothing(tmp_path):
    schema = OUTPUTS["rejects"]
    with RotatingArrowWriter(tmp_path, "rejects", schema) as writer:
        assert writer.write({}) == SinkPosition(None, 0)
        assert writer.write(schema.empty_table()) == SinkPosition(None, 0)
        assert writer.write({name: [] for name in schema.names}) == SinkPosition(None, 0)
    assert os.listdir(tmp_path) == []
    assert read_stream(tmp_path, "rejects").schema.equals(schema)
    assert read_stream(tmp_path / "absent", "rejects").num_rows == 0


def test_writer_misuse(tmp_path):
    schema = OUTPUTS["ledger"]
    with pytest.raises(ValueError, match="stem"):
        RotatingArrowWriter(tmp_path, "../ledger", schema)
    with pytest.raises(ValueError, match="set by the writer"):
        RotatingArrowWriter(tmp_path, "ledger", schema, metadata={"turnstamp.stream": "x"})
    with pytest.raises(TypeError, match="str"):
        RotatingArrowWriter(tmp_path, "ledger", schema, metadata={"version": 1})
    writer = RotatingArrowWriter(tmp_path, "ledger", schema)
    assert writer.rotate() is None
    writer.close()
    writer.close()  # idempotent
    with pytest.raises(RuntimeError, match="after close"):
        writer.write(realistic_columns(schema, 2, 0, np.random.default_rng(1)))


# ------------------------------------------------------------------- rotation


def _metadata(path) -> dict[str, str]:
    schema = pa.ipc.open_stream(path.read_bytes()).schema
    return {k.decode(): v.decode() for k, v in schema.metadata.items()}


def test_rotation_by_time_with_an_injected_clock(tmp_path, rng):
    schema = OUTPUTS["significance"]
    clock = FakeClock()
    writer = RotatingArrowWriter(tmp_path, "significance", schema, rotate_seconds=600,
                                 rotate_bytes=None, metadata=PROVENANCE, clock=clock)
    first = writer.write(realistic_columns(schema, 3, 0, rng))
    assert first == ("significance-20261201T200000Z-00001.arrows", 1)
    clock.now = T0 + 599.9
    assert writer.write(realistic_columns(schema, 3, 1, rng)) == (first.file_name, 2)
    clock.now = T0 + 600
    second = writer.write(realistic_columns(schema, 3, 2, rng))
    assert second == ("significance-20261201T201000Z-00002.arrows", 1)
    clock.now = T0 + 1300
    assert writer.check_rotation() is True  # idle: closed without a new write
    assert writer.current_file is None and writer.position == second
    assert writer.check_rotation() is False
    third = writer.write(realistic_columns(schema, 3, 3, rng))
    assert third == ("significance-20261201T202140Z-00003.arrows", 1)
    writer.close()

    files = writer.files()
    assert [p.name for p in files] == sorted(p.name for p in files)
    assert [p.name for p in files] == [first.file_name, second.file_name, third.file_name]
    opened = [_metadata(p)["turnstamp.opened_utc"] for p in files]
    assert opened == ["2026-12-01T20:00:00.000000Z", "2026-12-01T20:10:00.000000Z",
                      "2026-12-01T20:21:40.000000Z"]
    for path in files:
        meta = _metadata(path)
        assert meta["turnstamp.stream"] == "significance"
        assert {k: meta[k] for k in PROVENANCE} == PROVENANCE
    assert read_stream(tmp_path, "significance").num_rows == 12


def test_rotation_by_size_keeps_write_order(tmp_path):
    schema = OUTPUTS["archive"]
    limit = 16 * 1024
    writer = RotatingArrowWriter(tmp_path, "archive", schema, rotate_seconds=None,
                                 rotate_bytes=limit, clock=FakeClock())
    for batch in range(20):
        writer.write(archive_columns(batch * 50, 50, batch))
    writer.close()
    files = writer.files()
    assert len(files) >= 4
    assert [p.name for p in files] == sorted(p.name for p in files)
    for path in files[:-1]:
        assert path.stat().st_size >= limit  # only rotated once the limit was reached
        assert count_batches(path) >= 1
    ids = read_stream(tmp_path, "archive").column("event_id").to_numpy()
    np.testing.assert_array_equal(ids, np.arange(1000))


def test_names_stay_ordered_across_clock_steps_and_restarts(tmp_path, rng):
    schema = OUTPUTS["clock"]
    clock = FakeClock()
    writer = RotatingArrowWriter(tmp_path, "clock", schema, clock=clock)
    writer.write(realistic_columns(schema, 2, 0, rng))
    writer.rotate()
    clock.now = T0 - 3600  # wall clock stepped back an hour
    assert writer.write(realistic_columns(schema, 2, 1, rng)).file_name == \
        "clock-20261201T200000Z-00002.arrows"  # label clamped, counter continues
    writer.close()
    assert _metadata(writer.files()[1])["turnstamp.opened_utc"].startswith("2026-12-01T19:00")

    again = RotatingArrowWriter(tmp_path, "clock", schema, clock=clock)  # a restart
    again.write(realistic_columns(schema, 2, 2, rng))
    again.close()
    names = [p.name for p in again.files()]
    assert names == sorted(names) and names[-1].endswith("-00003.arrows")
    # another stem in the same directory is not mixed in
    RotatingArrowWriter(tmp_path, "clock-extra", schema).close()
    with RotatingArrowWriter(tmp_path, "clock-extra", schema) as other:
        other.write(realistic_columns(schema, 1, 0, rng))
    assert len(stream_files(tmp_path, "clock")) == 3
    assert len(stream_files(tmp_path, "clock-extra")) == 1


# ------------------------------------------------------------------- failures


def test_failed_write_leaves_a_complete_file_and_the_writer_usable(tmp_path, monkeypatch):
    writer = RotatingArrowWriter(tmp_path, "archive", OUTPUTS["archive"], fsync_each_batch=True)
    writer.write(archive_columns(0, 10))
    first = writer.write(archive_columns(10, 10, 1))
    real_fsync, calls = os.fsync, []

    def failing_fsync(fd):
        calls.append(fd)
        if len(calls) == 1:
            raise OSError("simulated I/O error")
        real_fsync(fd)

    monkeypatch.setattr(os, "fsync", failing_fsync)
    with pytest.raises(OSError, match="simulated"):
        writer.write(archive_columns(20, 10, 2))  # not accepted
    monkeypatch.undo()
    # the file was cut back to its last complete batch and closed at once
    path = tmp_path / first.file_name
    assert count_batches(path) == 2 and read_arrow_file_report(path)[1].complete
    assert writer.write(archive_columns(20, 10, 2)).batches_in_file == 1  # a new file
    writer.close()
    ids = read_stream(tmp_path, "archive").column("event_id").to_numpy()
    np.testing.assert_array_equal(ids, np.arange(30))
    assert recover_partial_files(tmp_path) == []
