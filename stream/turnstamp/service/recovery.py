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

1. finish any footer-less file (``files.recovery.recover_partial_files``);
2. restore the checkpoint (``checkpoint``);
3. replay the ledger rows written after it into the counters and the sequence
   tracker, the rejects rows of those messages into the counts by reason, and
   their archive rows into the statistics;
4. drop archive and rejects batches of a message that has no ledger row: the
   message in flight when the process died. That, and only that, is lost.

The commit order and how its rows are counted live in ``ledger``; this module
only reads the files back in that light.

Counters therefore reconcile exactly after a ``kill -9``, and the statistics equal
those of an uninterrupted run over the messages that were committed.
"""

from __future__ import annotations

import logging
import os
from pathlib import Path
from typing import NamedTuple

import pyarrow as pa

from ..core.accounting import ACCEPTED, Counters, MessageRecord
from ..core.pipeline import Pipeline
from ..files.ledger import count_rejects, message_keys
from ..files.reader import read_arrow_file, stream_files
from ..files.recovery import recover_partial_files
from ..wire.sequence import SequenceTracker
from .checkpoint import read_checkpoint

__all__ = ["tail_batches", "drop_uncommitted", "Resumed", "resume"]

log = logging.getLogger(__name__)

Key = tuple[str | None, int | None]
"""A message: (source, sequence); (None, None) when its header was unreadable."""


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


def drop_uncommitted(directory: Path, stem: str, position, committed: set[Key]) -> int:
    """Remove batches after ``position`` whose (source, sequence) has no ledger row.

    Only the tail of the last file(s) can hold such batches; files are rewritten
    through a temporary file and an atomic rename. Returns rows dropped.
    """
    dropped = 0
    by_file: dict[Path, list[int]] = {}
    for path, index, batch in tail_batches(directory, stem, position):
        keys = message_keys(batch)
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


class Resumed(NamedTuple):
    """The state of the last run, brought back by ``resume``."""

    tracker: SequenceTracker
    counters: Counters
    notes: list[str]
    """What recovery did, for the log and the status."""


def resume(directory: Path, pipeline: Pipeline) -> Resumed:
    """Bring a fresh pipeline to the state of the last run in ``directory`` (which
    ``pipeline.restore`` and replay update in place); return that run's sequence
    tracker and counters."""
    notes = [f"{r.path.name}: {r.action}, {r.rows_kept} rows kept"
             for r in recover_partial_files(directory) if r.action != "left_alone"]
    checkpoint = read_checkpoint(directory)
    tracker, counters, positions = SequenceTracker(), Counters(), {}
    if checkpoint is not None:
        notes += pipeline.restore(checkpoint["pipeline"])
        tracker = SequenceTracker.from_state(checkpoint["tracker"])
        counters = Counters.from_state(checkpoint["counters"])
        positions = checkpoint["positions"]
    committed = _replay_ledger(directory, positions.get("ledger"), tracker, counters)
    _replay_rejects(directory, positions.get("rejects"), committed, counters)
    replayed = _replay_archive(directory, positions.get("archive"), committed, pipeline)
    for stem in ("archive", "rejects"):
        dropped = drop_uncommitted(directory, stem, positions.get(stem), committed)
        if dropped:
            notes.append(f"{stem}: {dropped} rows of the message in flight at the crash dropped")
    if checkpoint is not None or committed:
        notes.append(f"resumed: {len(committed)} messages after the checkpoint replayed "
                     f"({replayed} archive rows)")
    return Resumed(tracker, counters, notes)


def _replay_ledger(directory: Path, position, tracker: SequenceTracker,
                   counters: Counters) -> set[Key]:
    """Count the ledger rows after ``position``; returns the messages they commit."""
    committed = set()
    for _, _, batch in tail_batches(directory, "ledger", position):
        for row in batch.to_pylist():
            record = MessageRecord.from_row(row)
            committed.add((record.source, record.sequence))
            counters.add_message(record)
            if record.outcome == ACCEPTED:
                tracker.observe(record.source, record.sequence)
    return committed


def _replay_rejects(directory: Path, position, committed: set[Key], counters: Counters) -> None:
    """Count by reason the rejects rows after ``position`` of committed messages."""
    for _, _, batch in tail_batches(directory, "rejects", position):
        if message_keys(batch) <= committed:
            count_rejects(counters, batch)


def _replay_archive(directory: Path, position, committed: set[Key], pipeline: Pipeline) -> int:
    """Fold the archive rows after ``position`` of committed messages into the
    statistics; returns the rows replayed."""
    replayed = 0
    for _, _, batch in tail_batches(directory, "archive", position):
        if not message_keys(batch) <= committed:
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
    return replayed
