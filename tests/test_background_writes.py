"""The writing thread of offline tagging: order, the bound on what waits, failures."""

import threading

import pytest

from turnstamp.tagging.outputs import BackgroundWrites


class _Disk:
    """An output whose writes wait until the test lets them through."""

    def __init__(self):
        self.written = []
        self.started = threading.Semaphore(0)
        self.go = threading.Semaphore(0)

    def write(self, table):
        self.started.release()
        self.go.acquire()
        self.written.append(table)


def _handed(writes, disk, table):
    done = threading.Event()
    threading.Thread(target=lambda: (writes.write(disk, table, handed=True), done.set()),
                     daemon=True).start()
    return done


def test_one_handed_table_waits_while_the_disk_is_busy_and_the_next_one_is_held():
    disk, writes = _Disk(), BackgroundWrites()
    writes.write(disk, "first", handed=True)
    assert disk.started.acquire(timeout=5)  # the thread is writing "first"
    second = _handed(writes, disk, "second")
    assert second.wait(5)  # it waits in the queue: the caller goes on tagging
    third = _handed(writes, disk, "third")
    assert not third.wait(0.3)  # three batches in memory at most: this caller waits
    disk.go.release()  # "first" written; the thread takes "second"
    assert third.wait(5)
    for _ in range(2):
        disk.go.release()
    writes.drain()
    assert disk.written == ["first", "second", "third"]


def test_a_failed_write_is_raised_at_the_next_write_and_later_ones_are_not_written():
    class Failing:
        written = []

        def write(self, table):
            if table == "bad":
                raise OSError("disk full")
            self.written.append(table)

    out, writes = Failing(), BackgroundWrites()
    writes.write(out, "bad", handed=True)
    with pytest.raises(OSError, match="disk full"):
        for table in ("next", "later"):  # "later" waits until "bad" has been tried
            writes.write(out, table, handed=True)
    writes.drain_quietly()
    assert out.written == []
