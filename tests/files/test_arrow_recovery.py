"""Ending killed files: truncation at every offset, corrupt and zero-filled tails,
live writers, leftover temporaries, and real kill -9 at chosen and random points.

The layout facts relied upon (a stream of messages closed by the end-of-stream
marker) are from the Arrow columnar format specification, "IPC Streaming Format";
the tests below check them against pyarrow rather than trusting them.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time

import numpy as np
import pyarrow as pa
import pytest
from arrow_samples import (
    archive_columns,
    same_rows,
    three_batch_file,
)

from turnstamp.errors import ArrowFileError
from turnstamp.files.reader import (
    read_arrow_file,
    read_arrow_file_report,
    read_stream,
    stream_files,
)
from turnstamp.files.recovery import finish_file, recover_partial_files
from turnstamp.files.schemas import OUTPUTS
from turnstamp.files.writer import RotatingArrowWriter

# -------------------------------------------------------------- partial files


def test_truncation_at_every_offset_of_the_last_batch(tmp_path):
    path, (end1, end2, end3), full, ids = three_batch_file(tmp_path)
    data = path.read_bytes()
    cut_dir = tmp_path / "cuts"
    cut_dir.mkdir()
    target = cut_dir / path.name
    tails = set()
    target.write_bytes(data)
    for cut in range(full, end2 - 1, -1):  # every offset of the last batch and the marker
        os.truncate(target, cut)
        table, info = read_arrow_file_report(target)
        kept = 3 if cut >= end3 else 2
        assert info.complete == (cut == full)
        assert info.batches == kept
        assert table.column("event_id").to_pylist() == ids[:4 * kept]
        assert info.bytes_ignored == (0 if cut == full else cut - (end3 if kept == 3 else end2))
        tails.add(info.tail)
        if cut % 29 == 0 or cut in (end2, end2 + 1, end3 - 1, end3, end3 + 4, full - 1, full):
            reports = recover_partial_files(cut_dir)
            if cut == full:
                assert reports == []
            else:
                (report,) = reports
                assert report.action == "ended" and report.batches_kept == kept
                assert report.bytes_dropped == info.bytes_ignored
                assert target.read_bytes() == data[:end3 if kept == 3 else end2] + data[end3:]
                assert recover_partial_files(cut_dir) == []  # idempotent
            target.write_bytes(data)  # the original bytes again for the next, shorter cut
    assert tails == {"end_of_stream", "message_boundary", "truncated_message"}


def test_a_closed_file_is_never_rewritten(tmp_path):
    path, (end1, _, _), _, _ = three_batch_file(tmp_path)
    before = path.read_bytes()
    report = finish_file(path, keep_batches=1)  # even when asked to drop batches
    assert report.action == "left_alone" and path.read_bytes() == before


def test_corrupt_tail_is_read_up_to_the_damage_and_left_alone(tmp_path):
    path, (end1, end2, end3), _, ids = three_batch_file(tmp_path)
    garbage = b"\xff\xff\xff\xff" + (16).to_bytes(4, "little") + bytes(16)
    data = path.read_bytes()[:end1] + garbage + path.read_bytes()[end1:end3]
    target = tmp_path / path.name
    target.write_bytes(data)
    table, info = read_arrow_file_report(target)
    assert info.tail == "corrupt" and info.batches == 1
    assert table.column("event_id").to_pylist() == ids[:4]
    (report,) = recover_partial_files(tmp_path)
    assert report.action == "left_alone"
    assert target.read_bytes() == data  # untouched for a human to look at


def test_zero_filled_tail_is_treated_as_truncation(tmp_path):
    # the tail a file system may leave after a power cut (size grew, data never came)
    path, (_, _, end3), full, ids = three_batch_file(tmp_path)
    target = tmp_path / path.name
    target.write_bytes(path.read_bytes()[:end3] + bytes(4096))
    table, info = read_arrow_file_report(target)
    assert (info.batches, info.bytes_ignored) == (3, 4096)
    (report,) = recover_partial_files(tmp_path)
    assert report.action == "ended" and report.batches_kept == 3
    assert target.read_bytes() == path.read_bytes()
    assert pa.ipc.open_stream(target.read_bytes()).read_all().column("event_id").to_pylist() == ids


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
    assert pa.ipc.open_stream(open_path.read_bytes()).read_all().num_rows == 30


def test_leftover_temporaries_are_cleaned_without_touching_data(tmp_path):
    with RotatingArrowWriter(tmp_path, "archive", OUTPUTS["archive"]) as writer:
        name = writer.write(archive_columns(0, 5)).file_name
    published = (tmp_path / name).read_bytes()
    os.link(tmp_path / name, tmp_path / f".{name}.part")  # killed between link and unlink
    (tmp_path / f".checkpoint.arrow.{'0' * 32}.tmp").write_bytes(published[:100])  # interrupted
    reports = recover_partial_files(tmp_path)
    assert sorted(r.action for r in reports) == ["removed", "removed"]
    assert os.listdir(tmp_path) == [name] and (tmp_path / name).read_bytes() == published
    assert recover_partial_files(tmp_path) == []


def test_not_an_arrow_file(tmp_path):
    target = tmp_path / "archive-20261201T200000Z-00001.arrows"
    target.write_bytes(b"PAR1 not ours")
    with pytest.raises(ArrowFileError, match="magic"):
        read_arrow_file(target)
    (report,) = recover_partial_files(tmp_path)
    assert report.action == "left_alone" and target.read_bytes() == b"PAR1 not ours"


# -------------------------------------------------------------------- kill -9


CHILD = textwrap.dedent("""
    import io, os, signal, sys
    import numpy as np
    import turnstamp.files.writer as arrow_writer
    from turnstamp.files.schemas import OUTPUTS

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

    arrow_writer.open = DyingFile  # the writer's open(path, "xb") now returns a DyingFile

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

    writer = arrow_writer.RotatingArrowWriter(directory, "archive", OUTPUTS["archive"],
                                       rotate_seconds=None, rotate_bytes=rotate_bytes,
                                       metadata={"turnstamp.run": mode})
    sizes = [0]
    for batch in range(100000):
        if batch == 5:
            if mode == "kill_mid_batch":  # half of the sixth batch reaches the file
                DyingFile.die_at = sizes[-1] + (sizes[-1] - sizes[-2]) // 2
            if mode == "kill_mid_marker":  # rotation dies 4 bytes into its end marker
                DyingFile.die_at = sizes[-1] + 4
                writer.rotate()
            if mode == "kill_after_marker":  # marker flushed, fsync never happens
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
        assert read_arrow_file_report(path)[1].complete
    _, newest = read_arrow_file_report(files[-1])  # complete or partial, never raises
    before = read_stream(directory, "archive")
    ids = before.column("event_id").to_numpy()
    assert len(ids) >= reported * rows  # everything reported complete is there ...
    assert len(ids) % rows == 0  # ... in whole batches only
    np.testing.assert_array_equal(ids, np.arange(len(ids)))

    reports = recover_partial_files(directory)
    assert all(r.action in ("ended", "removed") for r in reports), reports
    for path in stream_files(directory, "archive"):
        table = pa.ipc.open_stream(path.read_bytes()).read_all()  # closed, readable
        assert table.schema.metadata[b"turnstamp.run"]  # metadata kept
    after = read_stream(directory, "archive")
    assert same_rows(after, before)
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
    "kill_mid_batch": ("truncated_message", ["ended"]),
    "kill_mid_marker": ("truncated_message", ["ended"]),
    "kill_after_marker": ("end_of_stream", []),
    "kill_before_publish": ("end_of_stream", ["removed"]),
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
