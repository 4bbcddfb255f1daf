"""Throughput and memory of the numerical hot paths, against baselines measured in
the same run (machines are shared and noisy: ratios matter, not absolute rates).

tagging     barycentre + phase for 1e6 and 1e7 events of one night (one core),
            against the direct route through astropy for events of the same night,
            timed warm (its first-call costs paid on a separate sample) on 2e4 events,
            the median of three runs (with the slowest and fastest), and peak
            memory beyond the input. ``astropy_probe`` times that route again
            whenever it is called (the ``tag`` section times it beside each run).
moments     trigonometric moments for 20 harmonics, against 40 separate sin/cos calls,
            and the same per 10-second interval (what the pipeline and tag keep).
"""

from __future__ import annotations

import gc
import time
import tracemalloc

import numpy as np

__all__ = ["ASTROPY_EVENTS", "astropy_probe", "bench_tagging", "bench_moments"]

ASTROPY_EVENTS = 20_000


def _timings(repeats, function) -> list[float]:
    """Seconds of ``repeats`` calls of ``function``, fastest first."""
    seconds = []
    for _ in range(repeats):
        gc.collect()
        start = time.perf_counter()
        function()
        seconds.append(time.perf_counter() - start)
    return sorted(seconds)


def _best_of(repeats, function) -> float:
    return _timings(repeats, function)[0]


def _night():
    """The demo site and pulsar, and a barycentre table for one night."""
    from ..assemble import Environment, TableCache, build_target
    from ..config import BarycentreConfig, TargetConfig
    from ..core.timebase import NS_PER_S, Scale, parse_instant, to_tt
    from ..demo import DEMO_SITE, data_file

    env = Environment.from_site(DEMO_SITE)
    target = build_target(TargetConfig(name="lantern", models=[data_file("lantern.toml")]))
    start = int(to_tt(np.array([parse_instant("2026-12-02T00:00:00")]), Scale.UTC,
                      env.leaps)[0][0])
    target.tagger.table = TableCache(None, env, BarycentreConfig()).table(
        target.position, start, start + 12 * 3600 * NS_PER_S)
    return env, target, start


def _astropy_route(env, target, sample):
    """The direct route through astropy for ``sample`` (TT ns), vectorised, from
    two-part Julian dates (no text parsing): a callable doing it once."""
    from astropy.coordinates import EarthLocation, SkyCoord
    from astropy.time import Time

    from ..core.timebase import NS_PER_DAY, NS_PER_S
    from ..files.bundled import default_kernel_path, ensure_offline

    ensure_offline()
    site = env.observer
    location = EarthLocation.from_geodetic(site.longitude_deg, site.latitude_deg, site.height_m)
    position = target.position
    sky = SkyCoord(position.right_ascension_deg, position.declination_deg, unit="deg")
    kernel = str(default_kernel_path())
    calculator = target.tagger.calculators[0]
    days, rest = np.divmod(sample, NS_PER_DAY)

    def route():
        t = Time(2_451_545.0 + days, rest / NS_PER_DAY, format="jd", scale="tt",
                 location=location)
        tdb = t.tdb + t.light_travel_time(sky, ephemeris=kernel)
        seconds = (tdb.jd1 - 2_451_545.0) * 86_400 + tdb.jd2 * 86_400
        whole = np.floor(seconds)
        calculator.phase((whole * NS_PER_S).astype(np.int64), seconds - whole)

    return route


def astropy_probe(night=None, events: int = ASTROPY_EVENTS, repeats: int = 3):
    """The direct astropy route made warm (its first calls paid on 500 other events
    of the night): a callable timing it ``repeats`` times on ``events`` events of the
    night, returning events/s of the median run, the slowest and the fastest.
    ``night``: ``_night()`` when already made."""
    from ..core.timebase import NS_PER_S

    env, target, start = night or _night()
    rng = np.random.default_rng(5)
    span = (start, start + 10 * 3600 * NS_PER_S)
    _astropy_route(env, target, np.sort(rng.integers(*span, 500)))()
    timed = _astropy_route(env, target, np.sort(rng.integers(*span, events)))

    def probe() -> tuple[float, float, float]:
        seconds = _timings(repeats, timed)
        return events / seconds[len(seconds) // 2], events / seconds[-1], events / seconds[0]

    return probe


def bench_tagging(sizes=(10**6, 10**7), astropy_events=ASTROPY_EVENTS, repeats=3) -> dict:
    from ..core.timebase import NS_PER_S

    night = _night()
    _, target, start = night
    tagger = target.tagger
    rng = np.random.default_rng(1)
    night_ns = (start, start + 10 * 3600 * NS_PER_S)
    out: dict = {}
    for n in sizes:
        tt = np.sort(rng.integers(*night_ns, n))
        seconds = _best_of(repeats, lambda tt=tt: tagger.tag(tt))
        out[f"tagging_{n:.0e}_events_per_s"] = n / seconds
        del tt
    # memory beyond the input, for the largest size
    n = max(sizes)
    tt = np.sort(rng.integers(*night_ns, n))
    gc.collect()
    tracemalloc.start()
    result = tagger.tag(tt)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    del result, tt
    out["tagging_bytes_per_event"] = peak / n
    out["astropy_direct_events"] = astropy_events
    (out["astropy_direct_events_per_s"], out["astropy_direct_events_per_s_lowest"],
     out["astropy_direct_events_per_s_highest"]) = astropy_probe(night, astropy_events)()
    slowest = min(v for k, v in out.items() if k.startswith("tagging_") and k.endswith("per_s"))
    out["tagging_events_per_s"] = slowest
    out["tagging_ratio_to_astropy"] = slowest / out["astropy_direct_events_per_s"]
    return out


def bench_moments(n=10**7, baseline_n=10**6, repeats=3) -> dict:
    from ..core.moments import PhaseMoments
    from ..core.timebase import NS_PER_S
    from ..core.timebinned import TimeBinnedMoments

    rng = np.random.default_rng(2)
    phases = rng.random(n)
    weights = rng.random(n)
    seconds = _best_of(repeats, lambda: PhaseMoments().update(phases, weights))
    times = np.sort(rng.integers(0, 10 * 3600 * NS_PER_S, n))  # a night, 10 s intervals

    def binned():
        moments = TimeBinnedMoments(10 * NS_PER_S, retain_ns=24 * 3600 * NS_PER_S)
        for lo in range(0, n, 1 << 20):
            moments.update(times[lo : lo + (1 << 20)], phases[lo : lo + (1 << 20)])

    binned_seconds = _best_of(repeats, binned)
    sample, sample_w = phases[:baseline_n], weights[:baseline_n]

    def direct():
        angle = 2 * np.pi * sample
        for k in range(1, 21):
            np.dot(np.cos(k * angle), sample_w)
            np.dot(np.sin(k * angle), sample_w)

    baseline = _best_of(1, direct)
    rate = n / seconds
    return {"moments_events_per_s": rate,
            "moments_per_interval_events_per_s": n / binned_seconds,
            "moments_direct_sincos_events_per_s": baseline_n / baseline,
            "moments_ratio_to_direct": rate / (baseline_n / baseline)}
