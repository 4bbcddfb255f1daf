"""``turnstamp bench --night-hours H``: the service's throughput late in a long night.

The cost of the periodic work (statistics updates, the checkpoint, the status)
may grow with the statistics retained; a short soak cannot show it. The service
runs in this process without sockets (``Service.handle`` and its periodic work,
as its loop calls them) at the default statistics settings and cadences: once on
an empty night, once after H hours of events were folded into the statistics
(``Pipeline.accumulate``, as a replay does). Both feed the same messages at full
rate; the figure is the ratio of the two rates (target: within 10 %).
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import numpy as np

from ..core.timebase import NS_PER_S, parse_instant
from ..wire.encode import encode_message
from .service import bench_config

__all__ = ["bench_night", "night_lines"]

BATCH = 10_000
LATE_UTC = "2026-12-02T11:30:00"  # the measured messages: late in the night


def _prefill(service, hours: float, rate_hz: float = 100.0) -> int:
    """Fold ``hours`` of events before the measured ones into the statistics."""
    pipeline = service.pipeline
    end = pipeline_tt(LATE_UTC) - 60 * NS_PER_S
    count = int(hours * 3600 * rate_hz)
    rng = np.random.default_rng(11)
    name = next(iter(pipeline.targets))
    for first in range(0, count, 10**6):
        n = min(10**6, count - first)
        tt = np.sort(end - rng.integers(0, int(hours * 3600 * NS_PER_S), n))
        pipeline.accumulate(name, tt, rng.random(n), rng.random(n), np.full(n, 3, np.uint32),
                            np.zeros(n, np.uint32), np.full(n, 400.0))
    return count


def pipeline_tt(utc: str) -> int:
    """A UTC label as ns TT, near enough for placing events (69.184 s in 2026)."""
    return parse_instant(utc) + 69_184_000_000


def _messages(sequence: int, rng) -> list[bytes]:
    start = parse_instant(LATE_UTC) + sequence * BATCH * 1000  # 1e6 events/s of night
    return encode_message("night", sequence, "UTC", {
        "event_id": np.arange(sequence * BATCH, (sequence + 1) * BATCH, dtype=np.uint64),
        "time_ns": np.sort(start + rng.integers(0, BATCH * 1000, BATCH)),
        "energy_kev": rng.uniform(1e8, 1e10, BATCH),
        "weight": rng.random(BATCH)})


def _run(hours: float, seconds: float) -> dict:
    from ..config import load_config
    from ..service.checkpoint import checkpoint_state, encode_checkpoint
    from ..service.loop import Service

    with tempfile.TemporaryDirectory(prefix="turnstamp-night-") as tmp:
        service = Service(load_config(bench_config(Path(tmp), "night",
                                                   cover_from="2026-12-01T23:00:00")))
        prefilled = _prefill(service, hours) if hours else 0
        rng = np.random.default_rng(5)
        # one round of the periodic work first: in a real night the clock check's
        # chunks were fitted as the night went, not all at once now
        service.handle(_messages(0, rng), time.time())
        service._periodic(time.time())
        events, busy, sequence = 0, 0.0, 1
        periodic = []
        deadline = time.perf_counter() + seconds
        while time.perf_counter() < deadline:
            frames = _messages(sequence, rng)  # encoding is the sender's work: not timed
            began = time.perf_counter()
            service.handle(frames, time.time())
            middle = time.perf_counter()
            service._periodic(time.time())
            ended = time.perf_counter()
            busy += ended - began
            periodic.append(ended - middle)
            events += BATCH
            sequence += 1
        snapshot_began = time.perf_counter()
        state = checkpoint_state(service.pipeline, service.admission.tracker,
                                 service.counters, service.writers)
        snapshot_s = time.perf_counter() - snapshot_began
        size = len(encode_checkpoint(state))
        write_s = service.checkpointer.last_seconds
        service._finish()
    return {"events_per_s": events / busy, "prefilled_events": prefilled,
            "checkpoint_bytes": size, "checkpoint_snapshot_s": snapshot_s,
            "checkpoint_write_s": write_s,
            "periodic_max_s": max(periodic) if periodic else 0.0}


def bench_night(hours: float = 9.0, quick: bool = False) -> dict:
    """Throughput on an empty night and after ``hours`` of retained statistics."""
    seconds = 10.0 if quick else 30.0
    _run(0.0, 2.0)  # warm: imports, tables, first allocations
    empty = _run(0.0, seconds)
    full = _run(hours, seconds)
    return {"night_hours": hours, "night_empty": empty, "night_full": full,
            "night_ratio": full["events_per_s"] / empty["events_per_s"]}


def night_lines(result: dict) -> list[str]:
    """The benchmark's figures as text."""
    empty, full = result["night_empty"], result["night_full"]
    return [
        f"night of {result['night_hours']} h retained: {full['events_per_s']:.3g} events/s "
        f"against {empty['events_per_s']:.3g} on an empty night (ratio "
        f"{result['night_ratio']:.2f}; target >= 0.90)",
        f"  checkpoint {full['checkpoint_bytes'] / 2**20:.1f} MB (empty "
        f"{empty['checkpoint_bytes'] / 2**10:.0f} kB): snapshot {full['checkpoint_snapshot_s']:.3f}"
        f" s in the loop, written in {full['checkpoint_write_s']:.3f} s on its own thread; "
        f"longest periodic step {full['periodic_max_s']:.3f} s (empty "
        f"{empty['periodic_max_s']:.3f} s)",
    ]
