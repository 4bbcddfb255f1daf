"""The whole ``turnstamp tag`` command, file to file, as a user runs it.

Each run is a child process (``turnstamp tag`` through the program's entry point,
``commands.main.console``) timed by the wall clock from its start to its exit,
start-up included; its CPU time comes from the kernel's accounting of that child
(``os.wait4``, its helper process included) and its peak resident memory from its
own ``VmHWM`` as it exits (``ru_maxrss`` would count this process's peak, which a
child inherits when it is started by fork and exec) plus the memory its helper
process held alone at its end (``tagging.aside``, as ``tag --verbose`` logs it; the
pages the helper shares with the tagging process are in the tagging process's
figure already). Inputs are one night of ``event_id`` + ``time_ns`` in
Arrow IPC (batches of 2^20 rows) and Parquet (row groups of 2^20 rows), written
back to disk (``os.sync``) before the first timed run; barycentre tables come from
a cache warmed by a first small run, as on a user's second night. Each figure is
the median of ``RUNS`` runs (the slowest and fastest rates are reported beside it:
this machine's speed drifts by tens of percent within minutes). Start-up is the
fastest of three runs on a 1 000-event file. The children may write Python's
bytecode cache (an installed package has one), whatever ``PYTHONDONTWRITEBYTECODE``
says here.

When given a ``baseline`` (``kernel.astropy_probe``: the warm astropy route, timed
anew at each call), the route is timed before the first run of each format and after
every run, and each run's ratio to astropy is taken against the geometric mean of the
timings just before and just after it (``tag_{format}_ratio_to_astropy``: the median
run's). Both sides of a ratio then see the same minutes of this machine, whose speed
drifts by tens of percent within minutes.

``tag`` tags on one thread; reading the next batch and writing the last one run on
two helper threads that spend their time in pyarrow and the file system (with the
interpreter lock released), and the statistics are added up in a helper process.
Each format's runs are repeated held to one CPU (``tag_{format}_one_cpu_events_per_s``;
no helper process then) to show what that overlap is worth.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

__all__ = ["RUNS", "bench_tag_command"]

RUNS = 3

_ROWS_PER_BATCH = 1 << 20
_ENV = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}
_CHILD = ("import atexit, sys\n"
          "def peak():\n"
          "    with open('/proc/self/status') as own:\n"
          "        sys.stderr.write(''.join(l for l in own if l.startswith('VmHWM')))\n"
          "atexit.register(peak)\n"
          "from turnstamp.commands.main import console\n"
          "console(sys.argv[1:])\n")
_NIGHT_UTC = "2026-12-02T00:00:00"
_HELPER = "statistics helper process: "  # then its own memory in MB (logged by tag_into)


def _write_events(folder: Path, n: int) -> dict[str, Path]:
    """One night of ``n`` events (10 hours, sorted) as Arrow IPC and as Parquet."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    from ..core.timebase import NS_PER_S, parse_instant

    start = parse_instant(_NIGHT_UTC)
    times = np.sort(np.random.default_rng(11).integers(start, start + 10 * 3600 * NS_PER_S, n))
    table = pa.table({"event_id": np.arange(n, dtype=np.uint64), "time_ns": times})
    paths = {"arrow": folder / f"events-{n}.arrow", "parquet": folder / f"events-{n}.parquet"}
    with pa.OSFile(str(paths["arrow"]), "wb") as sink, \
            pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table, max_chunksize=_ROWS_PER_BATCH)
    pq.write_table(table, paths["parquet"], row_group_size=_ROWS_PER_BATCH)
    return paths


def _one_cpu() -> None:
    """In the child before it runs: keep to one CPU."""
    os.sched_setaffinity(0, {min(os.sched_getaffinity(0))})


def _run_tag(events: Path, out: Path, site: Path, cache: Path, one_cpu: bool = False) -> dict:
    """One ``tag`` child: wall seconds, CPU seconds, peak RSS (MB) and its summary."""
    from ..demo import data_file

    command = [sys.executable, "-c", _CHILD, "--verbose", "tag", str(events), "--model",
               data_file("lantern.toml"), "--site", str(site), "--out", str(out),
               "--table-cache", str(cache), "--json", "--force"]
    with tempfile.TemporaryFile() as errors:
        started = time.perf_counter()
        child = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=errors, env=_ENV,
                                 preexec_fn=_one_cpu if one_cpu else None)
        stdout = child.stdout.read()  # the JSON summary, printed at the end
        _, status, usage = os.wait4(child.pid, 0)  # reaps the child: its own rusage
        seconds = time.perf_counter() - started
        child.returncode = os.waitstatus_to_exitcode(status)
        child.stdout.close()
        errors.seek(0)
        said = errors.read().decode()
        if child.returncode != 0:
            raise RuntimeError(f"tag failed ({child.returncode}): {said}")
    peak = [line.split()[1] for line in said.splitlines() if line.startswith("VmHWM")]
    helper = [float(line.split(_HELPER)[1].split()[0]) for line in said.splitlines()
              if _HELPER in line]
    return {"seconds": seconds, "cpu_s": usage.ru_utime + usage.ru_stime,
            "rss_mb": int(peak[-1]) / 1024 + sum(helper), "summary": json.loads(stdout)}


def _timed_runs(events: Path, out: Path, site: Path, cache: Path, n: int,
                one_cpu: bool = False, baseline: Callable | None = None) -> list[dict]:
    """``RUNS`` runs of ``tag`` on ``events``, fastest first (each output removed: room
    on disk for the next); every run must tag all ``n`` events. With ``baseline``,
    each run also holds the astropy route's events/s timed just before and just after
    it (``astropy``: their geometric mean)."""
    runs = []
    before = baseline()[0] if baseline else None
    for _ in range(RUNS):
        runs.append(_run_tag(events, out, site, cache, one_cpu))
        out.unlink()
        assert runs[-1]["summary"]["tagged"] == n, runs[-1]["summary"]
        if baseline:
            after = baseline()[0]
            runs[-1]["astropy"] = (before * after) ** 0.5
            before = after
    return sorted(runs, key=lambda run: run["seconds"])


def bench_tag_command(n: int = 10**7, baseline: Callable | None = None) -> dict:
    """Figures of the ``tag`` command on ``n`` events in both formats (see the module
    docstring): events/s by the wall clock (median of ``RUNS``), peak RSS beyond the
    input's size (the largest of the runs) and, with ``baseline``, the ratio to the
    astropy route timed beside the runs (the median run's)."""
    from ..demo import site_toml

    out: dict = {"tag_events": n}
    with tempfile.TemporaryDirectory(prefix="turnstamp-bench-tag-") as tmp:
        folder = Path(tmp)
        site = folder / "site.toml"
        site.write_text(site_toml())
        cache = folder / "tables"
        small = _write_events(folder, 1000)["arrow"]
        first = _run_tag(small, folder / "small.arrow", site, cache)  # builds the tables
        warm = min((_run_tag(small, folder / "small.arrow", site, cache) for _ in range(3)),
                   key=lambda run: run["seconds"])
        out["tag_first_run_s"] = first["seconds"]
        out["tag_startup_s"] = warm["seconds"]
        inputs = _write_events(folder, n)
        os.sync()  # the inputs' write-back, not in the first timed run
        for kind, events in inputs.items():
            size_mb = events.stat().st_size / 2**20
            runs = _timed_runs(events, folder / f"tagged-{kind}.arrow", site, cache, n,
                               baseline=baseline)
            run = runs[len(runs) // 2]
            if baseline:
                ratios = sorted(n / r["seconds"] / r["astropy"] for r in runs)
                out[f"tag_{kind}_astropy_events_per_s"] = run["astropy"]
                out[f"tag_{kind}_ratio_to_astropy"] = ratios[len(ratios) // 2]
            out[f"tag_{kind}_events_per_s"] = n / run["seconds"]
            out[f"tag_{kind}_events_per_s_lowest"] = n / runs[-1]["seconds"]
            out[f"tag_{kind}_events_per_s_highest"] = n / runs[0]["seconds"]
            out[f"tag_{kind}_seconds"] = run["seconds"]
            out[f"tag_{kind}_cpu_s"] = run["cpu_s"]
            out[f"tag_{kind}_input_mb"] = size_mb
            out[f"tag_{kind}_rss_mb"] = max(r["rss_mb"] for r in runs)
            out[f"tag_{kind}_rss_over_input_mb"] = out[f"tag_{kind}_rss_mb"] - size_mb
            if hasattr(os, "sched_setaffinity"):
                # the same, held to one CPU: no overlap of reading and writing with tagging
                runs = _timed_runs(events, folder / "one-cpu.arrow", site, cache, n,
                                   one_cpu=True)
                out[f"tag_{kind}_one_cpu_events_per_s"] = n / runs[len(runs) // 2]["seconds"]
            events.unlink()
    out["tag_events_per_s"] = min(out["tag_arrow_events_per_s"], out["tag_parquet_events_per_s"])
    if baseline:
        out["tag_ratio_to_astropy"] = min(out["tag_arrow_ratio_to_astropy"],
                                          out["tag_parquet_ratio_to_astropy"])
    return out
