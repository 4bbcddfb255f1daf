"""Output sinks: rotating Arrow IPC writers, partial-file reading, recovery, atomic files.

The layout facts relied upon (magic, stream after 8 bytes, end-of-stream marker before
the footer) are from the Arrow columnar format specification, "IPC File Format"; the
tests below check them against pyarrow rather than trusting them.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pyarrow as pa
import pytest

from turnstamp.io import sinks
from turnstamp.io.schemas import OUTPUTS
from turnstamp.io.sinks import (
    ArrowFileError,
    RotatingArrowWriter,
    SchemaMismatchError,
    SinkPosition,
    atomic_write_json,
    atomic_write_text,
    read_arrow_file,
    read_arrow_file_report,
    read_stream,
    recover_partial_files,
    stream_files,
)

PROVENANCE = {
    "turnstamp.config": json.dumps({"targets": ["target-alpha"], "rotate_seconds": 3600}),
    "turnstamp.model_ids": "spin-model-7,spin-model-8",
    "turnstamp.tables": "earth-orientation 2026-11-28; leap seconds 2026-07-01",
    "turnstamp.software_version": "0.1.0",
}

# Small vocabularies for the dictionary-encoded columns; each batch uses a rotated
# subset so that consecutive batches carry different dictionaries.
VOCABULARY = {
    "source": ["builder-north", "builder-south", "builder-east"],
    "target": ["target-alpha", "target-beta"],
    "model_id": ["spin-model-7", "spin-model-8"],
    "recipe": ["all", "hard-cut", "soft-cut"],
    "window": ["cumulative", "5min", "30min"],
    "status": ["OK", "WARN", "FAIL"],
    "kind": ["none", "offset", "drift", "step"],
    "reason": ["bad_time", "duplicate_event_id", "sequence_gap"],
}
T0 = dt.datetime(2026, 12, 1, 20, 0, tzinfo=dt.UTC).timestamp()


class FakeClock:
    def __init__(self, now: float = T0):
        self.now = now

    def __call__(self) -> float:
        return self.now


def _values(field: pa.Field, rows: int, batch: int, rng) -> list:
    """Realistic Python values for one column (exactly representable in the type)."""
    kind = field.type
    start = batch * rows
    if pa.types.is_dictionary(kind):
        words = VOCABULARY.get(field.name, ["alpha", "beta", "gamma"])
        words = words[batch % len(words):] + words[:batch % len(words)]
        words = words[: 1 + (batch % len(words))]
        values = [words[i % len(words)] for i in range(rows)]
    elif pa.types.is_list(kind):
        value_type = kind.value_type
        lengths = rng.integers(0, 6, rows)
        if pa.types.is_boolean(value_type):
            values = [[bool(j % 2) for j in range(n)] for n in lengths]
        elif pa.types.is_integer(value_type):
            values = [[int(start + i) * 1_000_000_000 + j for j in range(n)]
                      for i, n in enumerate(lengths)]
        else:
            values = [list(rng.normal(size=n)) for n in lengths]
    elif pa.types.is_boolean(kind):
        values = [bool((start + i) % 2) for i in range(rows)]
    elif pa.types.is_string(kind):
        values = [f"row {start + i}: offset 0.0{i % 10} cycles" for i in range(rows)]
    elif pa.types.is_float32(kind):
        values = [float(k) / 4 for k in rng.integers(0, 8, rows)]  # exact in float32
    elif pa.types.is_floating(kind):
        values = list(rng.normal(size=rows))
    elif pa.types.is_unsigned_integer(kind) or kind == pa.int32():
        values = [start + i for i in range(rows)]
    else:
        values = [828_000_000_000_000_000 + (start + i) * 1_000 for i in range(rows)]
    if field.nullable:
        values = [None if i % 3 == 1 else v for i, v in enumerate(values)]
    return values


def realistic_columns(schema: pa.Schema, rows: int, batch: int, rng) -> dict[str, list]:
    return {field.name: _values(field, rows, batch, rng) for field in schema}


def archive_columns(first_id: int, rows: int, batch: int = 0) -> dict:
    """Archive rows whose event ids count up from ``first_id`` (numpy and list input)."""
    ids = np.arange(first_id, first_id + rows, dtype=np.uint64)
    source = VOCABULARY["source"][batch % 3:] + VOCABULARY["source"][:batch % 3]
    return {
        "event_id": ids,
        "source": [source[i % 3] for i in range(rows)],
        "sequence": np.full(rows, batch, dtype=np.uint64),
        "target": ["target-alpha" if i % 2 else "target-beta" for i in range(rows)],
        "site_tt_ns": 828_000_000_000_000_000 + ids.astype(np.int64) * 1_000,
        "barycentric_tdb_ns": 828_000_000_400_000_000 + ids.astype(np.int64) * 1_000,
        "barycentric_correction_s": np.full(rows, 0.4000001),
        "phase": (ids % 100) / 100.0,
        "pulse_number": ids.astype(np.int64) * 3,
        "weight": np.ones(rows),
        "recipe_flags": np.full(rows, 3),
        "model_id": ["spin-model-7"] * rows,
        "quality_flags": np.zeros(rows, dtype=np.uint32),
    }


def _same_rows(left: pa.Table, right: pa.Table) -> bool:
    """Equal values, whatever the chunking and the per-batch dictionaries (the file
    reader hands every batch the file's final dictionary, the stream reader the one
    current at that batch)."""
    return left.schema.equals(right.schema) and left.to_pydict() == right.to_pydict()


# --------------------------------------------------------------------------- round trips


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
    reader = pa.ipc.open_file(path)
    assert reader.num_record_batches == 3  # a table is written as one batch
    table = reader.read_all()
    assert table.schema.equals(schema)  # names, types (dictionaries kept), nullability
    for field in schema:
        assert table.schema.field(field.name).metadata == field.metadata  # unit, description
    metadata = {k.decode(): v.decode() for k, v in table.schema.metadata.items()}
    assert {k: metadata[k] for k in PROVENANCE} == PROVENANCE
    assert metadata["turnstamp.stream"] == stem
    assert metadata["turnstamp.opened_utc"].endswith("Z")
    expected = {name: sum((part[name] for part in parts), []) for name in schema.names}
    assert table.to_pydict() == expected
    assert _same_rows(read_arrow_file(path), table)
    assert read_stream(tmp_path, stem).to_pydict() == expected


def test_changing_dictionaries_are_written_as_deltas(tmp_path):
    # Without remapping, pyarrow refuses a second, different dictionary in the file
    # format ("Dictionary replacement detected"); the writer must avoid that.
    schema = pa.schema([pa.field("target", pa.dictionary(pa.int32(), pa.string()))],
                       metadata={"description": "schema-level metadata is kept"})
    with RotatingArrowWriter(tmp_path, "clock", schema, metadata=PROVENANCE) as writer:
        for words in (["b", "a"], ["c"], ["a", "c", "d"], [None, "b"]):
            writer.write(pa.record_batch([pa.array(words).dictionary_encode()], schema=schema))
    table = pa.ipc.open_file(writer.files()[0]).read_all()
    assert table.column("target").to_pylist() == ["b", "a", "c", "a", "c", "d", None, "b"]
    # pyarrow's reader exposes the dictionary of the last batch: values in first-seen order
    assert table.column("target").chunks[-1].dictionary.to_pylist() == ["b", "a", "c", "d"]
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


# --------------------------------------------------------------------------- rotation


def _metadata(path) -> dict[str, str]:
    schema = pa.ipc.open_file(path).schema
    return {k.decode(): v.decode() for k, v in schema.metadata.items()}


def test_rotation_by_time_with_an_injected_clock(tmp_path, rng):
    schema = OUTPUTS["significance"]
    clock = FakeClock()
    writer = RotatingArrowWriter(tmp_path, "significance", schema, rotate_seconds=600,
                                 rotate_bytes=None, metadata=PROVENANCE, clock=clock)
    first = writer.write(realistic_columns(schema, 3, 0, rng))
    assert first == ("significance-20261201T200000Z-00001.arrow", 1)
    clock.now = T0 + 599.9
    assert writer.write(realistic_columns(schema, 3, 1, rng)) == (first.file_name, 2)
    clock.now = T0 + 600
    second = writer.write(realistic_columns(schema, 3, 2, rng))
    assert second == ("significance-20261201T201000Z-00002.arrow", 1)
    clock.now = T0 + 1300
    assert writer.check_rotation() is True  # idle: closed without a new write
    assert writer.current_file is None and writer.position == second
    assert writer.check_rotation() is False
    third = writer.write(realistic_columns(schema, 3, 3, rng))
    assert third == ("significance-20261201T202140Z-00003.arrow", 1)
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
        assert pa.ipc.open_file(path).num_record_batches >= 1
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
        "clock-20261201T200000Z-00002.arrow"  # label clamped, counter continues
    writer.close()
    assert _metadata(writer.files()[1])["turnstamp.opened_utc"].startswith("2026-12-01T19:00")

    again = RotatingArrowWriter(tmp_path, "clock", schema, clock=clock)  # a restart
    again.write(realistic_columns(schema, 2, 2, rng))
    again.close()
    names = [p.name for p in again.files()]
    assert names == sorted(names) and names[-1].endswith("-00003.arrow")
    # another stem in the same directory is not mixed in
    RotatingArrowWriter(tmp_path, "clock-extra", schema).close()
    with RotatingArrowWriter(tmp_path, "clock-extra", schema) as other:
        other.write(realistic_columns(schema, 1, 0, rng))
    assert len(stream_files(tmp_path, "clock")) == 3
    assert len(stream_files(tmp_path, "clock-extra")) == 1


# --------------------------------------------------------------------------- partial files


def _three_batch_file(tmp_path):
    """A small archive file; returns (path, sizes after batch 1, 2, 3, full size, rows)."""
    sizes = []
    writer = RotatingArrowWriter(tmp_path / "src", "archive", OUTPUTS["archive"])
    parts = [archive_columns(i * 4, 4, i) for i in range(3)]
    for part in parts:
        writer.write(part)
        sizes.append(writer.current_file.stat().st_size)  # flushed after every batch
    path = writer.current_file
    writer.close()
    ids = [int(x) for part in parts for x in part["event_id"]]
    return path, sizes, path.stat().st_size, ids


def test_file_layout_is_as_documented(tmp_path):
    path, (end1, end2, end3), full, ids = _three_batch_file(tmp_path)
    data = path.read_bytes()
    assert data[:8] == b"ARROW1\0\0" and data[-6:] == b"ARROW1"
    assert data[end3:end3 + 8] == b"\xff\xff\xff\xff\0\0\0\0"  # end-of-stream, then footer
    # the whole file after the magic is a stream ending at that marker ...
    assert pa.ipc.open_stream(data[8:]).read_all().column("event_id").to_pylist() == ids
    # ... and the part written before close() is a stream too
    partial = pa.ipc.open_stream(data[8:end2]).read_all()
    assert partial.column("event_id").to_pylist() == ids[:8]
    # our frame scanner finds the record batches exactly where the writer left them
    messages, tail, _ = sinks._scan_messages(memoryview(data), end3)
    assert [end for kind, _, end in messages if kind == "record_batch"] == [end1, end2, end3]
    assert tail == "message_boundary"


def test_truncation_at_every_offset_of_the_last_batch(tmp_path):
    path, (end1, end2, end3), full, ids = _three_batch_file(tmp_path)
    data = path.read_bytes()
    cut_dir = tmp_path / "cuts"
    cut_dir.mkdir()
    target = cut_dir / path.name
    tails = set()
    # every offset of the last batch (dictionary delta and batch) and of the end-of-stream
    # marker; the footer sampled every third byte and at its last bytes
    cuts = {*range(end2, end3 + 64), *range(end3 + 64, full, 3), *range(full - 16, full + 1)}
    target.write_bytes(data)
    for cut in sorted(cuts, reverse=True):
        os.truncate(target, cut)
        table, info = read_arrow_file_report(target)
        kept = 3 if cut >= end3 else 2
        assert info.complete == (cut == full)
        assert info.batches == kept
        assert table.column("event_id").to_pylist() == ids[:4 * kept]
        assert info.bytes_ignored == (0 if cut == full else cut - (end3 if kept == 3 else end2))
        tails.add(info.tail)
        if cut % 29 == 0 or cut in (end2, end2 + 1, end3 - 1, end3, end3 + 8, full - 1, full):
            reports = recover_partial_files(cut_dir)
            if cut == full:
                assert reports == []
            else:
                (report,) = reports
                assert report.action == "rewritten" and report.batches_kept == kept
                assert report.bytes_dropped == info.bytes_ignored
                reader = pa.ipc.open_file(target)
                assert reader.num_record_batches == kept
                assert reader.read_all().column("event_id").to_pylist() == ids[:4 * kept]
                assert recover_partial_files(cut_dir) == []  # idempotent
            target.write_bytes(data)  # the original bytes again for the next, shorter cut
    assert tails == {"footer", "message_boundary", "truncated_message", "end_of_stream"}


def test_truncation_inside_the_header_raises_our_error_only(tmp_path):
    path, (end1, _, _), _, ids = _three_batch_file(tmp_path)
    data = path.read_bytes()
    target = tmp_path / "cut.arrow"
    target.write_bytes(data[:end1])
    for cut in sorted({*range(0, 400), *range(400, end1, 7), end1 - 1}, reverse=True):
        os.truncate(target, cut)  # magic and schema, then sampled through the first batch
        try:
            table, info = read_arrow_file_report(target)
        except ArrowFileError:
            continue
        assert table.num_rows in (0, 4) and info.batches == table.num_rows // 4


def test_corrupt_tail_is_read_up_to_the_damage_and_left_alone(tmp_path):
    path, (end1, end2, end3), _, ids = _three_batch_file(tmp_path)
    data = bytearray(path.read_bytes()[:end3])
    data[end1:end1 + 4] = b"\x00\x01\x02\x03"  # batch 2's first frame loses its marker
    target = tmp_path / path.name
    target.write_bytes(bytes(data))
    table, info = read_arrow_file_report(target)
    assert info.tail == "corrupt" and info.batches == 1
    assert table.column("event_id").to_pylist() == ids[:4]
    (report,) = recover_partial_files(tmp_path)
    assert report.action == "left_alone"
    assert target.read_bytes() == bytes(data)  # untouched for a human to look at


def test_zero_filled_tail_is_treated_as_truncation(tmp_path):
    # the tail a file system may leave after a power cut (size grew, data never came)
    path, (_, _, end3), _, ids = _three_batch_file(tmp_path)
    target = tmp_path / path.name
    target.write_bytes(path.read_bytes()[:end3] + bytes(4096))
    table, info = read_arrow_file_report(target)
    assert (info.tail, info.batches, info.bytes_ignored) == ("zero_fill", 3, 4096)
    (report,) = recover_partial_files(tmp_path)
    assert report.action == "rewritten" and report.batches_kept == 3
    assert pa.ipc.open_file(target).read_all().column("event_id").to_pylist() == ids


def test_open_file_is_readable_and_not_touched_by_recovery(tmp_path):
    writer = RotatingArrowWriter(tmp_path, "archive", OUTPUTS["archive"])
    writer.write(archive_columns(0, 10))
    writer.write(archive_columns(10, 10, 1))
    open_path = writer.current_file
    table, info = read_arrow_file_report(open_path)
    assert not info.complete and info.batches == 2 and info.bytes_ignored == 0
    assert table.num_rows == 20
    before = open_path.read_bytes()
    (report,) = recover_partial_files(tmp_path)
    assert report.action == "in_use" and open_path.read_bytes() == before
    writer.write(archive_columns(20, 10, 2))
    writer.close()
    assert recover_partial_files(tmp_path) == []
    assert pa.ipc.open_file(open_path).read_all().num_rows == 30


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

    monkeypatch.setattr(sinks.os, "fsync", failing_fsync)
    with pytest.raises(OSError, match="simulated"):
        writer.write(archive_columns(20, 10, 2))  # not accepted
    monkeypatch.undo()
    # the file was cut back to its last complete batch and given a footer at once
    reader = pa.ipc.open_file(tmp_path / first.file_name)
    assert reader.num_record_batches == 2
    assert writer.write(archive_columns(20, 10, 2)).batches_in_file == 1  # a new file
    writer.close()
    ids = read_stream(tmp_path, "archive").column("event_id").to_numpy()
    np.testing.assert_array_equal(ids, np.arange(30))
    assert recover_partial_files(tmp_path) == []


def test_info_reads_as_complete_or_partial(tmp_path):
    writer = RotatingArrowWriter(tmp_path, "archive", OUTPUTS["archive"])
    writer.write(archive_columns(0, 3))
    _, info = read_arrow_file_report(writer.current_file)
    assert (info.state, str(info)) == (
        "partial", "partial: 1 complete batches, 0 bytes ignored (message_boundary)")
    writer.close()
    _, info = read_arrow_file_report(writer.files()[0])
    assert (info.state, str(info), info.format) == ("complete", "complete", "file")


def test_stream_format_input_is_read_too(tmp_path):
    # input files (orbit tracks, event files) may come in the IPC stream format
    table = pa.table({"tt_ns": [1, 2, 3], "x_m": [0.5, 1.5, 2.5]})
    target = tmp_path / "orbit.arrows"
    with pa.OSFile(str(target), "wb") as sink, pa.ipc.new_stream(sink, table.schema) as out:
        out.write_table(table)
    read, info = read_arrow_file_report(target)
    assert read.equals(table) and (info.complete, info.format) == (True, "stream")
    target.write_bytes(target.read_bytes()[:-8])  # without its end-of-stream marker
    read, info = read_arrow_file_report(target)
    assert read.equals(table) and not info.complete


def test_leftover_temporaries_are_cleaned_without_touching_data(tmp_path):
    with RotatingArrowWriter(tmp_path, "archive", OUTPUTS["archive"]) as writer:
        name = writer.write(archive_columns(0, 5)).file_name
    published = (tmp_path / name).read_bytes()
    os.link(tmp_path / name, tmp_path / f".{name}.part")  # killed between link and unlink
    (tmp_path / f".{name}.{'0' * 32}.recover").write_bytes(published[:100])  # interrupted
    reports = recover_partial_files(tmp_path)
    assert sorted(r.action for r in reports) == ["removed", "removed"]
    assert os.listdir(tmp_path) == [name] and (tmp_path / name).read_bytes() == published
    assert recover_partial_files(tmp_path) == []


def test_not_an_arrow_file(tmp_path):
    target = tmp_path / "archive-20261201T200000Z-00001.arrow"
    target.write_bytes(b"PAR1 not ours")
    with pytest.raises(ArrowFileError, match="magic"):
        read_arrow_file(target)
    (report,) = recover_partial_files(tmp_path)
    assert report.action == "left_alone" and target.read_bytes() == b"PAR1 not ours"


# --------------------------------------------------------------------------- kill -9

CHILD = textwrap.dedent("""
    import io, os, signal, sys
    import numpy as np
    import turnstamp.io.sinks as sinks
    from turnstamp.io.schemas import OUTPUTS

    directory, mode = sys.argv[1], sys.argv[2]
    rows, rotate_bytes = int(sys.argv[3]), int(sys.argv[4])

    def die(*args, **kwargs):
        os.kill(os.getpid(), signal.SIGKILL)

    class DyingFile(io.FileIO):
        # unbuffered; once armed, writes up to byte ``die_at`` of the file, then SIGKILL
        die_at = None

        def write(self, data):
            if DyingFile.die_at is not None:
                room = DyingFile.die_at - self.tell()
                if room < len(data):
                    super().write(bytes(data)[:max(room, 0)])
                    die()
            return super().write(data)

    sinks.open = DyingFile  # the writer's open(path, "xb") now returns a DyingFile

    def columns(batch):
        ids = np.arange(batch * rows, (batch + 1) * rows, dtype=np.uint64)
        return {"event_id": ids, "source": ["builder-north", "builder-south"] * (rows // 2),
                "sequence": np.full(rows, batch, dtype=np.uint64),
                "target": ["target-alpha"] * rows, "site_tt_ns": ids.astype(np.int64),
                "barycentric_tdb_ns": ids.astype(np.int64), "barycentric_correction_s":
                np.zeros(rows), "phase": np.linspace(0, 0.99, rows), "pulse_number":
                ids.astype(np.int64), "weight": np.ones(rows), "recipe_flags": np.ones(rows,
                dtype=np.uint32), "model_id": ["spin-model-%d" % (batch % 3)] * rows,
                "quality_flags": np.zeros(rows, dtype=np.uint32)}

    writer = sinks.RotatingArrowWriter(directory, "archive", OUTPUTS["archive"],
                                       rotate_seconds=None, rotate_bytes=rotate_bytes,
                                       metadata={"turnstamp.run": mode})
    sizes = [0]
    for batch in range(100000):
        if batch == 5:
            if mode == "kill_mid_batch":  # half of the sixth batch reaches the file
                DyingFile.die_at = sizes[-1] + (sizes[-1] - sizes[-2]) // 2
            if mode == "kill_mid_footer":  # rotation dies 40 bytes into its footer
                DyingFile.die_at = sizes[-1] + 40
                writer.rotate()
            if mode == "kill_after_footer":  # footer flushed, fsync never happens
                os.fsync = die
                writer.rotate()
            if mode == "kill_before_publish":  # next file's first batch never published
                writer.rotate()
                os.link = os.rename = die
        name, count = writer.write(columns(batch))
        sizes.append(writer.current_file.stat().st_size)
        print(batch, name, count, flush=True)
""")


def _run_child(directory, mode, rows, rotate_bytes, kill_after=None, delay=0.0):
    """Start the writer process; SIGKILL it ``delay`` seconds after its ``kill_after``-th
    reported write (or let it kill itself). Returns the number of writes it reported."""
    child = subprocess.Popen(
        [sys.executable, "-c", CHILD, str(directory), mode, str(rows), str(rotate_bytes)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    reported = 0
    try:
        while kill_after is None or reported < kill_after:
            line = child.stdout.readline()
            if not line:
                break
            reported += 1
        if kill_after is not None:
            time.sleep(delay)
            child.send_signal(signal.SIGKILL)
        child.wait(timeout=30)
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
    assert child.returncode == -signal.SIGKILL, child.stderr.read()
    return reported


def _check_after_kill(directory, reported, rows):
    """Invariants after a kill; returns (state of the newest file, recovery reports)."""
    files = stream_files(directory, "archive")
    assert files, "the child wrote nothing"
    for path in files[:-1]:  # every closed file is complete
        pa.ipc.open_file(path).read_all()
    _, newest = read_arrow_file_report(files[-1])  # complete or partial, never raises
    before = read_stream(directory, "archive")
    ids = before.column("event_id").to_numpy()
    assert len(ids) >= reported * rows  # everything reported complete is there ...
    assert len(ids) % rows == 0  # ... in whole batches only
    np.testing.assert_array_equal(ids, np.arange(len(ids)))

    reports = recover_partial_files(directory)
    assert all(r.action in ("rewritten", "removed") for r in reports), reports
    for path in stream_files(directory, "archive"):
        assert pa.ipc.open_file(path).schema.metadata[b"turnstamp.run"]  # metadata kept
    after = read_stream(directory, "archive")
    assert _same_rows(after, before)
    assert recover_partial_files(directory) == []
    assert not [n for n in os.listdir(directory) if n.startswith(".")]
    return newest, reports


@pytest.mark.parametrize("kill_after, delay", [(2, 0.0), (3, 0.004), (5, 0.011)])
def test_kill_at_a_random_point(tmp_path, kill_after, delay):
    # where the kill lands depends on timing (inside a write, a rotation, a publish, or
    # between writes); the invariants must hold wherever it lands
    rows = 2000  # ~140 kB per batch, a new file every third batch
    reported = _run_child(tmp_path, "random", rows, 300_000, kill_after, delay)
    assert reported == kill_after
    _check_after_kill(tmp_path, reported, rows)


KILL_POINTS = {  # mode: (tail of the newest file, recovery actions)
    "kill_mid_batch": ("truncated_message", ["rewritten"]),
    "kill_mid_footer": ("end_of_stream", ["rewritten"]),
    "kill_after_footer": ("footer", []),
    "kill_before_publish": ("footer", ["removed"]),
}


@pytest.mark.parametrize("mode", sorted(KILL_POINTS))
def test_kill_at_a_chosen_point(tmp_path, mode):
    # the child kills itself at a chosen byte or call: deterministic kill points,
    # including two in the middle of a rotation
    rows = 100
    reported = _run_child(tmp_path, mode, rows, 1 << 30)
    assert reported == 5
    newest, reports = _check_after_kill(tmp_path, reported, rows)
    tail, actions = KILL_POINTS[mode]
    assert (newest.tail, newest.batches) == (tail, 5)
    assert [r.action for r in reports] == actions
    assert read_stream(tmp_path, "archive").num_rows == 5 * rows  # the sixth was in flight
    assert len(stream_files(tmp_path, "archive")) == 1


# --------------------------------------------------------------------------- small files


def test_atomic_write_json_round_trip_and_permissions(tmp_path):
    target = tmp_path / "checkpoint.json"
    atomic_write_json(target, {"archive": ["archive-20261201T200000Z-00001.arrow", 12]})
    target.chmod(0o640)
    atomic_write_json(target, {"archive": ["archive-20261201T200000Z-00001.arrow", 13]})
    assert json.loads(target.read_text()) == {
        "archive": ["archive-20261201T200000Z-00001.arrow", 13]}
    assert target.stat().st_mode & 0o777 == 0o640
    atomic_write_text(tmp_path / "status.txt", "running\n")
    assert (tmp_path / "status.txt").read_text() == "running\n"
    assert sorted(os.listdir(tmp_path)) == ["checkpoint.json", "status.txt"]


def test_atomic_write_json_crash_before_replace_keeps_the_old_file(tmp_path, monkeypatch):
    target = tmp_path / "checkpoint.json"
    atomic_write_json(target, {"batches": 12})
    old = target.read_bytes()

    def crash(*args, **kwargs):
        raise OSError("simulated crash between the temporary write and the replace")

    monkeypatch.setattr(sinks.os, "replace", crash)
    with pytest.raises(OSError, match="simulated crash"):
        atomic_write_json(target, {"batches": 13})
    monkeypatch.undo()
    assert target.read_bytes() == old
    assert os.listdir(tmp_path) == ["checkpoint.json"]  # temporary file removed
    with pytest.raises(TypeError):
        atomic_write_json(target, {"not json": object()})
    assert target.read_bytes() == old
