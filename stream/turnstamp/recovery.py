"""Checkpoints, and resuming after a crash without losing or double-counting events.

Theory of operation
-------------------
For every message the service writes, in this order: its archive rows (one Arrow
batch per target), its rejects rows, then one ledger row. The ledger row is the
commit mark: it carries the message's accounting (events, tagged, filtered,
rejected). A checkpoint, written atomically between messages, holds the pipeline's
statistics, the sequence tracker, the counters and each stream's position
(file, batches written).

Resuming (``resume``):

1. finish any footer-less file (``sinks.recover_partial_files``);
2. restore the checkpoint;
3. replay the ledger rows written after it into the counters and the sequence
   tracker; replay the archive rows written after it into the statistics;
4. drop archive and rejects batches of a message that has no ledger row: the
   message in flight when the process died. That, and only that, is lost.

Counters therefore reconcile exactly after a ``kill -9``, and the statistics equal
those of an uninterrupted run over the messages that were committed.
"""

from __future__ import annotations

import json
import logging
import os
from pathlib import Path

import pyarrow as pa

from .files.durable import atomic_write_json
from .files.reader import read_arrow_file, stream_files
from .files.recovery import recover_partial_files

__all__ = ["CHECKPOINT", "write_checkpoint", "read_checkpoint", "tail_batches", "drop_uncommitted",
           "resume", "count_ledger_row"]

log = logging.getLogger(__name__)
CHECKPOINT = "checkpoint.json"


def write_checkpoint(directory: Path, state: dict) -> None:
    atomic_write_json(directory / CHECKPOINT, state)


def read_checkpoint(directory: Path) -> dict | None:
    path = directory / CHECKPOINT
    if not path.exists():
        return None
    try:
        return json.loads(path.read_text())
    except (OSError, json.JSONDecodeError) as exc:
        log.warning("checkpoint %s unreadable (%s): starting statistics afresh", path, exc)
        return None


def tail_batches(directory: Path, stem: str, position) -> list[tuple[Path, int, pa.RecordBatch]]:
    """Record batches of a stream written after ``position`` = [file name, batches]
    (everything when ``position`` is None), as (file, index in file, batch)."""
    out = []
    started = position is None or not position[0]
    for path in stream_files(directory, stem):
        skip = 0
        if not started:
            if path.name != position[0]:
                continue
            started, skip = True, int(position[1])
        table = read_arrow_file(path)
        for index, batch in enumerate(table.to_batches()):
            if index >= skip:
                out.append((path, index, batch))
    return out


def _keys(batch: pa.RecordBatch) -> set[tuple[str | None, int | None]]:
    sources = batch.column("source").to_pylist()
    sequences = batch.column("sequence").to_pylist()
    return set(zip(sources, sequences, strict=True))


def drop_uncommitted(directory: Path, stem: str, position, committed: set) -> int:
    """Remove batches after ``position`` whose (source, sequence) has no ledger row.

    Only the tail of the last file(s) can hold such batches; files are rewritten
    through a temporary file and an atomic rename. Returns rows dropped.
    """
    dropped = 0
    by_file: dict[Path, list[int]] = {}
    for path, index, batch in tail_batches(directory, stem, position):
        keys = _keys(batch)
        if keys and not keys <= committed:
            by_file.setdefault(path, []).append(index)
            dropped += batch.num_rows
    for path, indices in by_file.items():
        table = read_arrow_file(path)
        keep = [b for i, b in enumerate(table.to_batches()) if i not in set(indices)]
        temporary = path.with_name(f".{path.name}.rewrite")
        with pa.OSFile(str(temporary), "wb") as sink, \
                pa.ipc.new_file(sink, table.schema) as writer:
            for batch in keep:
                writer.write_batch(batch)
        os.replace(temporary, path)
        log.warning("dropped %d uncommitted rows from %s (message in flight at a crash)",
                    sum(table.to_batches()[i].num_rows for i in indices), path.name)
    return dropped


def resume(directory: Path, pipeline, tracker, counters: dict):
    """Bring a fresh pipeline, sequence tracker and counters to the state of the last
    run. Returns (the tracker to use, notes for the log and status)."""
    notes = [f"{r.path.name}: {r.action}, {r.rows_kept} rows kept"
             for r in recover_partial_files(directory) if r.action != "left_alone"]
    checkpoint = read_checkpoint(directory)
    positions = {}
    if checkpoint is not None:
        notes += pipeline.restore(checkpoint["pipeline"])
        tracker = type(tracker).from_state(checkpoint["tracker"])
        counters.update(checkpoint["counters"])
        positions = checkpoint["positions"]
    committed = set()
    for _, _, batch in tail_batches(directory, "ledger", positions.get("ledger")):
        for row in batch.to_pylist():
            committed.add((row["source"], row["sequence"]))
            count_ledger_row(counters, row)
            if row["outcome"] == "accepted":
                tracker.observe(row["source"], row["sequence"])
    replayed = 0
    for _, _, batch in tail_batches(directory, "archive", positions.get("archive")):
        if not _keys(batch) <= committed:
            continue
        table = pa.Table.from_batches([batch])
        name = table.column("target")[0].as_py()
        if name not in pipeline.targets:
            continue
        col = {c: table.column(c).to_numpy() for c in
               ("site_tt_ns", "phase", "weight", "recipe_flags", "quality_flags",
                "barycentric_correction_s")}
        pipeline.accumulate(name, col["site_tt_ns"], col["phase"], col["weight"].astype(float),
                            col["recipe_flags"], col["quality_flags"],
                            col["barycentric_correction_s"])
        replayed += batch.num_rows
    for stem in ("archive", "rejects"):
        dropped = drop_uncommitted(directory, stem, positions.get(stem), committed)
        if dropped:
            notes.append(f"{stem}: {dropped} rows of the message in flight at the crash dropped")
    if checkpoint is not None or committed:
        notes.append(f"resumed: {len(committed)} messages after the checkpoint replayed "
                     f"({replayed} archive rows)")
    return tracker, notes


def count_ledger_row(counters: dict, row: dict) -> None:
    """Add one ledger row to the service counters (see ``service.Counters``)."""
    counters["messages_received"] = counters.get("messages_received", 0) + 1
    if row["outcome"] != "accepted":
        counters["messages_rejected"] = counters.get("messages_rejected", 0) + 1
    for key in ("events", "tagged", "filtered", "rejected"):
        name = "events_received" if key == "events" else f"events_{key}"
        counters[name] = counters.get(name, 0) + int(row[key])
    counters["missing_messages"] = counters.get("missing_messages", 0) + int(row["missing_before"])
    if row["outcome"] == "duplicate_message":
        counters["duplicate_messages"] = counters.get("duplicate_messages", 0) + 1
