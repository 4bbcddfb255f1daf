"""Event files read as a stream of record batches, in bounded memory.

Arrow IPC files and streams are read batch by batch from an ordinary file (not a
memory map, whose touched pages would stay resident up to the file's size);
Parquet files are decoded ``READ_ROWS`` rows at a time. Only one batch is held at
a time, whatever the file's size. The file's own batches are kept as they are (a
batch is a unit of the output's ``sequence`` column and of the duplicate-id
check), except that a batch is tagged in slices of at most ``SLICE_ROWS`` rows,
each with the batch's number, so that the work in memory stays bounded whatever
the writer of the file chose (a table written in one piece is one batch).

The next batch is read on a background thread while the current one is tagged
(pyarrow releases the interpreter lock while it reads and decodes): one batch at
most waits.
"""

from __future__ import annotations

import queue
import threading
from collections.abc import Iterator
from pathlib import Path

import pyarrow as pa

from ..errors import EventFileError

__all__ = ["READ_ROWS", "SLICE_ROWS", "EventReader", "open_events"]

READ_ROWS = 1 << 20  # rows per Parquet read (numbers the batches, as it always has)
SLICE_ROWS = 1 << 18  # rows tagged at once: 22 MB of archive rows a slice


class EventReader:
    """The record batches of one event file, in order, as (batch number, batch) pairs
    (iterate once)."""

    def __init__(self, path: Path):
        self.path = path
        self.rows: int | None = None  # total rows when the file says so cheaply
        self._source = None
        self._batches = self._open()

    def _open(self) -> Iterator[pa.RecordBatch]:
        if self.path.suffix.lower() == ".parquet":
            import pyarrow.parquet as pq

            # no pre-buffering of whole row groups (80 MB more resident for 2^20-row
            # groups), no decoding threads (tag is single-core)
            parquet = pq.ParquetFile(self.path, pre_buffer=False)
            self.rows = parquet.metadata.num_rows
            return parquet.iter_batches(batch_size=READ_ROWS, use_threads=False)
        self._source = pa.OSFile(str(self.path), "rb")
        try:
            reader = pa.ipc.open_file(self._source)
        except pa.ArrowInvalid:
            self._source.seek(0)
            return iter(pa.ipc.open_stream(self._source))
        return (reader.get_batch(i) for i in range(reader.num_record_batches))

    def __iter__(self) -> Iterator[tuple[int, pa.RecordBatch]]:
        return _prefetched(self._slices())

    def _slices(self) -> Iterator[tuple[int, pa.RecordBatch]]:
        try:
            for sequence, record in enumerate(self._batches):
                for start in range(0, max(record.num_rows, 1), SLICE_ROWS):
                    yield sequence, record.slice(start, SLICE_ROWS)
        except (OSError, pa.ArrowException) as exc:
            raise EventFileError("events", str(self.path),
                                 f"cannot read as Arrow or Parquet: {exc}") from None
        finally:
            self.close()

    def close(self) -> None:
        if self._source is not None:
            self._source.close()
            self._source = None


_END = object()


def _prefetched(items, waiting: int = 1):
    """The items of the generator ``items``, each read ahead on a background thread;
    its errors are raised here, in order."""
    ready: queue.Queue = queue.Queue(maxsize=waiting)
    stop = threading.Event()

    def produce() -> None:
        try:
            for item in items:
                while not stop.is_set():
                    try:
                        ready.put((item, None), timeout=0.1)
                        break
                    except queue.Full:
                        continue
                if stop.is_set():
                    break
            outcome = (_END, None)
        except BaseException as exc:  # handed to the reader, in order
            outcome = (_END, exc)
        finally:
            items.close()
        while not stop.is_set():
            try:
                ready.put(outcome, timeout=0.1)
                return
            except queue.Full:
                continue

    thread = threading.Thread(target=produce, name="tag-reader", daemon=True)
    thread.start()
    try:
        while True:
            item, error = ready.get()
            if item is _END:
                if error is not None:
                    raise error
                return
            yield item
    finally:
        stop.set()
        thread.join()


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
