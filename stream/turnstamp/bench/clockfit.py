"""The offset estimator against the Cramér–Rao bound, and the coverage of its errors.

For each profile shape × background fraction b × number of events N, seeded trials
draw N phases from f(φ) = b + (1 − b)·s(φ − δ) (inverse CDF of the template's own
density on a fine grid, here rather than through the simulator), shifted by a random
δ, and fit them three ways: the likelihood of the events' phases (what the check of
an archive uses, :mod:`turnstamp.core.eventfit`), the likelihood of their 20 moments
(the live check, which keeps no phases) and the cross-correlation. Over the trials that
detect the pulse: scatter of the offset over the bound sqrt(1/(N·I)),
I = ∫ f'²/f dφ (cycles⁻², by numerical integration on 2¹⁶ points), and the fraction
of true offsets within 1σ and 2σ of each likelihood fit. Just above the detection
threshold a few fits lock onto noise (errors of a large part of a cycle, which no
estimator avoids there); they are counted (``wrong_peak``: error > 0.1 cycles) and
the scatter of the rest is given too (1.4826 × median absolute error). Beside the
bound, the floor of any estimator built on the 20 harmonics the moments keep
(``moments_information``): a narrow peak on a high background has information
beyond the 20th harmonic, which the moments do not hold. At N = 300, where the bound
is not yet reached by any estimator, the scatter of Pitman's estimator (the posterior
mean with the true density and background, the least mean square error possible for
offsets drawn uniformly) on the same trials shows what is.

Each figure is itself a Monte Carlo estimate, given with its standard error: for a
scatter ratio r from n trials r/sqrt(2(n − 1)) (the standard deviation of a sample
standard deviation, Gaussian errors), for a coverage sqrt(c(1 − c)/n) at the nominal
c (binomial). At 2 000 trials these are 1.6% and 0.010: small enough to tell ±0.03 apart.
"""

from __future__ import annotations

import math

import numpy as np

from ..core.cycles import wrap_cycles
from ..core.eventfit import refine_with_events
from ..core.moments import MAX_HARMONICS, PhaseMoments
from ..core.peaks import PeakComponent
from ..core.template import PulseTemplate
from ..core.templatefit import fit_offset

__all__ = ["SHAPES", "BACKGROUNDS", "SIZES", "shape", "density", "draw", "fisher_information",
           "moments_information",
           "efficiency_cell"]

BACKGROUNDS = (0.0, 0.5, 0.9)
SIZES = (300, 3_000, 30_000)
SHAPES = ("two peaks", "sinusoid", "narrow peak")
_GRID = 1 << 16
PITMAN_EVENTS = 300
"""Cells of at most this many events also run the best estimator possible (Pitman's)."""


def shape(name: str) -> PulseTemplate:
    """The benchmark's profile shapes (invented): the demo's main pulse and interpulse, a
    sinusoid 1 + cos 2πφ, and a single narrow Gaussian peak (0.01 cycles)."""
    if name == "two peaks":
        return PulseTemplate(name=name, unpulsed_fraction=0.0, components=[
            PeakComponent(shape="von_mises", position_cycles=0.0, width_cycles=0.025),
            PeakComponent(shape="von_mises", position_cycles=0.47, width_cycles=0.05,
                          amplitude=0.4)])
    if name == "sinusoid":
        centres = (np.arange(256) + 0.5) / 256
        return PulseTemplate(name=name, unpulsed_fraction=0.0,
                             binned_profile=list(1.0 + np.cos(2 * np.pi * centres)))
    return PulseTemplate(name=name, unpulsed_fraction=0.0, components=[
        PeakComponent(shape="gaussian", position_cycles=0.3, width_cycles=0.01)])


def density(name: str, template: PulseTemplate, background: float, x: np.ndarray):
    """f(φ) and f'(φ) per cycle (the sinusoid exactly, not its binned template)."""
    if name == "sinusoid":
        s, ds = 1.0 + np.cos(2 * np.pi * x), -2 * np.pi * np.sin(2 * np.pi * x)
    else:
        h = 1e-6
        s = template.pulsed_density(x)
        ds = (template.pulsed_density(x + h) - template.pulsed_density(x - h)) / (2 * h)
    return background + (1 - background) * s, (1 - background) * ds


def fisher_information(name: str, template: PulseTemplate, background: float) -> float:
    """I = ∫ f'²/f dφ over a cycle (cycles⁻²)."""
    x = (np.arange(_GRID) + 0.5) / _GRID
    f, df = density(name, template, background, x)
    inside = f > 1e-300
    return float(np.sum(df[inside] ** 2 / f[inside]) / _GRID)


def moments_information(name: str, template: PulseTemplate, background: float,
                        harmonics: int = MAX_HARMONICS) -> float:
    """J = μ'ᵀ Σ⁻¹ μ' (cycles⁻²): the information about the offset in one event's
    harmonics 1..``harmonics`` (Σ the covariance of (cos 2πkx, sin 2πkx) under f, μ'
    the derivative of their means with the offset). No estimator built on these
    moments does better than 1/(N·J) for large N (Hansen 1982, efficient generalised
    method of moments; from memory); sqrt(I/J) ≥ 1 is the moments' own floor of
    scatter/CRB. Numerical integration on 2¹⁴ points."""
    x = (np.arange(1 << 14) + 0.5) / (1 << 14)
    f, df = density(name, template, background, x)
    k = np.arange(1, harmonics + 1)
    g = np.concatenate([np.cos(2 * np.pi * np.outer(k, x)), np.sin(2 * np.pi * np.outer(k, x))])
    mean = g @ f / x.size
    covariance = (g * f) @ g.T / x.size - np.outer(mean, mean)
    slope = -(g @ df) / x.size  # d/dδ ∫ g(x) f(x − δ) dx = −∫ g f'
    return float(slope @ np.linalg.solve(covariance, slope))


def draw(cdf: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
    """n phases by inverse CDF (``cdf`` tabulated on a uniform grid over [0, 1])."""
    x = np.linspace(0.0, 1.0, cdf.size)
    return np.interp(rng.random(n), cdf, x)


def tabulated_cdf(name: str, template: PulseTemplate, background: float) -> np.ndarray:
    x = np.linspace(0.0, 1.0, _GRID + 1)
    f, _ = density(name, template, background, x)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (f[1:] + f[:-1]))])
    return cdf / cdf[-1]


def _summary(prefix: str, errors: list[float], sigmas: list[float], bound: float) -> dict:
    """Scatter / bound with its Monte Carlo error, coverage, and the core of the errors."""
    e, s, n = np.abs(np.array(errors)), np.array(sigmas), len(errors)
    ratio = float(np.std(errors) / bound) if n > 1 else None
    return {f"{prefix}_over_bound": ratio,
            f"{prefix}_over_bound_se": ratio / math.sqrt(2 * (n - 1)) if n > 1 else None,
            f"{prefix}_core_over_bound": float(1.4826 * np.median(e) / bound) if n > 1 else None,
            f"{prefix}_coverage_1sigma": float(np.mean(e <= s)) if n else None,
            f"{prefix}_coverage_2sigma": float(np.mean(e <= 2 * s)) if n else None,
            f"{prefix}_wrong_peak": int(np.sum(e > 0.1))}


def _posterior_mean(phases: np.ndarray, f_table: np.ndarray, centre: float,
                    width: float) -> float:
    """Pitman's estimator: the posterior mean of the offset under a flat prior, with the
    true density f (tabulated on [0, 1]) and the true background; no estimator has a
    smaller mean square error over offsets drawn uniformly (Pitman 1939, from memory).
    The posterior is integrated on 401 offsets within ``width`` of ``centre``."""
    shifts = centre + np.linspace(-width, width, 401)
    grid = np.linspace(0.0, 1.0, f_table.size)
    density = np.interp(np.remainder(phases[None, :] - shifts[:, None], 1.0), grid, f_table)
    log_l = np.sum(np.log(np.maximum(density, 1e-300)), axis=1)
    weight = np.exp(log_l - log_l.max())
    return float(np.sum(weight * shifts) / np.sum(weight))


def efficiency_cell(args: tuple[str, float, int, int, int]) -> dict:
    """One shape × background × N: scatter/CRB of the event-phase fit (the archive's
    check), the moments fit (the live check) and the cross-correlation, coverage of both
    fits, detections."""
    name, background, n, trials, seed = args
    template = shape(name)
    cdf = tabulated_cdf(name, template, background)
    information = fisher_information(name, template, background)
    bound = 1.0 / math.sqrt(n * information)
    rng = np.random.default_rng(seed)
    fits: dict[str, tuple[list, list]] = {"events": ([], []), "moments": ([], [])}
    correlation, ambiguous, pitman = [], 0, []
    f_table = density(name, template, background, np.linspace(0.0, 1.0, _GRID + 1))[0] \
        if n <= PITMAN_EVENTS else None
    for _ in range(trials):
        truth = rng.uniform(-0.5, 0.5)
        phases = np.remainder(draw(cdf, n, rng) + truth, 1.0)
        moments = PhaseMoments().update(phases)
        fit = fit_offset(moments, template)
        if not fit.detected:
            continue
        ambiguous += bool(fit.ambiguous)
        events = refine_with_events(fit, phases, template)
        for key, chosen in (("moments", fit), ("events", events)):
            fits[key][0].append(wrap_cycles(chosen.shift_cycles - truth))
            fits[key][1].append(chosen.sigma_cycles)
        if f_table is not None:
            width = min(8 * events.sigma_cycles, 0.5)
            pitman.append(wrap_cycles(_posterior_mean(phases, f_table, events.shift_cycles,
                                                      width) - truth))
        cross = fit_offset(moments, template, method="correlation")
        correlation.append(wrap_cycles(cross.shift_cycles - truth))
    detected = len(correlation)
    out = {"shape": name, "background": background, "events": n, "trials": trials,
           "detected": detected, "bound_cycles": bound, "ambiguous": ambiguous,
           "moments_floor": math.sqrt(information / moments_information(name, template,
                                                                        background)),
           "correlation_over_bound": float(np.std(correlation) / bound) if detected > 1
           else None,
           "pitman_over_bound": float(np.std(pitman) / bound) if len(pitman) > 1 else None,
           "coverage_1sigma_se": math.sqrt(0.68 * 0.32 / detected) if detected else None,
           "coverage_2sigma_se": math.sqrt(0.95 * 0.05 / detected) if detected else None}
    for key, (errors, sigmas) in fits.items():
        out.update(_summary(key, errors, sigmas, bound))
    return out
