"""The files offline tagging writes: the archive and, when events were refused, the
rejects, written batch by batch and published only when the run succeeds.

Each output is written to a hidden partial file beside its final name and moved
into place (an atomic rename) once every batch is in: a run that fails or is
interrupted leaves neither an empty nor a half-written output behind, and an
existing output is replaced only by a complete one (and only with ``force``).
The archive is written in the Arrow IPC file format, or Parquet when its name
ends in ``.parquet``; the rejects always in Arrow IPC.

Writing is handed to one background thread (``BackgroundWrites``), in order:
pyarrow releases the interpreter lock while it encodes, so the writing overlaps
the tagging of the next batch. The bytes go to the disk around the page cache
while the disk keeps up (``directfile``): copying an archive into the page cache
cost nearly as much CPU as tagging it. An archive batch waits to be handed over
while another one is still waiting for the thread, so memory holds at most three
batches of archive rows (one being written, one waiting, one being tagged): the
one waiting lets tagging go on while the disk pauses.
"""

from __future__ import annotations

import os
import queue
import threading
from pathlib import Path

import pyarrow as pa

from ..errors import EventFileError
from .directfile import DirectFile

__all__ = ["OutputFile", "BackgroundWrites", "rejects_path", "check_outputs", "make_folder",
           "remove_folders"]


def rejects_path(output: Path) -> Path:
    """Where the rejects of an archive go: ``STEM.rejects.arrow`` beside it."""
    return output.with_name(output.stem + ".rejects.arrow")


def check_outputs(events: Path, output: Path, force: bool) -> None:
    """Refuse an output that is the input, a folder, or exists without ``force``."""
    if output.exists() and events.exists() and output.resolve() == events.resolve():
        raise EventFileError("--out", str(output), "is the input file; choose another name")
    for path in (output, rejects_path(output)):
        if path.is_dir():
            raise EventFileError("--out", str(path), "is a folder; give a file name")
        if path.exists() and not force:
            raise EventFileError("--out", str(path), "exists; pass --force to overwrite it")
    if output.parent.exists() and not output.parent.is_dir():
        raise EventFileError("--out", str(output), f"{output.parent} is not a folder")


def make_folder(folder: Path) -> list[Path]:
    """Create ``folder`` and missing parents; the folders created, deepest first."""
    created = []
    missing = folder
    while not missing.exists():
        created.append(missing)
        missing = missing.parent
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise EventFileError("--out", str(folder), f"cannot create the folder: {exc}") from None
    return created


def remove_folders(created: list[Path]) -> None:
    """Remove folders ``make_folder`` created, where a failed run left them empty."""
    for folder in created:
        try:
            folder.rmdir()
        except OSError:
            return


class OutputFile:
    """One output written table by table into a partial file, published by ``finish``.

    Parameters
    ----------
    path : Path
        Final name (Parquet by the suffix ``.parquet``, else Arrow IPC file format).
    schema : pyarrow.Schema
        Schema with the run's provenance in its metadata.
    always : bool
        Publish even without rows (the archive exists whenever the run succeeds).
    """

    def __init__(self, path: Path, schema: pa.Schema, always: bool = False):
        self.path = path
        self.schema = schema
        self.always = always
        self.rows = 0
        self.partial = path.with_name(f".{path.name}.{os.getpid()}.partial")
        self._writer = None
        self._sink = None

    def _open(self) -> None:
        try:
            self._sink = pa.PythonFile(DirectFile(self.partial), mode="w")
            if self.path.suffix.lower() == ".parquet":
                import pyarrow.parquet as pq

                # dictionaries for the text columns alone: tried on every float and
                # integer column (the default) they cost 2.8x the writing time, and
                # the file came out larger
                text = [f.name for f in self.schema
                        if pa.types.is_string(f.type) or pa.types.is_dictionary(f.type)]
                self._writer = pq.ParquetWriter(self._sink, self.schema, use_dictionary=text)
            else:
                self._writer = pa.ipc.new_file(self._sink, self.schema)
        except OSError as exc:
            raise EventFileError("--out", str(self.path), f"cannot write: {exc}") from None

    def write(self, table: pa.Table | pa.RecordBatch) -> None:
        """Append rows (of the schema's types; its metadata need not be there)."""
        if self._writer is None:
            self._open()
        try:
            if isinstance(table, pa.RecordBatch):
                self._writer.write_batch(table)
            else:
                self._writer.write_table(table)
        except OSError as exc:  # a full disk, a vanished folder: said, not a traceback
            raise EventFileError("--out", str(self.path), f"cannot write: {exc}") from None
        self.rows += table.num_rows

    def _close(self) -> None:
        if self._writer is not None:
            self._writer.close()
            self._writer = None
        if self._sink is not None:
            self._sink.close()
            self._sink = None

    def finish(self) -> Path | None:
        """Close and move into place; the published path (None when nothing to publish)."""
        if self._writer is None and self.always:
            self._open()
        published = self._writer is not None
        try:
            self._close()
            if not published:
                return None
            os.replace(self.partial, self.path)
        except OSError as exc:
            raise EventFileError("--out", str(self.path), f"cannot write: {exc}") from None
        return self.path

    def abandon(self) -> None:
        """Close and delete the partial file (after a failure)."""
        try:
            self._close()
        except (OSError, pa.ArrowException):
            pass
        self.partial.unlink(missing_ok=True)


class BackgroundWrites:
    """Writes to ``OutputFile`` objects on one background thread, in order.

    ``stream(output, handed=...)`` gives a writer (``write(table)``) for the ledger.
    A write through a ``handed`` stream returns once the thread has taken the table
    before it (at most one such table waits in the queue, so at most three batches'
    worth are in memory); other writes queue behind it. A failure of the thread is
    raised in the caller at its next write or at ``drain``.
    """

    _STOP = None

    def __init__(self):
        self._queue: queue.Queue = queue.Queue()
        self._taken = threading.Semaphore(1)  # one handed table may wait
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._run, name="tag-writer", daemon=True)
        self._thread.start()

    def _run(self) -> None:
        while True:
            item = self._queue.get()
            if item is self._STOP:
                return
            output, table, handed = item
            if handed:
                self._taken.release()
            if self._error is None:
                try:
                    output.write(table)
                except BaseException as exc:  # handed to the caller, not lost in the thread
                    self._error = exc
            del item, table  # the rows go as soon as they are written

    def _raise(self) -> None:
        if self._error is not None:
            error, self._error = self._error, None
            raise error

    def write(self, output: OutputFile, table, handed: bool = False) -> None:
        if handed:
            self._taken.acquire()
        self._raise()
        self._queue.put((output, table, handed))

    def stream(self, output: OutputFile, handed: bool = False) -> _Stream:
        return _Stream(self, output, handed)

    def drain(self) -> None:
        """Wait until everything queued is written; raise a failure of the thread."""
        if self._thread.is_alive():
            self._queue.put(self._STOP)
            self._thread.join()
        self._raise()

    def drain_quietly(self) -> None:
        """Stop the thread after a failure elsewhere (its own error, if any, is dropped)."""
        try:
            self.drain()
        except BaseException:  # the caller is already raising the first failure
            pass


class _Stream:
    """The ``write(table)`` of one output, through the background thread."""

    def __init__(self, writes: BackgroundWrites, output: OutputFile, handed: bool):
        self._writes = writes
        self._output = output
        self._handed = handed

    def write(self, table) -> None:
        self._writes.write(self._output, table, self._handed)
