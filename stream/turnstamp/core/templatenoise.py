"""Noise of the template offset fit: per-event variances, covariances, detection odds.

Theory of operation
-------------------
The offset fit (:mod:`turnstamp.core.templatefit`) correlates the data with the
template's trigonometric polynomial c(x) = Re Σ_k S_k e^{−2πikx}. Its errors and its
detection significance follow from moments of c over the phase distribution of one
event, 1 − p + p·s(x). Products of trigonometric polynomials are convolutions of
their coefficients, so every such moment is exact given S_k up to k = 2m.

Detection uses the null amplitude significance z = b̂/σ_b, first mapped to a
Gaussian equivalent with a Cornish–Fisher term for the skewness of C (a narrow
template makes C a sum of very skewed terms), then corrected for the search over
shifts (Rice's upcrossing bound for the maximum of a stationary Gaussian process):
p ≤ Φ̄(z) + sqrt(λ₂)·exp(−z²/2), λ₂ = Σk²|S_k|²/Σ|S_k|². Monte Carlo: at 3σ the
false-detection rate is at or below the nominal 1.35e-3 for 100–3000 uniform events
and widths 0.005–0.1.

References
----------
Rice S.O. 1944, Bell Syst. Tech. J. 23, 282 (expected number of upcrossings; from
memory). Cornish E.A. & Fisher R.A. 1938, Rev. Int. Stat. Inst. 5, 307 (quantile
expansion; from memory).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from .significance import sigma_from_log_p
from .template import PulseTemplate

__all__ = ["in_phase_covariance", "moment_covariance", "event_variances", "null_skewness",
           "detection_sigma"]


def _skew_corrected(z: float, skew: float) -> float:
    """Gaussian-equivalent of a standardised value z of a sum with skewness ``skew``.

    First-order Cornish–Fisher: z_G = z − skew·(z² − 1)/6, continued linearly beyond
    z = 1/skew (where the correction stops being small) so that the map stays increasing.
    """
    if skew <= 0:
        return z
    knee = 1.0 / skew
    if z <= knee:
        return z - skew * (z * z - 1.0) / 6.0
    at_knee = knee - skew * (knee * knee - 1.0) / 6.0
    return at_knee + (z - knee) * (1.0 - skew * knee / 3.0)


def detection_sigma(z: float, lambda2: float, skew: float = 0.0) -> float:
    """One-sided σ of an amplitude z maximised over shifts (Rice upcrossing bound)."""
    z = _skew_corrected(z, skew)
    if not math.isfinite(z) or z <= 0:
        return 0.0
    log_single = float(special.log_ndtr(-z))
    log_cross = 0.5 * math.log(max(lambda2, 1e-300)) - 0.5 * z * z
    log_p = min(float(np.logaddexp(log_single, log_cross)), 0.0)
    return max(sigma_from_log_p(log_p), 0.0)


def null_skewness(s: np.ndarray) -> float:
    """Skewness of c(x) = Re Σ S_k e^{−2πikx} for uniform x (exact, by convolution)."""
    g = _trig_coefficients(s)
    m = s.size
    third = float(np.real(np.convolve(g, g)[m : 3 * m + 1] @ g[::-1]))
    second = float(np.sum(np.abs(s) ** 2)) / 2.0
    return third / second**1.5


def in_phase_covariance(template: PulseTemplate, harmonics: int, pulsed_fraction: float):
    """Covariance of the in-phase parts h_k(x) = Re(S_k* e^{2πikx}) for one event.

    For an event whose phase x (cycles, template coordinates) follows
    1 − p + p·s(x), the data's in-phase sums Re(P_k S_k* e^{−2πik·shift}) are
    Σ w h_k(x), so their covariance is Σw² times this matrix. With
    F(n) = E e^{2πinx} = p·S_n (n > 0):
    E[h_j h_k] = ½ Re[S_j* S_k* F(j+k) + S_j* S_k F(j−k)] and E[h_k] = p|S_k|².
    For p = 0 it is diag(|S_k|²/2), Taylor's σ_f² per unit Σw².

    Parameters
    ----------
    template : PulseTemplate
        Pulse shape.
    harmonics : int
        m; the matrix is m × m (k = 1..m).
    pulsed_fraction : float
        p in [0, 1].

    Returns
    -------
    numpy.ndarray
        Symmetric (m, m) covariance per unit Σw².
    """
    m = int(harmonics)
    p = min(max(float(pulsed_fraction), 0.0), 1.0)
    ext = template.fourier(2 * m)
    s = ext[:m]
    moments = np.concatenate([[1.0 + 0j], p * ext])  # F(n) for n = 0..2m

    def F(n: np.ndarray) -> np.ndarray:
        return np.where(n >= 0, moments[np.abs(n)], np.conj(moments[np.abs(n)]))

    j = np.arange(1, m + 1)[:, None]
    k = np.arange(1, m + 1)[None, :]
    sj, sk = s[:, None], s[None, :]
    second = 0.5 * np.real(np.conj(sj) * np.conj(sk) * F(j + k) + np.conj(sj) * sk * F(j - k))
    mean = p * np.abs(s) ** 2
    return second - np.outer(mean, mean)


def moment_covariance(extended: np.ndarray, harmonics: int,
                      pulsed_fraction: float) -> tuple[np.ndarray, np.ndarray]:
    """Mean and covariance of (cos 2πkx, sin 2πkx), k = 1..m, for one event.

    The event's phase x (cycles, template coordinates) follows 1 − p + p·s(x). With
    F(n) = E e^{2πinx} = p·S_n (n > 0), F(0) = 1 and F(−n) = F(n)*:
    E[cos_j cos_k] = ½ Re[F(j−k) + F(j+k)], E[sin_j sin_k] = ½ Re[F(j−k) − F(j+k)],
    E[cos_j sin_k] = ½ Im[F(j+k) − F(j−k)], and the means are p·Re S_k, p·Im S_k.

    Parameters
    ----------
    extended : numpy.ndarray of complex
        S_n for n = 1..2m (``PulseTemplate.fourier(2 * m)``).
    harmonics : int
        m.
    pulsed_fraction : float
        p in [0, 1].

    Returns
    -------
    mean : numpy.ndarray, shape (2m,)
        (Re S_k, Im S_k) per unit pulsed fraction (multiply by p for the mean).
    covariance : numpy.ndarray, shape (2m, 2m)
        Per unit Σw²; for p = 0 it is ½·I (Taylor's σ_f² per unit Σw²).
    """
    m = int(harmonics)
    p = min(max(float(pulsed_fraction), 0.0), 1.0)
    moments = np.concatenate([[1.0 + 0j], p * np.asarray(extended[: 2 * m])])

    def F(n: np.ndarray) -> np.ndarray:
        return np.where(n >= 0, moments[np.abs(n)], np.conj(moments[np.abs(n)]))

    j = np.arange(1, m + 1)[:, None]
    k = np.arange(1, m + 1)[None, :]
    low, high = F(j - k), F(j + k)
    cc = 0.5 * np.real(low + high)
    ss = 0.5 * np.real(low - high)
    cs = 0.5 * np.imag(high - low)
    unit = np.concatenate([extended[:m].real, extended[:m].imag])
    covariance = np.block([[cc, cs], [cs.T, ss]]) - p * p * np.outer(unit, unit)
    return unit, covariance


def _trig_coefficients(positive: np.ndarray) -> np.ndarray:
    """Two-sided coefficients g_n (n = −m..m) of Re Σ_{k≥1} a_k e^{−2πikx} = Σ g_n e^{−2πinx}."""
    return np.concatenate([np.conj(positive[::-1]) / 2, [0.0], positive / 2])


def event_variances(template: PulseTemplate, s: np.ndarray, pulsed: float) -> tuple[float, float]:
    """Var c(x) and Var c'(x) for one event with density 1 − p + p·s(x) (template coordinates).

    c(x) = Re Σ_k S_k e^{−2πikx}. Products of trigonometric polynomials are
    convolutions of their coefficients, and ∫ s(x) e^{−2πinx} dx = conj(S_n)
    (n > 0), so every integral is exact given S_k up to k = 2m.
    """
    m = s.size
    k = np.arange(1, m + 1)
    t = template.fourier(2 * m)
    # ∫ s(x) e^{−2πinx} dx for n = −2m..2m
    against = np.concatenate([t[::-1], [1.0], np.conj(t)])
    centre = 2 * m

    def moments(g: np.ndarray) -> tuple[float, float]:
        g2 = np.convolve(g, g)  # n = −2m..2m
        uniform_sq = float(np.real(g2[centre]))
        pulsed_sq = float(np.real(g2 @ against))
        pulsed_mean = float(np.real(g @ against[centre - m : centre + m + 1]))
        second = (1.0 - pulsed) * uniform_sq + pulsed * pulsed_sq
        return max(second - (pulsed * pulsed_mean) ** 2, 0.0), uniform_sq

    var_c, _ = moments(_trig_coefficients(s))
    var_dc, _ = moments(_trig_coefficients(-2j * np.pi * k * s))
    return var_c, var_dc
