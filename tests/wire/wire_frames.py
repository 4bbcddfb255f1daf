"""Frames, headers, bodies and columns shared by the wire format tests."""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pytest

from turnstamp.errors import RejectReason, WireError
from turnstamp.wire.decode import decode_message

LIMITS = {"max_message_bytes": 1 << 20, "max_events": 10_000}
FLOAT_COLUMNS = ("energy_kev", "ra_deg", "dec_deg", "score", "weight")


def decode(frames, has_topic=False, **limits):
    return decode_message(frames, has_topic=has_topic, **{**LIMITS, **limits})


def header(**changes) -> dict:
    fields = {"format": "turnstamp.events", "version": 1, "source": "builder-7",
              "sequence": 12, "time_scale": "TAI", "events": 3}
    fields.update(changes)
    return {k: v for k, v in fields.items() if v is not DROP}


DROP = object()
"""Give a header key this value to leave the key out."""


def header_frame(**changes) -> bytes:
    return json.dumps(header(**changes)).encode()


def body_frame(columns: dict | None = None, batches: int = 1, compression=None) -> bytes:
    """An IPC stream of the given Arrow arrays (default: three valid events)."""
    if columns is None:
        columns = {"event_id": pa.array([1, 2, 3], pa.uint64()),
                   "time_ns": pa.array([10, 20, 30], pa.int64())}
    batch = pa.record_batch(columns)
    sink = pa.BufferOutputStream()
    options = pa.ipc.IpcWriteOptions(compression=compression)
    with pa.ipc.new_stream(sink, batch.schema, options=options) as writer:
        for _ in range(batches):
            writer.write_batch(batch)
    return sink.getvalue().to_pybytes()


def refusal(frames, reason: RejectReason, has_topic=False, **limits) -> WireError:
    with pytest.raises(WireError) as info:
        decode(frames, has_topic=has_topic, **limits)
    error = info.value
    assert error.reason is reason, error
    assert error.detail
    return error


def full_columns(n: int, rng) -> dict[str, np.ndarray]:
    return {
        "event_id": rng.permutation(n).astype(np.uint64) + np.uint64(2**63),
        "time_ns": rng.integers(-(2**62), 2**62, n),
        "energy_kev": rng.uniform(0, 1e3, n),
        "ra_deg": rng.uniform(0, 360, n),
        "dec_deg": rng.uniform(-90, 90, n),
        "score": rng.normal(size=n),
        "weight": rng.uniform(0, 1, n),
        "telescope_mask": rng.integers(0, 2**63, n).astype(np.uint64) | np.uint64(2**63),
    }
