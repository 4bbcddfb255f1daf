"""Synthetic nights: a pulsar, a background and the clock faults that hide a pulse.

Theory of operation
-------------------
Pulsed events are an inhomogeneous Poisson process whose rate follows the
template at the *barycentre*. They are drawn by thinning: candidate arrival
times at the site are uniform at the peak rate, each is tagged through the same
forward chain the service uses (barycentre table, spin model), and kept with
probability template(phase)/peak. No inverse of the barycentric correction is
needed, and the result is exact for any model (binaries, glitches).

A fault then corrupts the *reported* time stamps, as a broken clock chain would:

=================  ==========================================================
``offset``         every time stamp late by ``offset_s``
``step``           a jump of ``step_s`` (default 1 s) from ``step_at`` (fraction of night)
``scale``          stamps in ``actual_scale`` but declared as ``declared_scale``
                   (default: TAI given as UTC, 37 s)
``barycentre_sign`` the sky behaves as if the barycentric correction had the
                   opposite sign (what a tagger with a sign error would need)
``drift``          a clock running off by ``drift_us_per_hour``
``wobble``         a periodic error of ``wobble_amplitude_s`` and ``wobble_period_s``
=================  ==========================================================

Energies, directions, classifier scores and weights are drawn so that recipes
and weighted statistics have something to select: pulsed events are harder,
closer to the target and score higher; the weight is the exact probability
that an event is pulsed given its score and distance under this model.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
from scipy.stats import beta

from .barycentre import SkyPosition
from .batch import EventBatch
from .tagger import TargetTagger
from .template import PulseTemplate
from .timebase import NS_PER_S, LeapSecondTable, Scale, from_tt

__all__ = ["Fault", "NightPlan", "simulate_night", "FAULT_KINDS"]

FAULT_KINDS = ("none", "offset", "step", "scale", "barycentre_sign", "drift", "wobble")


@dataclass(frozen=True)
class Fault:
    """A clock-chain fault injected into the reported time stamps."""

    kind: str = "none"
    offset_s: float = 200e-6
    step_s: float = 1.0
    step_at: float = 0.5
    declared_scale: Scale = Scale.UTC
    actual_scale: Scale = Scale.TAI
    drift_us_per_hour: float = 50.0
    wobble_amplitude_s: float = 1e-3
    wobble_period_s: float = 240.0

    def __post_init__(self):
        if self.kind not in FAULT_KINDS:
            raise ValueError(f"fault kind {self.kind!r} is not one of {list(FAULT_KINDS)}")

    def error_ns(self, tt_ns: np.ndarray, start_ns: int, duration_ns: int) -> np.ndarray:
        """Time-stamp error (reported minus true), int64 ns, for time-like faults."""
        since = (tt_ns - start_ns) * 1e-9
        if self.kind == "offset":
            error = np.full(since.shape, self.offset_s)
        elif self.kind == "step":
            error = np.where(tt_ns >= start_ns + self.step_at * duration_ns, self.step_s, 0.0)
        elif self.kind == "drift":
            error = self.drift_us_per_hour * 1e-6 * since / 3600.0
        elif self.kind == "wobble":
            error = self.wobble_amplitude_s * np.sin(2 * np.pi * since / self.wobble_period_s)
        else:
            error = np.zeros(since.shape)
        return np.round(error * 1e9).astype(np.int64)


@dataclass(frozen=True)
class NightPlan:
    """What to simulate. Rates are mean events per second over the night."""

    start_tt_ns: int
    duration_s: float
    pulsed_rate_hz: float
    background_rate_hz: float
    template: PulseTemplate
    fault: Fault = field(default_factory=Fault)
    declared_scale: Scale = Scale.UTC
    batch_seconds: float = 1.0
    energy_range_kev: tuple[float, float] = (1e8, 1e11)  # 100 GeV to 100 TeV
    pulsed_spectral_index: float = 2.0
    background_spectral_index: float = 2.7
    point_spread_deg: float = 0.1
    field_radius_deg: float = 2.0
    telescopes: int = 4
    seed: int = 0
    source: str = "simulator"


def _power_law(rng, n, index, lo, hi):
    """Energies with dN/dE ~ E^-index between lo and hi (inverse transform)."""
    u = rng.random(n)
    a = 1.0 - index
    return (lo**a + u * (hi**a - lo**a)) ** (1.0 / a)


def _phases_for(tagger: TargetTagger, tt_ns, sign_error: bool):
    """True model phase of candidate site instants (optionally with the sign fault)."""
    correction, _, inside = tagger.table.evaluate(tt_ns)
    if not inside.all():
        raise ValueError("the simulated night runs outside the barycentre table")
    if sign_error:
        correction = -correction
    index = tagger.choose_models(tt_ns)
    phase = np.empty(tt_ns.size)
    for i in np.unique(index):
        rows = index == i
        phase[rows] = tagger.calculators[i].phase(tt_ns[rows], correction[rows])[1]
    return phase


def simulate_night(plan: NightPlan, tagger: TargetTagger, position: SkyPosition,
                   leaps: LeapSecondTable) -> Iterator[EventBatch]:
    """Yield the night as time-ordered batches of ``plan.batch_seconds``.

    The last batch of each block is sent even if short; event ids count from 0.
    """
    rng = np.random.default_rng(plan.seed)
    template = plan.template
    peak = float(np.max(template.pulsed_density(np.linspace(0, 1, 4097))))
    duration_ns = int(plan.duration_s * NS_PER_S)
    step_ns = int(plan.batch_seconds * NS_PER_S)
    sign_error = plan.fault.kind == "barycentre_sign"
    next_id = 0
    for sequence, block_start in enumerate(range(plan.start_tt_ns,
                                                 plan.start_tt_ns + duration_ns, step_ns)):
        block_ns = min(step_ns, plan.start_tt_ns + duration_ns - block_start)
        seconds = block_ns / NS_PER_S
        candidates = rng.poisson(plan.pulsed_rate_hz * peak * seconds)
        t_pulsed = block_start + rng.integers(0, block_ns, candidates)
        if candidates:
            phase = _phases_for(tagger, t_pulsed, sign_error)
            keep = rng.random(candidates) * peak < template.pulsed_density(phase)
            t_pulsed = t_pulsed[keep]
        n_background = rng.poisson(plan.background_rate_hz * seconds)
        t_background = block_start + rng.integers(0, block_ns, n_background)
        yield _assemble(plan, rng, position, leaps, t_pulsed, t_background, sequence, next_id,
                        duration_ns)
        next_id += t_pulsed.size + n_background


def _assemble(plan, rng, position, leaps, t_pulsed, t_background, sequence, first_id,
              duration_ns) -> EventBatch:
    n_p, n_b = t_pulsed.size, t_background.size
    tt = np.concatenate([t_pulsed, t_background])
    pulsed = np.concatenate([np.ones(n_p, bool), np.zeros(n_b, bool)])
    order = np.argsort(tt, kind="stable")
    tt, pulsed = tt[order], pulsed[order]
    n = tt.size
    lo, hi = plan.energy_range_kev
    energy = np.where(pulsed, _power_law(rng, n, plan.pulsed_spectral_index, lo, hi),
                      _power_law(rng, n, plan.background_spectral_index, lo, hi))
    # directions: offsets in the tangent plane around the target
    sigma, radius_max = plan.point_spread_deg, plan.field_radius_deg
    r = np.where(pulsed, np.hypot(*rng.normal(0, sigma, (2, n))),
                 radius_max * np.sqrt(rng.random(n)))
    angle = rng.uniform(0, 2 * np.pi, n)
    dec = np.clip(position.declination_deg + r * np.sin(angle), -90, 90)
    ra = (position.right_ascension_deg
          + r * np.cos(angle) / max(np.cos(np.radians(position.declination_deg)), 1e-6)) % 360
    score = np.where(pulsed, rng.beta(5, 2, n), rng.beta(2, 5, n))
    # weight = P(pulsed | score, r) under this model (Bayes with the two densities)
    signal_density = (plan.pulsed_rate_hz * beta.pdf(score, 5, 2)
                      * np.exp(-0.5 * (r / sigma) ** 2) / (2 * np.pi * sigma**2))
    background_density = (plan.background_rate_hz * beta.pdf(score, 2, 5)
                          / (np.pi * radius_max**2))
    weight = signal_density / (signal_density + background_density)
    telescopes = rng.integers(1, 1 << plan.telescopes, n).astype(np.uint64)
    # the reported time stamps, as the (possibly broken) clock chain writes them
    fault = plan.fault
    reported_tt = tt + fault.error_ns(tt, plan.start_tt_ns, duration_ns)
    scale = plan.declared_scale
    if fault.kind == "scale":
        readings, _ = from_tt(reported_tt, fault.actual_scale, leaps)
        scale = fault.declared_scale
    else:
        readings, _ = from_tt(reported_tt, scale, leaps)
    return EventBatch(
        source=plan.source, sequence=sequence, time_scale=Scale(scale),
        event_id=np.arange(first_id, first_id + n, dtype=np.uint64), time_ns=readings,
        energy_kev=energy, ra_deg=ra, dec_deg=dec, score=score, weight=weight,
        telescope_mask=telescopes)
