"""Event files read as a stream of record batches, in bounded memory.

Arrow IPC files and streams are read batch by batch from an ordinary file (not a
memory map, whose touched pages would stay resident up to the file's size);
Parquet files are decoded ``READ_ROWS`` rows at a time. Only one batch is held at
a time, whatever the file's size. The file's own batches are kept as they are (a
batch is a unit of the output's ``sequence`` column and of the duplicate-id
check), except that a batch is tagged in slices of at most ``SLICE_ROWS`` rows,
each with the batch's number, so that the work in memory stays bounded whatever
the writer of the file chose (a table written in one piece is one batch).

Batches are read on a background thread while the current one is tagged (pyarrow
releases the interpreter lock while it reads and decodes): one batch of an Arrow IPC
file (a copy from the page cache), Parquet up to ``AHEAD_BYTES`` ahead (decoding it
costs a third of a second per 10^7 events). A command starts the reading (``start``)
before it loads its configuration and site tables, so that the first Parquet
batches are decoded on a second CPU during that start-up rather than after it.
"""

from __future__ import annotations

import functools
import threading
from collections import deque
from collections.abc import Iterator
from pathlib import Path

import pyarrow as pa

from ..errors import EventFileError

__all__ = ["AHEAD_BYTES", "READ_ROWS", "SLICE_ROWS", "EventReader", "open_events"]

READ_ROWS = 1 << 20  # rows per Parquet read (numbers the batches, as it always has)
SLICE_ROWS = 1 << 18  # rows tagged at once: 22 MB of archive rows a slice
AHEAD_BYTES = 64 << 20  # Parquet decoded ahead at most (more only for one larger batch)


class EventReader:
    """The record batches of one event file, in order, as (batch number, batch) pairs
    (iterate once)."""

    def __init__(self, path: Path):
        self.path = path
        self.rows: int | None = None  # total rows when the file says so cheaply
        self._ahead_bytes = 0  # what may wait beyond one batch
        self._source = None
        self._batches = self._open()
        self._ahead: _ReadAhead | None = None

    def _open(self) -> Iterator[pa.RecordBatch]:
        if self.path.suffix.lower() == ".parquet":
            import pyarrow.parquet as pq

            # no pre-buffering of whole row groups (80 MB more resident for 2^20-row
            # groups), no decoding threads (tag is single-core)
            parquet = pq.ParquetFile(self.path, pre_buffer=False)
            self.rows = parquet.metadata.num_rows
            self._ahead_bytes = AHEAD_BYTES
            return parquet.iter_batches(batch_size=READ_ROWS, use_threads=False)
        self._source = pa.OSFile(str(self.path), "rb")
        try:
            reader = pa.ipc.open_file(self._source)
        except pa.ArrowInvalid:
            self._source.seek(0)
            return iter(pa.ipc.open_stream(self._source))
        return (reader.get_batch(i) for i in range(reader.num_record_batches))

    def start(self) -> EventReader:
        """Begin reading ahead now, on the background thread (the first iteration
        does otherwise)."""
        if self._ahead is None:
            self._ahead = _ReadAhead(self._slices(), self._ahead_bytes)
        return self

    def __iter__(self) -> Iterator[tuple[int, pa.RecordBatch]]:
        return iter(self.start()._ahead)

    def _slices(self) -> Iterator[tuple[int, pa.RecordBatch]]:
        try:
            for sequence, record in enumerate(self._batches):
                for start in range(0, max(record.num_rows, 1), SLICE_ROWS):
                    yield sequence, record.slice(start, SLICE_ROWS)
        except (OSError, pa.ArrowException) as exc:
            raise EventFileError("events", str(self.path),
                                 f"cannot read as Arrow or Parquet: {exc}") from None
        finally:
            self._close_source()

    def close(self) -> None:
        """Stop reading and close the file (what was read ahead is dropped)."""
        if self._ahead is not None:
            self._ahead.stop()
        self._close_source()

    def _close_source(self) -> None:
        if self._source is not None:
            self._source.close()
            self._source = None


_END = object()


class _ReadAhead:
    """The items of a generator of (batch number, batch) pairs, read on a background
    thread while at most ``limit`` bytes of batches wait (one may always wait); its
    errors are raised to the reader in their turn. Iterate once."""

    def __init__(self, items: Iterator, limit: int):
        self._items, self._limit = items, limit
        self._waiting: deque = deque()  # (item, error, bytes)
        self._held = 0
        self._stopped = False
        self._turn = threading.Condition()
        self._thread = threading.Thread(target=self._produce, name="tag-reader", daemon=True)
        self._thread.start()

    def _room(self, size: int) -> bool:
        return self._stopped or not self._waiting or self._held + size <= self._limit

    def _produce(self) -> None:
        try:
            for item in self._items:
                size = item[1].nbytes
                with self._turn:
                    self._turn.wait_for(functools.partial(self._room, size))
                    if self._stopped:
                        return
                    self._waiting.append((item, None, size))
                    self._held += size
                    self._turn.notify_all()
            end = (_END, None, 0)
        except BaseException as exc:  # handed to the reader, in order
            end = (_END, exc, 0)
        finally:
            self._items.close()
        with self._turn:
            self._waiting.append(end)
            self._turn.notify_all()

    def __iter__(self) -> Iterator:
        try:
            while True:
                with self._turn:
                    self._turn.wait_for(lambda: self._waiting)
                    item, error, size = self._waiting.popleft()
                    self._held -= size
                    self._turn.notify_all()
                if item is _END:
                    if error is not None:
                        raise error
                    return
                yield item
        finally:
            self.stop()

    def stop(self) -> None:
        """Stop reading (the batch being read is finished first) and drop what waits."""
        with self._turn:
            self._stopped = True
            self._waiting.clear()
            self._turn.notify_all()
        if self._thread is not threading.current_thread():
            self._thread.join()


def open_events(path: Path) -> EventReader:
    """An ``EventReader`` for an Arrow IPC file or stream, or Parquet (by the suffix).

    Raises
    ------
    EventFileError
        The file is missing, a folder, or not readable as Arrow or Parquet.
    """
    if not path.exists():
        raise EventFileError("events", str(path), "no such file")
    if path.is_dir():
        raise EventFileError("events", str(path), "is a folder; give one Arrow IPC or "
                             "Parquet file")
    try:
        return EventReader(path)
    except (OSError, pa.ArrowException) as exc:
        raise EventFileError("events", str(path),
                             f"cannot read as Arrow or Parquet: {exc}") from None
