"""Reading an event file ahead of the tagging: bounded in bytes, in order, errors in
their turn, stopped with the run; and a run begun before its target is known
(``tagging.begin``) that leaves nothing running when it is abandoned."""

import threading
import time

import numpy as np
import pyarrow as pa
import pytest

from turnstamp.errors import EventFileError
from turnstamp.tagging.begin import FileTagging
from turnstamp.tagging.inputs import _ReadAhead, open_events

ROWS = 1000
BATCH_BYTES = 2 * 8 * ROWS  # two int64 columns


def _batch(i):
    return pa.record_batch({"event_id": np.arange(i * ROWS, (i + 1) * ROWS, dtype=np.uint64),
                            "time_ns": np.full(ROWS, i, np.int64)})


class _Source:
    """A generator of numbered batches that records what it made and whether it closed."""

    def __init__(self, n, fail_after=None):
        self.made, self.closed = 0, False
        self.items = self._items(n, fail_after)

    def _items(self, n, fail_after):
        try:
            for i in range(n):
                if i == fail_after:
                    raise OSError("disk read error")
                self.made += 1
                yield i, _batch(i)
        finally:
            self.closed = True


def _made_at_rest(source, expected, timeout=5.0):
    """What the reading thread has made once it has made ``expected`` batches and then
    a while longer (it should be waiting for room by then)."""
    deadline = time.monotonic() + timeout
    while source.made < expected and time.monotonic() < deadline:
        time.sleep(0.01)
    time.sleep(0.2)
    return source.made


def test_reads_ahead_no_more_than_its_limit_in_bytes():
    source = _Source(20)
    ahead = _ReadAhead(source.items, limit=3 * BATCH_BYTES)
    # three wait; the fourth is made and waits for room
    assert _made_at_rest(source, 4) == 4
    assert ahead._held <= 3 * BATCH_BYTES
    assert [i for i, _ in ahead] == list(range(20))
    assert source.closed


def test_one_batch_larger_than_the_limit_still_passes():
    source = _Source(3)
    assert [i for i, _ in _ReadAhead(source.items, limit=1)] == [0, 1, 2]


def test_a_read_error_is_raised_after_the_batches_before_it():
    source = _Source(10, fail_after=4)
    got = []
    with pytest.raises(OSError, match="disk read error"):
        for i, _ in _ReadAhead(source.items, limit=100 * BATCH_BYTES):
            got.append(i)
    assert got == [0, 1, 2, 3]


def test_a_reader_that_stops_early_ends_the_thread_and_closes_the_source():
    source = _Source(50)
    ahead = _ReadAhead(source.items, limit=2 * BATCH_BYTES)
    for i, _ in ahead:
        if i == 1:
            break
    ahead.stop()
    assert not ahead._thread.is_alive() and source.closed


def _write(path, n_batches=8):
    table = pa.Table.from_batches([_batch(i) for i in range(n_batches)])
    with pa.ipc.new_file(str(path), table.schema) as writer:
        writer.write_table(table)
    return path


def test_a_started_file_is_read_before_anyone_asks(tmp_path):
    reader = open_events(_write(tmp_path / "events.arrow")).start()
    try:
        deadline = time.monotonic() + 5
        while not reader._ahead._waiting and time.monotonic() < deadline:
            time.sleep(0.01)
        assert reader._ahead._waiting  # decoded while nobody iterated
        assert [s for s, _ in reader] == list(range(8))
    finally:
        reader.close()


def test_closing_a_started_reader_ends_its_thread(tmp_path):
    reader = open_events(_write(tmp_path / "events.arrow")).start()
    reader.close()
    assert not reader._ahead._thread.is_alive()
    assert reader._source is None


def _reading_threads():
    return [t for t in threading.enumerate() if t.name == "tag-reader"]


def test_an_abandoned_run_leaves_no_thread_helper_or_output(tmp_path):
    """What ``turnstamp tag`` does when its configuration fails to load after the run
    was begun: the reading and the statistics helper end, no output is written."""
    events, out = _write(tmp_path / "events.arrow"), tmp_path / "out" / "tagged.arrow"
    before = len(_reading_threads())
    with pytest.raises(ValueError, match="no such model"):
        with FileTagging(events, out, statistics_aside=True) as tagging:
            helper = tagging.helper
            raise ValueError("no such model")
    assert len(_reading_threads()) == before
    assert helper is None or not helper._process.is_alive()
    assert not out.parent.exists()


def test_an_output_that_may_not_be_written_is_refused_before_anything_starts(tmp_path):
    events = _write(tmp_path / "events.arrow")
    out = tmp_path / "tagged.arrow"
    out.write_bytes(b"last night's")
    before = len(_reading_threads())
    with pytest.raises(EventFileError, match="exists; pass --force"):
        FileTagging(events, out, statistics_aside=True)
    assert len(_reading_threads()) == before
