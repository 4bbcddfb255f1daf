"""Fits of simple timing-error models to a series of template offsets.

Theory of operation
-------------------
The input is a time-ordered series of offsets y_i ± σ_i (cycles) at times t_i (s),
one per chunk of the night (:mod:`turnstamp.core.clock.chunks`); every fit is
weighted least squares with weights w_i = 1/σ_i². Offsets are known only modulo one
cycle: ``unwrap_offsets`` makes the series continuous (consecutive values differ by
at most half a cycle) before anything is fitted. The models here:

* constant (``fit_constant``): y = μ, the weighted mean.
* drift (``fit_drift``): y = μ + r·(t − t_ref), t_ref the weighted mean time; 1
  extra parameter.
* step (``fit_step``): y = before for the first j points and after for the rest,
  at the best split j (at least ``min_side`` points each side); 1 extra parameter.
* jitter (``fit_jitter``): the rms s of extra scatter about a model, from
  Σ r²/(σ² + s²) = dof.

The wobble (:mod:`~turnstamp.core.clock.wobble`) and the smear of the night profile
(:mod:`~turnstamp.core.clock.smear`) have modules of their own.

Significance. A structured model is compared with the constant by
Δχ² = χ²_constant − χ²_model, judged against the model's own residual scatter:
Δχ² is divided by scale² = max(1, χ²/dof) (an F-test), so that a noisy series
cannot fake a structure. Δχ² is referred to the χ² tail with as many degrees of
freedom as the model's extra parameters, and the tail probability p is turned
into a one-sided Gaussian σ. Parameters that were searched cost trials,
p → 1 − (1 − p)^N: for the step N is the number of splits tried (conservative,
neighbouring splits are correlated). The jitter is the χ²_dof tail of Σ r²/σ².

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

from ..cycles import wrap_cycles
from ..periodicity import chi2_even_log_sf
from ..significance import sigma_from_log_p, trials_log_p

__all__ = [
    "ConstantFit",
    "DriftFit",
    "StepFit",
    "JitterFit",
    "chi2_log_sf",
    "delta_chi2_sigma",
    "weighted_series",
    "unwrap_offsets",
    "fit_constant",
    "fit_drift",
    "fit_step",
    "fit_jitter",
]


@dataclass(frozen=True)
class ConstantFit:
    """Weighted mean of the offsets (cycles) with its error, χ² and degrees of freedom."""

    value_cycles: float
    sigma_cycles: float
    chi2: float
    dof: int


@dataclass(frozen=True)
class DriftFit:
    """Linear drift y = offset + rate·(t − t_ref); t_ref is the weighted mean time.

    Errors are scaled by ``scale`` = sqrt(max(1, χ²/dof)); the significance is that
    of Δχ²/scale² against the constant model (1 degree of freedom).
    """

    offset_cycles: float
    offset_sigma_cycles: float
    rate_cycles_per_s: float
    rate_sigma_cycles_per_s: float
    reference_s: float
    span_s: float
    excursion_cycles: float
    chi2: float
    dof: int
    delta_chi2: float
    scale: float
    significance_sigma: float


@dataclass(frozen=True)
class StepFit:
    """One step between chunk ``index − 1`` and ``index`` (the best split).

    ``size = after − before`` (cycles). ``trials`` is the number of splits tried;
    the significance of Δχ²/scale² (1 degree of freedom) is corrected for them.
    """

    index: int
    before_cycles: float
    before_sigma_cycles: float
    after_cycles: float
    after_sigma_cycles: float
    size_cycles: float
    size_sigma_cycles: float
    chi2: float
    dof: int
    delta_chi2: float
    scale: float
    trials: float
    significance_sigma: float


@dataclass(frozen=True)
class JitterFit:
    """Chunk scatter beyond the errors after ``model``: extra rms ``excess_cycles``."""

    model: str
    excess_cycles: float
    chi2: float
    dof: int
    significance_sigma: float


def chi2_log_sf(x: float, dof: int) -> float:
    """Natural log of P(χ²_dof > x), finite far into the tail."""
    if not x > 0:
        return 0.0
    if dof == 1:
        return min(0.0, math.log(2.0) + float(special.log_ndtr(-math.sqrt(x))))
    if dof % 2 == 0:
        return chi2_even_log_sf(x, dof)
    sf = float(special.gammaincc(0.5 * dof, 0.5 * x))
    if sf > 1e-280:
        return math.log(sf)
    # Wilson–Hilferty: (χ²/ν)^{1/3} is close to normal with mean 1 − 2/(9ν), var 2/(9ν)
    z = ((x / dof) ** (1.0 / 3.0) - (1.0 - 2.0 / (9.0 * dof))) / math.sqrt(2.0 / (9.0 * dof))
    return float(special.log_ndtr(-z))


def delta_chi2_sigma(delta_chi2: float, dof: int, trials: float = 1.0) -> float:
    """One-sided Gaussian σ of a Δχ² with ``dof`` degrees of freedom, after trials."""
    if not (delta_chi2 > 0 and math.isfinite(delta_chi2)):
        return 0.0
    log_p = trials_log_p(chi2_log_sf(delta_chi2, dof), max(float(trials), 1.0))
    return max(sigma_from_log_p(min(log_p, 0.0)), 0.0)


def weighted_series(t, y, sigma):
    """Times (s), offsets and their weights 1/σ² (cycles⁻²) as checked 1-D float arrays."""
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    sigma = np.asarray(sigma, dtype=float)
    if not (t.shape == y.shape == sigma.shape) or t.ndim != 1:
        raise ValueError("t, y and sigma must be 1-D arrays of the same length")
    if not (np.isfinite(sigma).all() and (sigma > 0).all()):
        raise ValueError("sigma must be finite and > 0")
    return t, y, 1.0 / sigma**2


def unwrap_offsets(shifts, reference: float = 0.0) -> np.ndarray:
    """Make a time-ordered series of offsets continuous, in cycles.

    Each offset is first taken relative to ``reference`` in (−0.5, 0.5], then whole
    cycles are added so that consecutive values differ by at most half a cycle.

    Parameters
    ----------
    shifts : array_like
        Offsets in cycles, in time order.
    reference : float
        Phase (cycles) around which the first offset is placed.
    """
    d = np.asarray(wrap_cycles(np.asarray(shifts, dtype=float) - reference), dtype=float)
    return reference + np.unwrap(np.atleast_1d(d), period=1.0)


def fit_constant(t, y, sigma) -> ConstantFit:
    """Weighted mean of offsets ``y`` ± ``sigma`` (cycles) at times ``t`` (s)."""
    t, y, w = weighted_series(t, y, sigma)
    mean = float(w @ y / w.sum())
    return ConstantFit(
        value_cycles=mean,
        sigma_cycles=1.0 / math.sqrt(float(w.sum())),
        chi2=float(w @ (y - mean) ** 2),
        dof=int(y.size - 1),
    )


def fit_drift(t, y, sigma) -> DriftFit:
    """Weighted linear fit of offsets ``y`` ± ``sigma`` (cycles) against ``t`` (s).

    Needs at least 3 points. The significance (1 dof) is that of the drift model
    against the constant one, judged against the drift model's own residual scatter.
    """
    t, y, w = weighted_series(t, y, sigma)
    if y.size < 3:
        raise ValueError(f"fit_drift needs >= 3 offsets, got {y.size}")
    ref = float(w @ t / w.sum())
    x = t - ref
    sw, sxx = float(w.sum()), float(w @ x**2)
    mean = float(w @ y / sw)
    rate = float(w @ (x * y) / sxx) if sxx > 0 else 0.0
    resid = y - mean - rate * x
    chi2 = float(w @ resid**2)
    dof = int(y.size - 2)
    chi2_const = float(w @ (y - mean) ** 2)
    scale = math.sqrt(max(1.0, chi2 / dof)) if dof > 0 else 1.0
    delta = chi2_const - chi2
    span = float(t.max() - t.min())
    rate_sigma = scale / math.sqrt(sxx) if sxx > 0 else math.inf
    return DriftFit(
        offset_cycles=mean,
        offset_sigma_cycles=scale / math.sqrt(sw),
        rate_cycles_per_s=rate,
        rate_sigma_cycles_per_s=rate_sigma,
        reference_s=ref,
        span_s=span,
        excursion_cycles=abs(rate) * span,
        chi2=chi2,
        dof=dof,
        delta_chi2=delta,
        scale=scale,
        significance_sigma=delta_chi2_sigma(delta / scale**2, 1),
    )


def fit_step(t, y, sigma, min_side: int = 2) -> StepFit:
    """Best single step in offsets ``y`` ± ``sigma`` (cycles), time-ordered by ``t`` (s).

    Every split with at least ``min_side`` points on each side is tried; the
    significance (1 dof) is corrected for the number of splits (Bonferroni-like,
    conservative since neighbouring splits are correlated).
    """
    t, y, w = weighted_series(t, y, sigma)
    n = y.size
    if n < 2 * min_side:
        raise ValueError(f"fit_step needs >= {2 * min_side} offsets, got {n}")
    cw, cy, cyy = np.cumsum(w), np.cumsum(w * y), np.cumsum(w * y * y)
    split = np.arange(min_side, n - min_side + 1)  # first index after the step
    wl, yl, ql = cw[split - 1], cy[split - 1], cyy[split - 1]
    wr, yr, qr = cw[-1] - wl, cy[-1] - yl, cyy[-1] - ql
    chi2 = (ql - yl**2 / wl) + (qr - yr**2 / wr)
    best = int(np.argmin(chi2))
    j = int(split[best])
    before, after = float(yl[best] / wl[best]), float(yr[best] / wr[best])
    chi2_best = float(max(chi2[best], 0.0))
    dof = n - 2
    mean = float(cy[-1] / cw[-1])
    chi2_const = float(w @ (y - mean) ** 2)
    scale = math.sqrt(max(1.0, chi2_best / dof)) if dof > 0 else 1.0
    delta = chi2_const - chi2_best
    sb, sa = scale / math.sqrt(float(wl[best])), scale / math.sqrt(float(wr[best]))
    trials = float(split.size)
    return StepFit(
        index=j,
        before_cycles=before,
        before_sigma_cycles=sb,
        after_cycles=after,
        after_sigma_cycles=sa,
        size_cycles=after - before,
        size_sigma_cycles=math.hypot(sa, sb),
        chi2=chi2_best,
        dof=dof,
        delta_chi2=delta,
        scale=scale,
        trials=trials,
        significance_sigma=delta_chi2_sigma(delta / scale**2, 1, trials),
    )


def fit_jitter(residuals, sigma, dof: int, model: str = "constant") -> JitterFit:
    """Extra scatter of ``residuals`` (cycles) beyond their errors ``sigma``.

    The excess rms s solves Σ r²/(σ² + s²) = dof (0 when χ² ≤ dof); the significance
    is the χ²_dof tail of Σ r²/σ².
    """
    r = np.asarray(residuals, dtype=float)
    var = np.asarray(sigma, dtype=float) ** 2
    chi2 = float(np.sum(r**2 / var))
    excess = 0.0
    if dof > 0 and chi2 > dof:
        def excess_eq(s2: float) -> float:
            return float(np.sum(r**2 / (var + s2))) - dof

        top = float(np.sum(r**2)) / dof + float(var.max())
        excess = math.sqrt(optimize.brentq(excess_eq, 0.0, top))
    sig = 0.0
    if dof > 0 and chi2 > dof:
        sig = max(sigma_from_log_p(chi2_log_sf(chi2, dof)), 0.0)
    return JitterFit(model=model, excess_cycles=excess, chi2=chi2, dof=int(dof),
                     significance_sigma=sig)
