"""Realistic columns for every output schema, a fake clock, and a small three-batch file,
shared by the Arrow file tests."""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pyarrow as pa

from turnstamp.files.schemas import OUTPUTS
from turnstamp.files.writer import RotatingArrowWriter

PROVENANCE = {
    "turnstamp.config": json.dumps({"targets": ["target-alpha"], "rotate_seconds": 3600}),
    "turnstamp.model_ids": "spin-model-7,spin-model-8",
    "turnstamp.tables": "earth-orientation 2026-11-28; leap seconds 2026-07-01",
    "turnstamp.software_version": "0.1.0",
}


# Small vocabularies for the dictionary-encoded columns; each batch uses a rotated
# subset so that consecutive batches carry different dictionaries.
VOCABULARY = {
    "source": ["builder-north", "builder-south", "builder-east"],
    "target": ["target-alpha", "target-beta"],
    "model_id": ["spin-model-7", "spin-model-8"],
    "recipe": ["all", "hard-cut", "soft-cut"],
    "window": ["cumulative", "5min", "30min"],
    "status": ["OK", "WARN", "FAIL"],
    "kind": ["none", "offset", "drift", "step"],
    "reason": ["bad_time", "duplicate_event_id", "sequence_gap"],
}


T0 = dt.datetime(2026, 12, 1, 20, 0, tzinfo=dt.UTC).timestamp()


class FakeClock:
    def __init__(self, now: float = T0):
        self.now = now

    def __call__(self) -> float:
        return self.now


def _values(field: pa.Field, rows: int, batch: int, rng) -> list:
    """Realistic Python values for one column (exactly representable in the type)."""
    kind = field.type
    start = batch * rows
    if pa.types.is_dictionary(kind):
        words = VOCABULARY.get(field.name, ["alpha", "beta", "gamma"])
        words = words[batch % len(words):] + words[:batch % len(words)]
        words = words[: 1 + (batch % len(words))]
        values = [words[i % len(words)] for i in range(rows)]
    elif pa.types.is_list(kind):
        value_type = kind.value_type
        lengths = rng.integers(0, 6, rows)
        if pa.types.is_boolean(value_type):
            values = [[bool(j % 2) for j in range(n)] for n in lengths]
        elif pa.types.is_integer(value_type):
            values = [[int(start + i) * 1_000_000_000 + j for j in range(n)]
                      for i, n in enumerate(lengths)]
        else:
            values = [list(rng.normal(size=n)) for n in lengths]
    elif pa.types.is_boolean(kind):
        values = [bool((start + i) % 2) for i in range(rows)]
    elif pa.types.is_string(kind):
        values = [f"row {start + i}: offset 0.0{i % 10} cycles" for i in range(rows)]
    elif pa.types.is_float32(kind):
        values = [float(k) / 4 for k in rng.integers(0, 8, rows)]  # exact in float32
    elif pa.types.is_floating(kind):
        values = list(rng.normal(size=rows))
    elif pa.types.is_unsigned_integer(kind) or kind == pa.int32():
        values = [start + i for i in range(rows)]
    else:
        values = [828_000_000_000_000_000 + (start + i) * 1_000 for i in range(rows)]
    if field.nullable:
        values = [None if i % 3 == 1 else v for i, v in enumerate(values)]
    return values


def realistic_columns(schema: pa.Schema, rows: int, batch: int, rng) -> dict[str, list]:
    return {field.name: _values(field, rows, batch, rng) for field in schema}


def archive_columns(first_id: int, rows: int, batch: int = 0) -> dict:
    """Archive rows whose event ids count up from ``first_id`` (numpy and list input)."""
    ids = np.arange(first_id, first_id + rows, dtype=np.uint64)
    source = VOCABULARY["source"][batch % 3:] + VOCABULARY["source"][:batch % 3]
    return {
        "event_id": ids,
        "source": [source[i % 3] for i in range(rows)],
        "sequence": np.full(rows, batch, dtype=np.uint64),
        "target": ["target-alpha" if i % 2 else "target-beta" for i in range(rows)],
        "site_tt_ns": 828_000_000_000_000_000 + ids.astype(np.int64) * 1_000,
        "barycentric_tdb_ns": 828_000_000_400_000_000 + ids.astype(np.int64) * 1_000,
        "barycentric_correction_s": np.full(rows, 0.4000001),
        "phase": (ids % 100) / 100.0,
        "pulse_number": ids.astype(np.int64) * 3,
        "weight": np.ones(rows),
        "recipe_flags": np.full(rows, 3),
        "model_id": ["spin-model-7"] * rows,
        "quality_flags": np.zeros(rows, dtype=np.uint32),
    }


def same_rows(left: pa.Table, right: pa.Table) -> bool:
    """Equal values, whatever the chunking and the per-batch dictionaries."""
    return left.schema.equals(right.schema) and left.to_pydict() == right.to_pydict()


def three_batch_file(tmp_path):
    """A small closed archive file; returns (path, sizes after batch 1, 2, 3, full size
    (the end-of-stream marker after batch 3), rows)."""
    sizes = []
    writer = RotatingArrowWriter(tmp_path / "src", "archive", OUTPUTS["archive"])
    parts = [archive_columns(i * 4, 4, i) for i in range(3)]
    for part in parts:
        writer.write(part)
        sizes.append(writer.current_file.stat().st_size)  # flushed after every batch
    path = writer.current_file
    writer.close()
    ids = [int(x) for part in parts for x in part["event_id"]]
    return path, sizes, path.stat().st_size, ids
