"""Resuming after a crash without losing or double-counting events.

Theory of operation
-------------------
For every message the service writes, in this order: its archive rows (one Arrow
batch per target), its rejects rows, then one ledger row (``files.ledger``); messages
fed together commit together, their ledger rows in one batch. The ledger batch is
the commit mark. A checkpoint, taken between two commits, holds the
statistics, the sequence tracker, the counters and each stream's position (file,
batches written); the positions never lie behind what the state has counted.

Resuming (``resume``):

1. remove leftover temporaries (``files.recovery.clean_leftovers``);
2. restore the checkpoint (none: an empty state and positions before every file);
3. read every stream after its position, up to its last complete batch;
4. walk the ledger batches in lockstep with the archive and rejects batches: each
   commit's batches come, in order, just before its ledger batch, so it claims the
   batches of its messages' (source, sequence) that follow those already claimed
   (at most one archive batch per target; a refused message: exactly one rejects
   batch). Replay the ledger rows into the counters and
   the tracker, the claimed rejects batches into the counts by reason, the claimed
   archive batches into the statistics;
5. cut what no ledger batch claims (the commit in flight at the kill, always the end
   of the stream's last file) and end every killed file with its end-of-stream
   marker (``files.recovery.finish_file``). A closed file is never rewritten.

Nothing of this writes anything but the cut of step 5, which keeps every committed
batch; a start-up killed at any point is therefore redone identically from the same
checkpoint, however often the process dies.
"""

from __future__ import annotations

import logging
from pathlib import Path
from typing import NamedTuple

import pyarrow as pa

from ..core.accounting import ACCEPTED, Counters, MessageRecord
from ..core.pipeline import Pipeline
from ..files.ledger import count_rejects, message_keys
from ..files.reader import FILE_NAME, read_arrow_file, stream_files
from ..files.recovery import clean_leftovers, finish_file
from ..files.schemas import OUTPUTS
from ..wire.sequence import SequenceTracker
from .checkpoint import read_checkpoint

__all__ = ["tail_batches", "claimed", "Resumed", "resume"]

log = logging.getLogger(__name__)

Key = tuple[str | None, int | None]
"""A message: (source, sequence); (None, None) when its header was unreadable."""
Entry = tuple[Path, int, pa.RecordBatch]
"""One batch of a stream: (file, index in the file, batch)."""


def _counter(name: str) -> int:
    match = FILE_NAME.match(name)
    return int(match.group("counter")) if match else -1


def tail_batches(directory: Path, stem: str, position) -> list[Entry]:
    """Record batches of a stream written after ``position`` = [file name, batches]
    (everything when ``position`` is None or names no file)."""
    out = []
    after = -1 if not position or not position[0] else _counter(position[0])
    for path in stream_files(directory, stem):
        counter = _counter(path.name)
        if counter < after:
            continue
        skip = int(position[1]) if counter == after else 0
        for index, batch in enumerate(read_arrow_file(path).to_batches()):
            if index >= skip:
                out.append((path, index, batch))
    return out


def _key(batch: pa.RecordBatch) -> Key:
    keys = message_keys(batch)
    return next(iter(keys)) if len(keys) == 1 else (None, -1)


def claimed(commits: list[list[MessageRecord]], archive: list[tuple[str, set[Key]]],
            rejects: list[Key], rejects_events: list[int]) -> tuple[int, int]:
    """How many archive and rejects batches (from the start of each tail) the ledger
    batches ``commits`` (the rows of one commit each) commit, walked in lockstep.
    ``archive`` gives each archive batch's target and messages.

    A commit's archive batches come first, at most one per target, holding rows of
    its accepted messages only. Its rejects batches follow message by message: a
    refused message has one; an accepted one, batches of its key holding at most the
    events it rejected (gap notes hold none), so a refused repeat of it that follows,
    in flight, is not taken for its own."""
    a = r = 0
    for records in commits:
        accepted = {(x.source, x.sequence) for x in records if x.outcome == ACCEPTED}
        targets: set[str] = set()
        while a < len(archive) and archive[a][0] not in targets and archive[a][1] <= accepted:
            targets.add(archive[a][0])
            a += 1
        for record in records:
            key = (record.source, record.sequence)
            if record.outcome == ACCEPTED:
                budget = record.rejected
                while r < len(rejects) and rejects[r] == key and rejects_events[r] <= budget:
                    budget -= rejects_events[r]
                    r += 1
            elif r < len(rejects) and rejects[r] == key:
                r += 1
    return a, r


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
    notes = [f"{r.path.name}: {r.action} ({r.detail})" for r in clean_leftovers(directory)]
    checkpoint = read_checkpoint(directory)
    tracker, counters, positions = SequenceTracker(), Counters(), {}
    if checkpoint is not None:
        notes += pipeline.restore(checkpoint["pipeline"])
        tracker = SequenceTracker.from_state(checkpoint["tracker"])
        counters = Counters.from_state(checkpoint["counters"])
        positions = checkpoint["positions"]
    commits = [[MessageRecord.from_row(row) for row in batch.to_pylist()]
               for _, _, batch in tail_batches(directory, "ledger", positions.get("ledger"))]
    records = [record for commit in commits for record in commit]
    archive = tail_batches(directory, "archive", positions.get("archive"))
    rejects = tail_batches(directory, "rejects", positions.get("rejects"))
    kept_archive, kept_rejects = claimed(
        commits, [(_target(b), message_keys(b)) for _, _, b in archive],
        [_key(b) for _, _, b in rejects],
        [sum(e or 0 for e in b.column("events").to_pylist()) for _, _, b in rejects])
    for record in records:
        counters.add_message(record)
        if record.outcome == ACCEPTED:
            tracker.observe(record.source, record.sequence)
    for _, _, batch in rejects[:kept_rejects]:
        count_rejects(counters, batch)
    replayed = sum(_accumulate(pipeline, batch) for _, _, batch in archive[:kept_archive])
    for stem, tail, kept in (("archive", archive, kept_archive),
                             ("rejects", rejects, kept_rejects)):
        dropped = sum(batch.num_rows for _, _, batch in tail[kept:])
        if dropped:
            notes.append(f"{stem}: {dropped} rows of the commit in flight at the crash cut")
        notes += _finish(directory, stem, tail[kept:])
    for stem in OUTPUTS:
        if stem not in ("archive", "rejects"):
            notes += _finish(directory, stem, [])
    if checkpoint is not None or records:
        notes.append(f"resumed: {len(records)} messages after the checkpoint replayed "
                     f"({replayed} archive rows)")
    return Resumed(tracker, counters, notes)


def _finish(directory: Path, stem: str, uncommitted: list[Entry]) -> list[str]:
    """End every killed file of ``stem``, cutting the ``uncommitted`` batches."""
    first_cut: dict[Path, int] = {}
    for path, index, _ in uncommitted:
        first_cut.setdefault(path, index)
    notes = []
    for path in stream_files(directory, stem):
        report = finish_file(path, first_cut.get(path))
        if report is not None and report.action != "in_use":
            notes.append(f"{path.name}: {report.action} ({report.detail})")
    return notes


def _target(batch: pa.RecordBatch) -> str:
    """The target of an archive batch (one per batch)."""
    return batch.column("target")[0].as_py()


def _accumulate(pipeline: Pipeline, batch: pa.RecordBatch) -> int:
    """Fold one archive batch into the statistics; returns the rows replayed."""
    table = pa.Table.from_batches([batch])
    name = _target(batch)
    if name not in pipeline.targets:
        return 0
    col = {c: table.column(c).to_numpy() for c in
           ("site_tt_ns", "phase", "weight", "recipe_flags", "quality_flags",
            "barycentric_correction_s")}
    pipeline.accumulate(name, col["site_tt_ns"], col["phase"], col["weight"].astype(float),
                        col["recipe_flags"], col["quality_flags"],
                        col["barycentric_correction_s"])
    return batch.num_rows
