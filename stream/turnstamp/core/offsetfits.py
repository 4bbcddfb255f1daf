"""Fits of simple timing-error models to a series of template offsets.

Theory of operation
-------------------
The input is a time-ordered series of offsets y_i ± σ_i (cycles) at times t_i (s),
one per chunk of the night (``clockcheck.chunk_offsets``); every fit is weighted
least squares with weights w_i = 1/σ_i². Offsets are known only modulo one cycle:
``unwrap_offsets`` makes the series continuous (consecutive values differ by at
most half a cycle) before anything is fitted. The models:

* constant (``fit_constant``): y = μ, the weighted mean.
* drift (``fit_drift``): y = μ + r·(t − t_ref), t_ref the weighted mean time; 1
  extra parameter.
* step (``fit_step``): y = before for the first j points and after for the rest,
  at the best split j (at least ``min_side`` points each side); 1 extra parameter.
* wobble (``fit_wobble``): y = c + A·cos(2π(t/P − phase)); the frequency is
  scanned on a grid of step 1/(5·span) between 1/P_max and 1/P_min and refined
  by a bounded Brent search; 2 extra parameters (amplitude and phase).
* smear (``fit_smear``): not a series fit but the whole-night profile against
  its template: each harmonic k is damped by exp(−2π²k²v), v = σ_s² the variance
  of a Gaussian phase jitter, fitted by generalised least squares with the
  photon-noise covariance.
* jitter (``fit_jitter``): the rms s of extra scatter about a model, from
  Σ r²/(σ² + s²) = dof.

Significance. A structured model is compared with the constant by
Δχ² = χ²_constant − χ²_model, judged against the model's own residual scatter:
Δχ² is divided by scale² = max(1, χ²/dof) (an F-test), so that a noisy series
cannot fake a structure. Δχ² is referred to the χ² tail with as many degrees of
freedom as the model's extra parameters, and the tail probability p is turned
into a one-sided Gaussian σ. Parameters that were searched cost trials,
p → 1 − (1 − p)^N: for the step N is the number of splits tried (conservative,
neighbouring splits are correlated); for the wobble N = span·(f_max − f_min), the
number of independent frequencies. The smear is one-sided (v > 0), from Δχ²
against v = 0; the jitter is the χ²_dof tail of Σ r²/σ².

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

from turnstamp.core.stats import chi2_even_log_sf, sigma_from_log_p, trials_log_p
from turnstamp.core.template import OffsetFit, in_phase_covariance, wrap_cycles

__all__ = [
    "ConstantFit",
    "DriftFit",
    "StepFit",
    "WobbleFit",
    "SmearFit",
    "JitterFit",
    "unwrap_offsets",
    "fit_constant",
    "fit_drift",
    "fit_step",
    "fit_wobble",
    "fit_smear",
    "fit_jitter",
]

_OVERSAMPLE = 5  # wobble frequency grid step 1/(5·span): a peak cannot fall between nodes
_FREQUENCY_BLOCK = 256  # trial frequencies per vectorised block (memory ~ block × chunks)


# --------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------


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
class WobbleFit:
    """Sinusoid y = offset + A·cos(2π(t/P − phase)), t in s from the first chunk.

    ``trials`` is the number of independent frequencies searched, span·(f_max − f_min);
    the significance of Δχ²/scale² (2 degrees of freedom) is corrected for them.
    """

    period_s: float
    period_sigma_s: float
    amplitude_cycles: float
    amplitude_sigma_cycles: float
    phase_cycles: float
    phase_sigma_cycles: float
    offset_cycles: float
    chi2: float
    dof: int
    delta_chi2: float
    scale: float
    trials: float
    significance_sigma: float


@dataclass(frozen=True)
class SmearFit:
    """Gaussian broadening of the night profile relative to the template.

    In-phase amplitudes y_k = Re(P_k S_k* e^{−2πik·shift}) ≈ b₀|S_k|²·exp(−2π²k²v) are
    fitted by generalised least squares with the photon-noise covariance; v is the
    smear variance in cycles² (negative: the data are narrower than the template).
    The significance is one-sided (v > 0), from Δχ² against v = 0.
    """

    width_cycles: float
    width_sigma_cycles: float
    variance_cycles2: float
    variance_sigma_cycles2: float
    amplitude: float
    harmonics: int
    delta_chi2: float
    significance_sigma: float


@dataclass(frozen=True)
class JitterFit:
    """Chunk scatter beyond the errors after ``model``: extra rms ``excess_cycles``."""

    model: str
    excess_cycles: float
    chi2: float
    dof: int
    significance_sigma: float


# --------------------------------------------------------------------------------------
# Model fits on offset series (t in s, y and sigma in cycles)
# --------------------------------------------------------------------------------------


def _chi2_log_sf(x: float, dof: int) -> float:
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


def _significance(delta_chi2: float, dof: int, trials: float = 1.0) -> float:
    """One-sided Gaussian σ of a Δχ² with ``dof`` degrees of freedom, after trials."""
    if not (delta_chi2 > 0 and math.isfinite(delta_chi2)):
        return 0.0
    log_p = trials_log_p(_chi2_log_sf(delta_chi2, dof), max(float(trials), 1.0))
    return max(sigma_from_log_p(min(log_p, 0.0)), 0.0)


def _arrays(t, y, sigma):
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
    t, y, w = _arrays(t, y, sigma)
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
    t, y, w = _arrays(t, y, sigma)
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
        significance_sigma=_significance(delta / scale**2, 1),
    )


def fit_step(t, y, sigma, min_side: int = 2) -> StepFit:
    """Best single step in offsets ``y`` ± ``sigma`` (cycles), time-ordered by ``t`` (s).

    Every split with at least ``min_side`` points on each side is tried; the
    significance (1 dof) is corrected for the number of splits (Bonferroni-like,
    conservative since neighbouring splits are correlated).
    """
    t, y, w = _arrays(t, y, sigma)
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
        significance_sigma=_significance(delta / scale**2, 1, trials),
    )


def _sinusoid_chi2(t, y, w, freqs):
    """χ² and coefficients of y ≈ c + a cos 2πft + b sin 2πft for each trial f."""
    out_chi2 = np.empty(freqs.size)
    out_beta = np.empty((freqs.size, 3))
    out_cov = np.empty((freqs.size, 3, 3))
    swy2 = float(w @ y**2)
    for lo in range(0, freqs.size, _FREQUENCY_BLOCK):
        f = freqs[lo : lo + _FREQUENCY_BLOCK]
        arg = 2.0 * np.pi * np.outer(f, t)
        c, s = np.cos(arg), np.sin(arg)
        wc, ws = c * w, s * w
        a = np.empty((f.size, 3, 3))
        a[:, 0, 0] = w.sum()
        a[:, 0, 1] = a[:, 1, 0] = wc.sum(axis=1)
        a[:, 0, 2] = a[:, 2, 0] = ws.sum(axis=1)
        a[:, 1, 1] = (wc * c).sum(axis=1)
        a[:, 1, 2] = a[:, 2, 1] = (wc * s).sum(axis=1)
        a[:, 2, 2] = (ws * s).sum(axis=1)
        rhs = np.stack([np.full(f.size, float(w @ y)), wc @ y, ws @ y], axis=1)
        cov = np.linalg.inv(a)
        beta = np.einsum("fij,fj->fi", cov, rhs)
        out_chi2[lo : lo + f.size] = swy2 - np.einsum("fi,fi->f", beta, rhs)
        out_beta[lo : lo + f.size] = beta
        out_cov[lo : lo + f.size] = cov
    return out_chi2, out_beta, out_cov


def fit_wobble(t, y, sigma, min_period_s: float, max_period_s: float) -> WobbleFit:
    """Best sinusoid in offsets ``y`` ± ``sigma`` (cycles) at times ``t`` (s).

    Trial frequencies run from 1/max_period_s to 1/min_period_s in steps of
    1/(5·span); the best is refined by a bounded Brent search. The significance
    (2 dof, against a constant) is corrected for span·(f_max − f_min) independent
    frequencies and judged against the residual scatter of the sinusoid model.
    """
    t, y, w = _arrays(t, y, sigma)
    n = y.size
    if n < 5:
        raise ValueError(f"fit_wobble needs >= 5 offsets, got {n}")
    if not 0 < min_period_s < max_period_s:
        raise ValueError(
            f"min_period_s = {min_period_s!r}, max_period_s = {max_period_s!r}: "
            "need 0 < min < max"
        )
    t0 = float(t.min())
    x = t - t0
    span = float(x.max())
    f_lo, f_hi = 1.0 / max_period_s, 1.0 / min_period_s
    step = 1.0 / (_OVERSAMPLE * max(span, 1e-9))
    freqs = np.arange(f_lo, f_hi + 0.5 * step, step)
    chi2, _, _ = _sinusoid_chi2(x, y, w, freqs)
    i = int(np.argmin(chi2))

    def at(f: float) -> float:
        return float(_sinusoid_chi2(x, y, w, np.array([f]))[0][0])

    lo, hi = max(f_lo, freqs[i] - step), min(f_hi, freqs[i] + step)
    best_f = float(freqs[i])
    if hi > lo:
        res = optimize.minimize_scalar(at, bounds=(lo, hi), method="bounded",
                                       options={"xatol": 1e-6 * step})
        if res.fun <= chi2[i]:
            best_f = float(res.x)
    chi2_b, beta, cov = _sinusoid_chi2(x, y, w, np.array([best_f]))
    chi2_best, (c0, a, b), cov = float(max(chi2_b[0], 0.0)), beta[0], cov[0]
    dof = n - 4
    mean = float(w @ y / w.sum())
    chi2_const = float(w @ (y - mean) ** 2)
    scale = math.sqrt(max(1.0, chi2_best / dof)) if dof > 0 else 1.0
    cov = cov * scale**2
    amp = math.hypot(a, b)
    if amp > 0:
        grad_amp = np.array([a, b]) / amp
        grad_phase = np.array([-b, a]) / amp**2 / (2.0 * math.pi)
        amp_sigma = math.sqrt(float(grad_amp @ cov[1:, 1:] @ grad_amp))
        phase_sigma = math.sqrt(float(grad_phase @ cov[1:, 1:] @ grad_phase))
    else:
        amp_sigma = math.sqrt(float(cov[1, 1])) if cov[1, 1] > 0 else math.inf
        phase_sigma = math.inf
    # frequency error from the curvature of χ²(f): σ_f² = 2 / χ²''
    h = 0.05 * step
    curv = (at(best_f + h) - 2.0 * chi2_best + at(best_f - h)) / h**2
    f_sigma = scale * math.sqrt(2.0 / curv) if curv > 0 else math.inf
    delta = chi2_const - chi2_best
    trials = max(1.0, span * (f_hi - f_lo))
    return WobbleFit(
        period_s=1.0 / best_f,
        period_sigma_s=f_sigma / best_f**2,
        amplitude_cycles=amp,
        amplitude_sigma_cycles=amp_sigma,
        phase_cycles=float(np.remainder(math.atan2(b, a) / (2.0 * math.pi), 1.0)),
        phase_sigma_cycles=phase_sigma,
        offset_cycles=float(c0),
        chi2=chi2_best,
        dof=dof,
        delta_chi2=delta,
        scale=scale,
        trials=trials,
        significance_sigma=_significance(delta / scale**2, 2, trials),
    )


def fit_smear(night: OffsetFit) -> SmearFit:
    """Gaussian broadening of the night profile relative to its template.

    Parameters
    ----------
    night : OffsetFit
        Fit of the whole night (must carry its template, as ``fit_offset`` leaves it).

    Returns
    -------
    SmearFit
        Width σ_s (cycles) with the data ≈ template ⊗ Gaussian(σ_s); see its notes.
    """
    m = int(night.harmonics_used)
    s = np.asarray(night.template_coefficients)
    k = np.arange(1, m + 1)
    if night.template is None or not math.isfinite(night.shift_cycles) or m < 2:
        return SmearFit(0.0, math.inf, 0.0, math.inf, float("nan"), m, 0.0, 0.0)
    z = np.real(night.data_coefficients * np.conj(s) * np.exp(-2j * np.pi * k * night.shift_cycles))
    base = np.abs(s) ** 2
    pulsed = min(max(night.amplitude / night.sum_w, 0.0), 1.0) if night.sum_w > 0 else 0.0
    cov = night.sum_w2 * in_phase_covariance(night.template, m, pulsed)
    cov = cov + np.eye(m) * 1e-12 * float(np.trace(cov)) / m  # keep it positive definite
    chol = np.linalg.cholesky(cov)
    zw = np.linalg.solve(chol, z)

    def profile(v: float) -> tuple[float, float]:
        g = np.linalg.solve(chol, base * np.exp(-2.0 * math.pi**2 * k**2 * v))
        gg = float(g @ g)
        amp = float(g @ zw) / gg
        return float(zw @ zw) - amp * amp * gg, amp

    v_low = -math.log(10.0) / (2.0 * math.pi**2 * m**2)  # harmonic m boosted at most 10×
    v_high = 0.25**2
    grid = np.concatenate([np.linspace(v_low, 0.0, 40, endpoint=False),
                           np.geomspace(1e-8, v_high, 120)])
    values = np.array([profile(v)[0] for v in grid])
    i = int(np.argmin(values))
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
    res = optimize.minimize_scalar(lambda v: profile(v)[0], bounds=(lo, hi), method="bounded",
                                   options={"xatol": 1e-12})
    v_best = float(res.x) if res.fun <= values[i] else float(grid[i])
    chi2_best, amplitude = profile(v_best)
    chi2_zero = profile(0.0)[0]
    delta = max(chi2_zero - chi2_best, 0.0)
    h = max(abs(v_best) * 1e-3, 1e-9)
    curv = (profile(v_best + h)[0] - 2.0 * chi2_best + profile(v_best - h)[0]) / h**2
    v_sigma = math.sqrt(2.0 / curv) if curv > 0 else math.inf
    width = math.sqrt(v_best) if v_best > 0 else 0.0
    width_sigma = v_sigma / (2.0 * width) if width > 0 else math.sqrt(v_sigma)
    significance = 0.0
    if v_best > 0 and delta > 0:  # one-sided: half the χ²₁ tail, P = Φ̄(sqrt Δχ²)
        significance = max(sigma_from_log_p(float(special.log_ndtr(-math.sqrt(delta)))), 0.0)
    return SmearFit(
        width_cycles=width,
        width_sigma_cycles=width_sigma,
        variance_cycles2=v_best,
        variance_sigma_cycles2=v_sigma,
        amplitude=amplitude,
        harmonics=m,
        delta_chi2=delta,
        significance_sigma=significance,
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
        sig = max(sigma_from_log_p(_chi2_log_sf(chi2, dof)), 0.0)
    return JitterFit(model=model, excess_cycles=excess, chi2=chi2, dof=int(dof),
                     significance_sigma=sig)
