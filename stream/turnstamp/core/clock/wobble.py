"""A sinusoidal wobble in a series of template offsets: period, amplitude and phase.

Theory of operation
-------------------
y = c + A·cos(2π(t/P − phase)) is fitted by weighted least squares (linear in c,
A cos, A sin for each trial frequency). The frequency is scanned on a grid of step
1/(5·span) between 1/P_max and 1/P_min and refined by a bounded Brent search; 2
extra parameters against the constant (amplitude and phase). The significance is
that of Δχ²/scale² (see :mod:`turnstamp.core.clock.series`), corrected for
N = span·(f_max − f_min) independent frequencies.

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from .series import delta_chi2_sigma, weighted_series

__all__ = ["WobbleFit", "fit_wobble"]

_OVERSAMPLE = 5  # wobble frequency grid step 1/(5·span): a peak cannot fall between nodes
_FREQUENCY_BLOCK = 256  # trial frequencies per vectorised block (memory ~ block × chunks)


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


def _best_frequency(x, y, w, f_lo: float, f_hi: float, step: float) -> float:
    """Frequency (Hz) of the least χ²: the best grid node, refined by a bounded Brent search."""
    freqs = np.arange(f_lo, f_hi + 0.5 * step, step)
    chi2, _, _ = _sinusoid_chi2(x, y, w, freqs)
    i = int(np.argmin(chi2))
    lo, hi = max(f_lo, freqs[i] - step), min(f_hi, freqs[i] + step)
    best_f = float(freqs[i])
    if hi > lo:
        res = optimize.minimize_scalar(lambda f: _chi2_at(x, y, w, f), bounds=(lo, hi),
                                       method="bounded", options={"xatol": 1e-6 * step})
        if res.fun <= chi2[i]:
            best_f = float(res.x)
    return best_f


def _chi2_at(x, y, w, f: float) -> float:
    return float(_sinusoid_chi2(x, y, w, np.array([f]))[0][0])


def _amplitude_and_phase_sigma(a: float, b: float, cov: np.ndarray) -> tuple[float, float]:
    """1σ of A = hypot(a, b) (cycles) and of the phase atan2(b, a)/2π (cycles)."""
    amp = math.hypot(a, b)
    if amp > 0:
        grad_amp = np.array([a, b]) / amp
        grad_phase = np.array([-b, a]) / amp**2 / (2.0 * math.pi)
        return (math.sqrt(float(grad_amp @ cov[1:, 1:] @ grad_amp)),
                math.sqrt(float(grad_phase @ cov[1:, 1:] @ grad_phase)))
    amp_sigma = math.sqrt(float(cov[1, 1])) if cov[1, 1] > 0 else math.inf
    return amp_sigma, math.inf


def fit_wobble(t, y, sigma, min_period_s: float, max_period_s: float) -> WobbleFit:
    """Best sinusoid in offsets ``y`` ± ``sigma`` (cycles) at times ``t`` (s).

    Trial frequencies run from 1/max_period_s to 1/min_period_s in steps of
    1/(5·span); the best is refined by a bounded Brent search. The significance
    (2 dof, against a constant) is corrected for span·(f_max − f_min) independent
    frequencies and judged against the residual scatter of the sinusoid model.
    """
    t, y, w = weighted_series(t, y, sigma)
    n = y.size
    if n < 5:
        raise ValueError(f"fit_wobble needs >= 5 offsets, got {n}")
    if not 0 < min_period_s < max_period_s:
        raise ValueError(
            f"min_period_s = {min_period_s!r}, max_period_s = {max_period_s!r}: "
            "need 0 < min < max"
        )
    x = t - float(t.min())
    span = float(x.max())
    f_lo, f_hi = 1.0 / max_period_s, 1.0 / min_period_s
    step = 1.0 / (_OVERSAMPLE * max(span, 1e-9))
    best_f = _best_frequency(x, y, w, f_lo, f_hi, step)
    chi2_b, beta, cov = _sinusoid_chi2(x, y, w, np.array([best_f]))
    chi2_best, (c0, a, b), cov = float(max(chi2_b[0], 0.0)), beta[0], cov[0]
    dof = n - 4
    mean = float(w @ y / w.sum())
    chi2_const = float(w @ (y - mean) ** 2)
    scale = math.sqrt(max(1.0, chi2_best / dof)) if dof > 0 else 1.0
    amp_sigma, phase_sigma = _amplitude_and_phase_sigma(a, b, cov * scale**2)
    # frequency error from the curvature of χ²(f): σ_f² = 2 / χ²''
    h = 0.05 * step
    curv = (_chi2_at(x, y, w, best_f + h) - 2.0 * chi2_best + _chi2_at(x, y, w, best_f - h)) / h**2
    f_sigma = scale * math.sqrt(2.0 / curv) if curv > 0 else math.inf
    delta = chi2_const - chi2_best
    trials = max(1.0, span * (f_hi - f_lo))
    return WobbleFit(
        period_s=1.0 / best_f,
        period_sigma_s=f_sigma / best_f**2,
        amplitude_cycles=math.hypot(a, b),
        amplitude_sigma_cycles=amp_sigma,
        phase_cycles=float(np.remainder(math.atan2(b, a) / (2.0 * math.pi), 1.0)),
        phase_sigma_cycles=phase_sigma,
        offset_cycles=float(c0),
        chi2=chi2_best,
        dof=dof,
        delta_chi2=delta,
        scale=scale,
        trials=trials,
        significance_sigma=delta_chi2_sigma(delta / scale**2, 2, trials),
    )
