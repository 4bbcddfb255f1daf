"""Checkpoints: the service's state between two messages, in one binary file.

A checkpoint (``checkpoint.arrow`` in the output folder, replaced atomically) is an
Arrow IPC file whose schema metadata ``turnstamp.checkpoint`` holds the document
below as compact JSON, every array in it replaced by ``{"$f" or "$i": [offset,
shape, dtype]}``: a slice of the file's float64 column ``floats`` or int64 column
``ints``. Each statistics accumulator is a header and nine arrays
(``core.binnedarrays``); read back, it is its ``to_state()`` document again.
Unpacked, the document is:

``version``
    2.
``pipeline``
    ``Pipeline.to_state()``: the statistics (also read by ``turnstamp stack``).
``tracker``
    ``SequenceTracker.to_state()``: what each source sent last.
``counters``
    ``Counters.to_state()``: every count, reject reasons included.
``positions``
    Per output stream, [file name, record batches written]: where the replay of a
    restart begins (``recovery.resume``). Taken with the state, between two
    messages, so it is never behind what the state has counted.

Its size is that of the retained statistics (bounded by ``retain_hours``), the
floats packed as binary; ``Checkpointer`` takes the snapshot between messages and
writes it on its own thread, so the loop only pays for the snapshot.
"""

from __future__ import annotations

import json
import logging
import threading
import time
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pyarrow as pa

from ..core.accounting import Counters
from ..core.binnedarrays import binned_arrays, state_from_arrays
from ..core.pipeline import Pipeline
from ..core.stacking import STATE_VERSION as PIPELINE_STATE_VERSION
from ..files.durable import atomic_write_bytes
from ..files.writer import RotatingArrowWriter
from ..wire.sequence import SequenceTracker

__all__ = ["CHECKPOINT", "VERSION", "Checkpointer", "checkpoint_state", "encode_checkpoint",
           "decode_checkpoint", "write_checkpoint", "read_checkpoint"]

log = logging.getLogger(__name__)

CHECKPOINT = "checkpoint.arrow"
VERSION = 2
_KEY = b"turnstamp.checkpoint"


def checkpoint_state(pipeline: Pipeline, tracker: SequenceTracker, counters: Counters,
                     writers: Mapping[str, RotatingArrowWriter]) -> dict:
    """The checkpoint document of the state between two messages: a snapshot whose
    accumulators are arrays (``core.binnedarrays``), cheap to take late in a night."""
    return {
        "version": VERSION,
        "pipeline": {
            "version": PIPELINE_STATE_VERSION,
            "counters": pipeline.counters.to_state(),
            "quality": pipeline.quality.to_state(),
            "targets": {
                name: {"phase_reference": pipeline.phase_reference[name],
                       "recipes": [r.name for r in target.recipes],
                       "moments": [dict(zip(("$binned", "arrays"), binned_arrays(m),
                                            strict=True)) for m in pipeline.moments[name]]}
                for name, target in pipeline.targets.items()},
        },
        "tracker": tracker.to_state(),
        "counters": counters.to_state(),
        "positions": {stem: list(writer.position) for stem, writer in writers.items()},
    }


def _pack(node, chunks: dict[str, list], used: dict[str, int]):
    if isinstance(node, dict):
        return {key: _pack(value, chunks, used) for key, value in node.items()}
    if isinstance(node, list):
        return [_pack(value, chunks, used) for value in node]
    if isinstance(node, np.ndarray):
        kind = "$f" if node.dtype.kind == "f" else "$i"
        flat = node.reshape(-1).astype(np.float64 if kind == "$f" else np.int64)
        chunks[kind].append(flat)
        used[kind] += flat.size
        return {kind: [used[kind] - flat.size, list(node.shape), node.dtype.str]}
    return node


def _unpack(node, columns: dict[str, np.ndarray]):
    if isinstance(node, dict):
        for kind in ("$f", "$i"):
            if len(node) == 1 and kind in node:
                start, shape, dtype = node[kind]
                size = int(np.prod(shape))
                return columns[kind][start:start + size].reshape(shape).astype(dtype)
        if "$binned" in node:
            return state_from_arrays(node["$binned"], _unpack(node["arrays"], columns))
        return {key: _unpack(value, columns) for key, value in node.items()}
    if isinstance(node, list):
        return [_unpack(value, columns) for value in node]
    return node


def encode_checkpoint(state: dict) -> bytes:
    """The bytes of a checkpoint file holding ``state``."""
    chunks: dict[str, list] = {"$f": [], "$i": []}
    skeleton = _pack(state, chunks, {"$f": 0, "$i": 0})
    floats = np.concatenate(chunks["$f"]) if chunks["$f"] else np.zeros(0)
    ints = np.concatenate(chunks["$i"]) if chunks["$i"] else np.zeros(0, np.int64)
    rows = max(floats.size, ints.size)
    table = pa.table({"floats": np.pad(floats, (0, rows - floats.size)),
                      "ints": np.pad(ints, (0, rows - ints.size))})
    table = table.replace_schema_metadata(
        {_KEY: json.dumps(skeleton, separators=(",", ":")).encode()})
    sink = pa.BufferOutputStream()
    with pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def decode_checkpoint(source) -> dict:
    """The state held by a checkpoint file (a path or a buffer), accumulators in the
    ``to_state()`` form that ``Pipeline.restore`` and ``turnstamp stack`` read."""
    reader = pa.ipc.open_file(source)
    table = reader.read_all()
    skeleton = json.loads(reader.schema.metadata[_KEY])
    columns = {"$f": table.column("floats").to_numpy(), "$i": table.column("ints").to_numpy()}
    return _unpack(skeleton, columns)


def write_checkpoint(directory: Path, state: dict) -> None:
    """Replace the checkpoint of ``directory`` atomically."""
    atomic_write_bytes(directory / CHECKPOINT, encode_checkpoint(state))


def read_checkpoint(directory: Path) -> dict | None:
    """The checkpoint of ``directory``; None when there is none or it is unreadable."""
    path = directory / CHECKPOINT
    if not path.exists():
        if (directory / "checkpoint.json").exists():
            log.warning("checkpoint.json of an older version ignored: statistics start afresh")
        return None
    try:
        with pa.memory_map(str(path), "r") as source:
            return decode_checkpoint(source)
    except (OSError, KeyError, ValueError, pa.ArrowException) as exc:
        log.warning("checkpoint %s unreadable (%s): starting statistics afresh", path, exc)
        return None


class Checkpointer:
    """Writes checkpoints of ``directory`` on its own thread, one at a time.

    ``submit`` hands over a snapshot (taken between messages); when a write is still
    running the snapshot replaces any one waiting, so the cost never piles up.
    ``wait`` returns once everything submitted is on disk.
    """

    def __init__(self, directory: Path):
        self.directory = directory
        self._pending: dict | None = None
        self._condition = threading.Condition()
        self._busy = False
        self._closed = False
        self.writes = 0
        self.last_seconds = 0.0
        self._thread = threading.Thread(target=self._run, name="checkpoint", daemon=True)
        self._thread.start()

    def submit(self, state: dict) -> None:
        """Queue ``state`` for writing (replacing a snapshot not yet started)."""
        with self._condition:
            self._pending = state
            self._condition.notify_all()

    def wait(self, timeout: float | None = 60.0) -> None:
        """Block until every submitted snapshot is written."""
        with self._condition:
            self._condition.wait_for(lambda: self._pending is None and not self._busy, timeout)

    def close(self) -> None:
        """Write what is pending, then stop the thread."""
        self.wait()
        with self._condition:
            self._closed = True
            self._condition.notify_all()
        self._thread.join(timeout=60)

    def _run(self) -> None:
        while True:
            with self._condition:
                self._condition.wait_for(lambda: self._pending is not None or self._closed)
                if self._pending is None:
                    return
                state, self._pending, self._busy = self._pending, None, True
            started = time.perf_counter()
            try:
                write_checkpoint(self.directory, state)
            except Exception:  # a full disk must not stop the service; the log says so
                log.exception("checkpoint not written")
            with self._condition:
                self._busy = False
                self.writes += 1
                self.last_seconds = time.perf_counter() - started
                self._condition.notify_all()
