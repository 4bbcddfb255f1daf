"""Whole nights at the moment level: false alarms, minutes to a verdict, the offset flagged.

A night is simulated where it is exact without the barycentre chain: event times
uniform over the night, pulse phases drawn from the template (inverse CDF), the
background uniform, an optional clock offset added to every phase; the clock check
then sees only the time-binned moments, as in the service (``check_target`` with
60-s chunks, the default 0.02-cycle tolerance, the pulsar at 311.37 Hz).
"""

from __future__ import annotations

import numpy as np

from ..core.clock.apparent import ConstantSpin
from ..core.clock.check import CheckSettings, check_target
from ..core.clock.verdict import DECIDED_FRACTION
from ..core.templatefit import fit_offset
from ..core.timebinned import TimeBinnedMoments
from .clockfit import draw, shape, tabulated_cdf

__all__ = ["NU", "BACKGROUND_RATE", "simulate", "clean_night", "minutes_to_verdict",
           "flagged"]

NU = 311.37  # Hz, an invented millisecond pulsar
BACKGROUND_RATE = 200.0  # background events per second
START_NS = 819_999_600 * 10**9
MINUTE_NS = 60 * 10**9
_TEMPLATE = "two peaks"


def simulate(seconds: float, pulsed_rate: float, seed: int, offset_us: float = 0.0,
             background_rate: float = BACKGROUND_RATE) -> TimeBinnedMoments:
    """Moments per minute of a night with ``pulsed_rate`` on ``background_rate`` (per s)."""
    rng = np.random.default_rng(seed)
    template = shape(_TEMPLATE)
    cdf = tabulated_cdf(_TEMPLATE, template, 0.0)
    binned = TimeBinnedMoments(MINUTE_NS)
    step = 1800.0  # half-hour blocks keep memory small
    for lo in np.arange(0.0, seconds, step):
        length = min(step, seconds - lo)
        n_p, n_b = rng.poisson(pulsed_rate * length), rng.poisson(background_rate * length)
        phases = np.concatenate([draw(cdf, n_p, rng) + offset_us * 1e-6 * NU,
                                 rng.random(n_b)])
        times = START_NS + np.round((lo + rng.uniform(0, length, phases.size)) * 1e9)
        binned.update(times.astype(np.int64), np.remainder(phases, 1.0))
    return binned


def _verdict(binned: TimeBinnedMoments):
    verdict, _ = check_target(binned, shape(_TEMPLATE), ConstantSpin(NU), CheckSettings())
    return verdict


def clean_night(args: tuple) -> dict:
    """A clean night's verdict: status, kind, and whether it was decided. ``args``:
    (seconds, pulsed rate, seed[, background rate]); a pulsed rate of 0 is a night of
    noise alone."""
    seconds, pulsed_rate, seed, *background = args
    verdict = _verdict(simulate(seconds, pulsed_rate, seed,
                                background_rate=background[0] if background else BACKGROUND_RATE))
    return {"hours": seconds / 3600.0, "pulsed_rate": pulsed_rate, "status": verdict.status,
            "kind": verdict.kind,
            "undecided": verdict.kind in ("no_signal", "insufficient_signal")}


def minutes_to_verdict(args: tuple[float, int, int]) -> dict:
    """First whole minute at which the night's offset error reaches a third of the
    tolerance (the check is then decided), and that error at 30 minutes (µs)."""
    pulsed_rate, limit_minutes, seed = args
    binned = simulate(limit_minutes * 60.0, pulsed_rate, seed)
    template = shape(_TEMPLATE)
    needed = DECIDED_FRACTION * 0.02
    intervals = binned.intervals()
    total = None
    decided, at_30 = None, None
    for minute, (_, moments) in enumerate(intervals, start=1):
        total = moments.copy() if total is None else total + moments
        fit = fit_offset(total, template)
        if minute == 30:
            at_30 = fit.sigma_cycles / NU * 1e6
        if decided is None and fit.detected and fit.sigma_cycles <= needed:
            decided = minute
        if decided is not None and minute >= 30:
            break
    return {"pulsed_rate": pulsed_rate, "minutes": decided, "sigma_us_at_30": at_30}


def flagged(args: tuple[float, float, int]) -> bool:
    """Is a 30-minute night with a clock offset of ``offset_us`` flagged (not OK)?"""
    pulsed_rate, offset_us, seed = args
    return _verdict(simulate(1800.0, pulsed_rate, seed, offset_us)).status != "OK"
