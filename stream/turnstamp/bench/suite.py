"""``turnstamp bench``: every benchmark section, its target and whether it was met.

Sections: ``kernel`` (tagging and moments, always), ``tag`` (the whole ``tag``
command file to file, in a child process, on Arrow IPC and Parquet, its ratio to the
astropy route timed beside each run; on by default)
and ``service`` (ZeroMQ into Arrow files end to end, with ``service=True``;
``soak_s`` watches resident memory).
"""

from __future__ import annotations

import numpy as np

__all__ = ["TARGETS", "LOWER_IS_BETTER", "run_benchmarks", "summary_lines"]

TARGETS = {
    "tagging_events_per_s": 8e6,
    "tagging_ratio_to_astropy": 500.0,
    "tagging_bytes_per_event": 100.0,
    "moments_events_per_s": 10e6,
    "tag_arrow_events_per_s": 3e6,
    "tag_parquet_events_per_s": 3e6,
    "tag_arrow_one_cpu_events_per_s": 3e6,
    "tag_parquet_one_cpu_events_per_s": 3e6,
    "tag_arrow_rss_over_input_mb": 300.0,
    "tag_parquet_rss_over_input_mb": 300.0,
    "tag_ratio_to_astropy": 600.0,
    "tag_startup_s": 1.0,
    "service_events_per_s": 2e6,
    "service_update_latency_p99_s": 1.5,
    "service_events_lost": 0,
    "soak_rss_spread": 0.10,
}
LOWER_IS_BETTER = ("tagging_bytes_per_event", "tag_arrow_rss_over_input_mb",
                   "tag_parquet_rss_over_input_mb", "tag_startup_s",
                   "service_update_latency_p99_s", "service_events_lost", "soak_rss_spread")


def run_benchmarks(quick: bool = False, service: bool = False, soak_s: float = 0.0,
                   tag: bool = True, tag_events: int | None = None) -> dict:
    """Run the sections; results by figure name, with ``machine`` and ``targets``.

    Parameters
    ----------
    quick : bool
        Smaller sizes (1e5 and 1e6 events instead of 1e6 and 1e7; ``tag`` on 1e6).
    service : bool
        Also ZeroMQ into Arrow files end to end (a service process on loopback).
    soak_s : float
        Seconds of resident-memory soak at 1e5 events/s (0: none; implies ``service``).
    tag : bool
        The whole ``tag`` command, file to file (needs about 1.3 GB of free disk for
        1e7 events, in the temporary folder).
    tag_events : int, optional
        Events in the ``tag`` section's files (default 1e7, 1e6 when ``quick``).
    """
    from .kernel import astropy_probe, bench_moments, bench_tagging

    sizes = (10**5, 10**6) if quick else (10**6, 10**7)
    results = {"machine": _machine()}
    results.update(bench_tagging(sizes=sizes))
    results.update(bench_moments(n=sizes[-1], baseline_n=min(sizes[0], 10**6)))
    if tag:
        from .tagcommand import bench_tag_command

        results.update(bench_tag_command(tag_events or sizes[-1], baseline=astropy_probe()))
        results["tag_ratio_to_kernel"] = (results["tag_events_per_s"]
                                          / results["tagging_events_per_s"])
        # against the route timed once, in the kernel section, minutes earlier
        results["tag_ratio_to_astropy_timed_apart"] = (
            results["tag_events_per_s"] / results["astropy_direct_events_per_s"])
    if service or soak_s:
        from .service import bench_service

        results.update(bench_service(quick=quick, soak_s=soak_s))
    results["targets"] = {k: {"target": v, "met": _met(k, results.get(k))}
                          for k, v in TARGETS.items() if k in results}
    return results


def _met(name, value):
    if value is None:
        return None
    return bool(value <= TARGETS[name]) if name in LOWER_IS_BETTER else \
        bool(value >= TARGETS[name])


def _machine() -> dict:
    import os
    import platform

    return {"python": platform.python_version(), "numpy": np.__version__,
            "cpus": os.cpu_count(), "load_average": os.getloadavg()[0]}


def _shown(value) -> str:
    if isinstance(value, float):
        return f"{value:,.0f}" if value > 100 else f"{value:.3g}"
    return str(value)


def summary_lines(results: dict) -> list[str]:
    """The results of ``run_benchmarks`` as text: every figure, then each target."""
    lines = [f"machine: {results['machine']}"]
    lines += [f"  {key:45s} {_shown(value)}" for key, value in results.items()
              if key not in ("machine", "targets")]
    lines.append("targets:")
    for key, info in results["targets"].items():
        mark = "met" if info["met"] else "NOT met"
        lines.append(f"  {key:45s} {_shown(float(results[key]))} vs "
                     f"{_shown(float(info['target']))}: {mark}")
    return lines
