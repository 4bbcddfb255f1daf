"""``turnstamp bench --retag``: re-tagging a dataset on a local Dask cluster.

The dataset is ``n`` events of ``nights`` nights, two Parquet files per night in
hive folders (``night=K/part-J.parquet``), ``event_id`` + ``time_ns``. Barycentre
tables come from a cache warmed by a first run, as on a second pass over an
archive. Measured, each run into an empty output folder:

* the same fragments done one after another in this process by the very task
  functions the workers run (``retag.work``): the rate of one core without Dask;
* the whole run (planning, tasks, merging, statistics) on a local cluster of one
  worker process, then of two: events/s by the wall clock, and the scaling
  efficiency rate(2) / (2 · rate(1));
* Dask's cost per fragment: the one-worker run minus the in-process one, per
  fragment, and a run of many 1 000-event fragments (where that cost is all);
* the local cluster's start-up.

Only as fast as the machine is free: two workers on two shared cores compete with
whatever else runs (the load average is printed).
"""

from __future__ import annotations

import importlib
import os
import shutil
import tempfile
import time
from pathlib import Path

import numpy as np

__all__ = ["bench_retag", "retag_lines"]

_FIRST_NIGHT = "2026-12-01T20:00:00"


def _write_dataset(root: Path, n: int, nights: int) -> None:
    """``n`` events over ``nights`` nights, two Parquet files per night (8 h each)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from ..core.timebase import NS_PER_DAY, NS_PER_S, parse_instant

    rng = np.random.default_rng(17)
    per_file = n // (2 * nights)
    start = parse_instant(_FIRST_NIGHT)
    first = 0
    for night in range(nights):
        for part in range(2):
            begin = start + night * NS_PER_DAY + part * 4 * 3600 * NS_PER_S
            times = np.sort(rng.integers(begin, begin + 4 * 3600 * NS_PER_S, per_file))
            table = pa.table({"event_id": np.arange(first, first + per_file, dtype=np.uint64),
                              "time_ns": times})
            first += per_file
            path = root / f"night={night}" / f"part-{part}.parquet"
            path.parent.mkdir(parents=True, exist_ok=True)
            pq.write_table(table, path, row_group_size=1 << 20)


def _inputs(site: Path, cache: Path):
    from ..assemble import Environment
    from ..config import load_site
    from ..demo import data_file
    from ..files.inputs import load_spin_model
    from ..tagging.run import offline_target

    return (lambda: offline_target([load_spin_model(data_file("lantern.toml"))]),
            Environment.from_site(load_site(site)), cache)


def _prepared(dataset: Path, out: Path, inputs):
    from ..core.timebase import Scale
    from ..retag.run import prepare

    make_setup, env, cache = inputs
    shutil.rmtree(out, ignore_errors=True)
    return prepare(dataset, out, make_setup(), env, Scale.UTC, table_cache=cache)


def _in_process(dataset: Path, out: Path, inputs) -> float:
    """Seconds to do every fragment here, one after another, with the workers' tasks."""
    import dataclasses

    from ..retag.work import fragment_days, retag_fragment

    started = time.perf_counter()
    prepared = _prepared(dataset, out, inputs)
    job = dataclasses.replace(prepared.job, tables=None)
    for fragment in prepared.plan.todo:
        days = fragment_days(fragment, job)
        tables = [prepared.job.tables.day_table(day) for day in days]
        result = retag_fragment(fragment, job, prepared.metadata, prepared.fingerprint, *tables)
        assert not hasattr(result, "reason"), result
    return time.perf_counter() - started


def _cpu_seconds() -> float:
    """CPU seconds of this process so far, all its threads."""
    import resource

    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def _on_cluster(dataset: Path, out: Path, inputs, workers: int) -> dict:
    """Start-up s, run s, workers' CPU s, events tagged, of a run on a local cluster."""
    from ..retag.cluster import cluster_client
    from ..retag.run import execute

    started = time.perf_counter()
    with cluster_client(workers=workers, dashboard=False) as client:
        up = time.perf_counter() - started
        client.run(importlib.import_module, "turnstamp.retag.work")  # imported before timing
        before = sum(client.run(_cpu_seconds).values())
        started = time.perf_counter()
        summary = execute(_prepared(dataset, out, inputs), client)
        seconds = time.perf_counter() - started
        cpu = sum(client.run(_cpu_seconds).values()) - before
    assert not summary.failed, summary.failed
    return {"startup_s": up, "seconds": seconds, "cpu_s": cpu, "tagged": summary.totals.tagged}


def bench_retag(n: int = 10**7, nights: int = 10, small_fragments: int = 40) -> dict:
    """The figures of the module docstring, by name."""
    from ..demo import site_toml

    out: dict = {"retag_events": n, "retag_fragments": 2 * nights,
                 "load_average_at_start": os.getloadavg()[0]}
    with tempfile.TemporaryDirectory(prefix="turnstamp-bench-retag-") as tmp:
        folder = Path(tmp)
        site = folder / "site.toml"
        site.write_text(site_toml())
        inputs = _inputs(site, folder / "tables")
        dataset, small = folder / "events", folder / "small"
        _write_dataset(dataset, n, nights)
        _write_dataset(small, 1000 * small_fragments, small_fragments // 2)
        _in_process(small, folder / "out", inputs)  # warms the table cache
        cpu = _cpu_seconds()
        serial = _in_process(dataset, folder / "out", inputs)
        out["retag_in_process_events_per_s"] = n / serial
        out["retag_in_process_events_per_cpu_s"] = n / (_cpu_seconds() - cpu)
        for workers in (1, 2):
            run = _on_cluster(dataset, folder / "out", inputs, workers)
            assert run["tagged"] == n, run
            out[f"retag_{workers}_workers_events_per_s"] = n / run["seconds"]
            out[f"retag_{workers}_workers_seconds"] = run["seconds"]
            out[f"retag_{workers}_workers_events_per_cpu_s"] = n / run["cpu_s"]
            out[f"cluster_{workers}_workers_startup_s"] = run["startup_s"]
        out["retag_scaling_efficiency"] = (out["retag_2_workers_events_per_s"]
                                           / (2 * out["retag_1_workers_events_per_s"]))
        out["retag_overhead_per_fragment_s"] = (out["retag_1_workers_seconds"] - serial) \
            / (2 * nights)
        small_serial = _in_process(small, folder / "out", inputs)
        out["retag_small_fragment_s"] = _on_cluster(small, folder / "out", inputs, 1)[
            "seconds"] / small_fragments
        out["retag_small_fragment_in_process_s"] = small_serial / small_fragments
    out["load_average_at_end"] = os.getloadavg()[0]
    return out


def retag_lines(results: dict) -> list[str]:
    """The figures as text."""
    r = results
    return [
        f"re-tagging {r['retag_events']:,} events in {r['retag_fragments']} Parquet fragments "
        f"(load average {r['load_average_at_start']:.1f} at the start, "
        f"{r['load_average_at_end']:.1f} at the end)",
        f"  in this process, the workers' tasks one after another: "
        f"{r['retag_in_process_events_per_s']:,.0f} events/s "
        f"({r['retag_in_process_events_per_cpu_s']:,.0f} per CPU-second)",
        *(f"  {w} worker{'s' if w > 1 else ''}: {r[f'retag_{w}_workers_events_per_s']:,.0f} "
          f"events/s ({r[f'retag_{w}_workers_seconds']:.1f} s; "
          f"{r[f'retag_{w}_workers_events_per_cpu_s']:,.0f} per CPU-second of the workers; "
          f"cluster start-up {r[f'cluster_{w}_workers_startup_s']:.1f} s)" for w in (1, 2)),
        f"  scaling efficiency 1 -> 2 workers: {r['retag_scaling_efficiency']:.2f}",
        f"  Dask's cost per fragment: {r['retag_overhead_per_fragment_s'] * 1e3:.0f} ms "
        f"(1-worker run minus in-process, per fragment); a 1 000-event fragment takes "
        f"{r['retag_small_fragment_s'] * 1e3:.0f} ms on the cluster, "
        f"{r['retag_small_fragment_in_process_s'] * 1e3:.0f} ms in process",
    ]
