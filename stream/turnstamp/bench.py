"""``turnstamp bench``: throughput and memory of the hot paths, with baselines measured
in the same run (machines are shared and noisy: ratios matter, not absolute rates).

Sections
--------
tagging     barycentre + phase for 1e6 and 1e7 events of one night (one core),
            against the direct route through astropy for the same events, and peak
            memory beyond the input.
moments     trigonometric moments for 20 harmonics, against 40 separate sin/cos calls.
service     (``--service``) events through ZeroMQ into Arrow files: sustained rate,
            loss, update latency; ``--soak SECONDS`` watches resident memory.
"""

from __future__ import annotations

import gc
import json
import time
import tracemalloc
from importlib import resources

import numpy as np

__all__ = ["run_benchmarks", "main"]

TARGETS = {
    "tagging_events_per_s": 5e6,
    "tagging_ratio_to_astropy": 500.0,
    "tagging_bytes_per_event": 100.0,
    "moments_events_per_s": 8e6,
    "service_events_per_s": 1e6,
    "service_update_latency_p99_s": 2.0,
    "service_events_lost": 0,
    "soak_rss_spread": 0.10,
}
LOWER_IS_BETTER = ("tagging_bytes_per_event", "service_update_latency_p99_s",
                   "service_events_lost", "soak_rss_spread")


def _best_of(repeats, function):
    best = np.inf
    for _ in range(repeats):
        gc.collect()
        start = time.perf_counter()
        function()
        best = min(best, time.perf_counter() - start)
    return best


def _night():
    """The demo site and pulsar, and a barycentre table for one night."""
    from .assemble import Environment, TableCache, build_target
    from .config import BarycentreConfig, TargetConfig
    from .core.timebase import NS_PER_S, Scale, parse_instant, to_tt
    from .demo import DEMO_SITE

    env = Environment.from_site(DEMO_SITE)
    data = resources.files("turnstamp") / "data"
    target = build_target(TargetConfig(name="lantern", models=[str(data / "lantern.toml")]))
    start = int(to_tt(np.array([parse_instant("2026-12-02T00:00:00")]), Scale.UTC,
                      env.leaps)[0][0])
    target.tagger.table = TableCache(None, env, BarycentreConfig()).table(
        target.position, start, start + 12 * 3600 * NS_PER_S)
    return env, target, start


def bench_tagging(sizes=(10**6, 10**7), astropy_events=2000, repeats=3) -> dict:
    from astropy.coordinates import EarthLocation, SkyCoord
    from astropy.time import Time

    from .core.timebase import NS_PER_DAY, NS_PER_S
    from .files.bundled import default_kernel_path

    env, target, start = _night()
    tagger = target.tagger
    rng = np.random.default_rng(1)
    out: dict = {}
    for n in sizes:
        tt = np.sort(rng.integers(start, start + 10 * 3600 * NS_PER_S, n))
        seconds = _best_of(repeats, lambda tt=tt: tagger.tag(tt))
        out[f"tagging_{n:.0e}_events_per_s"] = n / seconds
        del tt
    # memory beyond the input, for the largest size
    n = max(sizes)
    tt = np.sort(rng.integers(start, start + 10 * 3600 * NS_PER_S, n))
    gc.collect()
    tracemalloc.start()
    result = tagger.tag(tt)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    del result
    out["tagging_bytes_per_event"] = peak / n
    # the direct route through astropy, vectorised, for a sample of the same night
    sample = np.sort(rng.integers(start, start + 10 * 3600 * NS_PER_S, astropy_events))
    site = env.observer
    location = EarthLocation.from_geodetic(site.longitude_deg, site.latitude_deg, site.height_m)
    position = target.position
    sky = SkyCoord(position.right_ascension_deg, position.declination_deg, unit="deg")
    kernel = str(default_kernel_path())
    calculator = tagger.calculators[0]

    days, rest = np.divmod(sample, NS_PER_DAY)

    def astropy_route():  # vectorised, from two-part Julian dates (no text parsing)
        t = Time(2_451_545.0 + days, rest / NS_PER_DAY, format="jd", scale="tt",
                 location=location)
        tdb = t.tdb + t.light_travel_time(sky, ephemeris=kernel)
        seconds = (tdb.jd1 - 2_451_545.0) * 86_400 + tdb.jd2 * 86_400
        whole = np.floor(seconds)
        calculator.phase((whole * NS_PER_S).astype(np.int64), seconds - whole)

    seconds = _best_of(1, astropy_route)
    out["astropy_direct_events_per_s"] = astropy_events / seconds
    slowest = min(v for k, v in out.items() if k.startswith("tagging_") and k.endswith("per_s"))
    out["tagging_events_per_s"] = slowest
    out["tagging_ratio_to_astropy"] = slowest / out["astropy_direct_events_per_s"]
    return out


def bench_moments(n=10**7, baseline_n=10**6, repeats=3) -> dict:
    from .core.moments import PhaseMoments

    rng = np.random.default_rng(2)
    phases = rng.random(n)
    weights = rng.random(n)
    seconds = _best_of(repeats, lambda: PhaseMoments().update(phases, weights))
    sample, sample_w = phases[:baseline_n], weights[:baseline_n]

    def direct():
        angle = 2 * np.pi * sample
        for k in range(1, 21):
            np.dot(np.cos(k * angle), sample_w)
            np.dot(np.sin(k * angle), sample_w)

    baseline = _best_of(1, direct)
    rate = n / seconds
    return {"moments_events_per_s": rate,
            "moments_direct_sincos_events_per_s": baseline_n / baseline,
            "moments_ratio_to_direct": rate / (baseline_n / baseline)}


def run_benchmarks(quick: bool = False, service: bool = False, soak_s: float = 0.0) -> dict:
    sizes = (10**5, 10**6) if quick else (10**6, 10**7)
    results = {"machine": _machine()}
    results.update(bench_tagging(sizes=sizes, astropy_events=500 if quick else 2000))
    results.update(bench_moments(n=sizes[-1], baseline_n=min(sizes[0], 10**6)))
    if service or soak_s:
        from .service_bench import bench_service

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


def main(args) -> int:
    results = run_benchmarks(quick=args.quick, service=args.service, soak_s=args.soak)
    if args.json:
        print(json.dumps(results, indent=2))
        return 0
    print(f"machine: {results['machine']}")
    for key, value in results.items():
        if key in ("machine", "targets"):
            continue
        if isinstance(value, float):
            shown = f"{value:,.0f}" if value > 100 else f"{value:.3g}"
            print(f"  {key:45s} {shown}")
        else:
            print(f"  {key:45s} {value}")
    print("targets:")
    for key, info in results["targets"].items():
        mark = "met" if info["met"] else "NOT met"
        print(f"  {key:45s} {results[key]:,.1f} vs {info['target']:,.0f}: {mark}")
    return 0
