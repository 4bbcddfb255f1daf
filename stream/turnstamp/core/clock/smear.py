"""Broadening of the night's pulse profile against its template (a smeared pulse).

Theory of operation
-------------------
Not a series fit but the whole-night profile against its template: with a
Gaussian phase jitter of rms σ_s each harmonic k is damped by exp(−2π²k²v),
v = σ_s² (cycles²). The in-phase amplitudes are fitted by generalised least
squares with the photon-noise covariance
(:func:`turnstamp.core.templatenoise.in_phase_covariance`). The significance is
one-sided (v > 0), from Δχ² against v = 0.

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

from ..significance import sigma_from_log_p
from ..template import PulseTemplate
from ..templatefit import OffsetFit
from ..templatenoise import in_phase_covariance

__all__ = ["SmearFit", "fit_smear"]


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


def _whitened_profile(night: OffsetFit, template: PulseTemplate, m: int):
    """χ²(v) of the in-phase amplitudes, whitened by the photon-noise covariance.

    Returns a function of the smear variance v (cycles²) giving (χ², amplitude b₀).
    """
    s = np.asarray(night.template_coefficients)
    k = np.arange(1, m + 1)
    z = np.real(night.data_coefficients * np.conj(s) * np.exp(-2j * np.pi * k * night.shift_cycles))
    base = np.abs(s) ** 2
    pulsed = min(max(night.amplitude / night.sum_w, 0.0), 1.0) if night.sum_w > 0 else 0.0
    cov = night.sum_w2 * in_phase_covariance(template, m, pulsed)
    cov = cov + np.eye(m) * 1e-12 * float(np.trace(cov)) / m  # keep it positive definite
    chol = np.linalg.cholesky(cov)
    zw = np.linalg.solve(chol, z)

    def profile(v: float) -> tuple[float, float]:
        g = np.linalg.solve(chol, base * np.exp(-2.0 * math.pi**2 * k**2 * v))
        gg = float(g @ g)
        amp = float(g @ zw) / gg
        return float(zw @ zw) - amp * amp * gg, amp

    return profile


def _best_variance(profile, m: int) -> float:
    """Smear variance v (cycles²) of the least χ²: grid, then a bounded Brent search."""
    v_low = -math.log(10.0) / (2.0 * math.pi**2 * m**2)  # harmonic m boosted at most 10×
    v_high = 0.25**2
    grid = np.concatenate([np.linspace(v_low, 0.0, 40, endpoint=False),
                           np.geomspace(1e-8, v_high, 120)])
    values = np.array([profile(v)[0] for v in grid])
    i = int(np.argmin(values))
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
    res = optimize.minimize_scalar(lambda v: profile(v)[0], bounds=(lo, hi), method="bounded",
                                   options={"xatol": 1e-12})
    return float(res.x) if res.fun <= values[i] else float(grid[i])


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
    if night.template is None or not math.isfinite(night.shift_cycles) or m < 2:
        return SmearFit(0.0, math.inf, 0.0, math.inf, float("nan"), m, 0.0, 0.0)
    profile = _whitened_profile(night, night.template, m)
    v_best = _best_variance(profile, m)
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
