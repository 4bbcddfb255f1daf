"""Pipeline results as Arrow tables in the schemas of ``files.schemas``.

Numeric columns are wrapped without copies; repeated strings (source, target,
model, reason) are dictionary-encoded from their indices.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence

import numpy as np
import pyarrow as pa

from ..core.accounting import FeedResult
from ..core.batch import EventBatch
from ..core.targets import TargetSetup
from . import schemas
from .columns import dictionary, numeric, strings

__all__ = ["archive_table", "archive_tables", "rejects_table", "message_reject_table",
           "ledger_table", "rows_table", "clock_table"]


_ZEROS = np.zeros(0, np.int32)
_DICTIONARIES: dict[str, pa.Array] = {}


def _constant(value: str, n: int) -> pa.DictionaryArray:
    """A column repeating one string (indices are slices of one zero array)."""
    global _ZEROS
    if n > len(_ZEROS):
        _ZEROS = np.zeros(max(n, 1 << 16), np.int32)
    dictionary = _DICTIONARIES.get(value)
    if dictionary is None:
        if len(_DICTIONARIES) > 1024:
            _DICTIONARIES.clear()
        dictionary = _DICTIONARIES[value] = strings([value])
    return pa.DictionaryArray.from_arrays(numeric(_ZEROS[:n]), dictionary)


def archive_table(columns: dict, source: str | pa.Array, sequence: int | np.ndarray,
                  target: str, model_ids: list[str]) -> pa.Table:
    """Archive rows of one target from ``FeedResult.archive[target]``; ``source`` and
    ``sequence`` are the message's, or a column of each row's (``archive_tables``)."""
    n = len(columns["event_id"])
    made = {"source": _constant(source, n) if isinstance(source, str) else source,
            "sequence": numeric(np.broadcast_to(np.uint64(sequence), n)),
            "target": _constant(target, n),
            "model_id": dictionary(columns["model_index"], model_ids)}
    return pa.Table.from_arrays([made[name] if name in made else numeric(columns[name])
                                 for name in schemas.ARCHIVE.names], schema=schemas.ARCHIVE)


def archive_tables(batches: Sequence[EventBatch], parts: Sequence[FeedResult],
                   targets: Mapping[str, TargetSetup],
                   joined: FeedResult | None = None) -> list[pa.Table]:
    """Archive rows of every target that tagged events of ``batches`` (one table
    each), from the ``joined`` result when they were fed as one
    (``Pipeline.feed_joined``; by default the result of the one batch): each row
    carries its own message's source and sequence."""
    joined = parts[0] if joined is None else joined
    tables = []
    for name, columns in joined.archive.items():
        source, sequence = batches[0].source, batches[0].sequence
        if len(batches) > 1:
            counts = [len(p.archive[name]["event_id"]) if name in p.archive else 0
                      for p in parts]
            sources = [batch.source for batch in batches]
            words = sorted(set(sources))
            source = source if len(words) == 1 else dictionary(
                np.repeat(np.array([words.index(s) for s in sources], np.int32), counts), words)
            sequence = np.repeat(np.array([batch.sequence for batch in batches], np.uint64),
                                 counts)
        tables.append(archive_table(columns, source, sequence, name,
                                    targets[name].tagger.model_ids))
    return tables


def rejects_table(batch: EventBatch, result: FeedResult, received_utc_ns: int,
                  message_bytes: int) -> pa.Table:
    """One rejects row per refused event of a batch."""
    rows = result.rejected_index
    n = rows.size
    reasons = pa.array(result.rejected_reason).dictionary_encode()
    return pa.Table.from_pydict({
        "received_utc_ns": np.full(n, received_utc_ns, np.int64),
        "source": pa.array([batch.source] * n, pa.string()),
        "sequence": pa.array(np.full(n, batch.sequence, np.uint64)),
        "event_id": batch.event_id[rows],
        "time_ns": batch.time_ns[rows],
        "reason": reasons,
        "detail": pa.array(result.rejected_detail, pa.string()),
        "events": np.ones(n, np.int64),
        "message_bytes": np.full(n, message_bytes, np.int64),
    }, schema=schemas.REJECTS)


def message_reject_table(received_utc_ns: int, source: str | None, sequence: int | None,
                         reason: str, detail: str, events: int, message_bytes: int) -> pa.Table:
    """A rejects row for a whole refused message (or a sequence gap, with events 0)."""
    return pa.Table.from_pydict({
        "received_utc_ns": [received_utc_ns], "source": [source], "sequence": [sequence],
        "event_id": pa.nulls(1, pa.uint64()), "time_ns": pa.nulls(1, pa.int64()),
        "reason": pa.array([reason]).dictionary_encode(), "detail": [detail],
        "events": [events], "message_bytes": [message_bytes],
    }, schema=schemas.REJECTS)


def ledger_table(rows: list[dict]) -> pa.Table:
    """Ledger rows (one per message) in one call: this runs for every message."""
    return pa.Table.from_batches([pa.RecordBatch.from_pylist(rows, schema=schemas.LEDGER)])


def rows_table(rows: list[dict], schema: pa.Schema, **constant) -> pa.Table:
    """Rows (dicts) as a table of ``schema``; ``constant`` columns are added to each."""
    columns = {}
    for field in schema:
        values = [constant[field.name] if field.name in constant else row.get(field.name)
                  for row in rows]
        kind = field.type.value_type if pa.types.is_dictionary(field.type) else field.type
        array = pa.array(values, kind)
        columns[field.name] = array.dictionary_encode() if pa.types.is_dictionary(field.type) \
            else array
    return pa.Table.from_pydict(columns, schema=schema)


def clock_table(results, computed_at_utc_ns: int) -> pa.Table:
    """One row per (target, recipe, verdict, chunks) from ``Pipeline.clock_check()``."""
    rows = []
    for target, recipe, verdict, chunks in results:
        rows.append({
            "target": target, "recipe": recipe, "status": verdict.status,
            "kind": verdict.kind, "summary": "\n".join(verdict.lines),
            "tolerance_cycles": verdict.tolerance_cycles,
            "verdict_json": json.dumps(verdict.to_dict()),
            "chunk_start_tt_ns": [c.start_ns for c in chunks],
            "chunk_end_tt_ns": [c.end_ns for c in chunks],
            "chunk_shift_cycles": [c.shift_cycles for c in chunks],
            "chunk_sigma_cycles": [c.sigma_cycles for c in chunks],
            "chunk_detected": [bool(c.detected) for c in chunks],
            "chunk_arrival_tdb_ns": [c.arrival_tdb_ns for c in chunks],
            "chunk_arrival_sigma_us": [c.arrival_sigma_us for c in chunks],
        })
    return rows_table(rows, schemas.CLOCK, computed_at_utc_ns=computed_at_utc_ns)
