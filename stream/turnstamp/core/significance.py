"""Chance probabilities as Gaussian σ, and the cost of trials.

Conventions
-----------
* Probabilities travel as their **natural** logarithm ``log_p``, finite far into
  the tail where p itself underflows.
* ``sigma`` is the **one-sided** Gaussian equivalent, σ = Φ⁻¹(1 − p), so that
  p = 2.87e-7 is 5σ (two-sided tables give larger σ for the same p). p = 1 maps to
  σ = −inf and p = 0.5 to σ = 0.
* Trials are independent: p_post = 1 − (1 − p)^n, computed without cancellation.

The module does no I/O, holds no clock and imports neither zmq nor pyarrow.
"""

from __future__ import annotations

import math
from statistics import NormalDist

import numpy as np

__all__ = ["sigma_from_log_p", "log_p_from_sigma", "trials_log_p"]

_NORMAL = NormalDist()
_LOG_HALF = -math.log(2.0)
_HALF_LOG_TWO_PI = 0.5 * math.log(2.0 * math.pi)
_DEEP = -700.0  # below this log p, p itself nears the float64 underflow


def _log_tail(x: float) -> tuple[float, float]:
    """log(1 − Φ(x)) for x > 30 and its derivative, from the asymptotic series
    1 − Φ(x) = φ(x)/x · (1 − 1/x² + 3/x⁴ − 15/x⁶ + 105/x⁸ − …) (Abramowitz & Stegun
    1964, 26.2.12, from memory); at x > 30 the next term, 945/x¹⁰, is below 2e-12."""
    inverse = 1.0 / (x * x)
    series = 1.0 + inverse * (-1.0 + inverse * (3.0 + inverse * (-15.0 + inverse * 105.0)))
    slope = 2.0 * inverse / x * (1.0 + inverse * (-6.0 + inverse * (45.0 - inverse * 420.0)))
    value = -0.5 * x * x - math.log(x) - _HALF_LOG_TWO_PI + math.log(series)
    return value, -x - 1.0 / x + slope / series


def _sigma(log_p: float) -> float:
    if log_p == 0.0:
        return -math.inf
    if log_p > _LOG_HALF:  # p > 1/2: 1 − p = −expm1(log p) keeps its digits
        return _NORMAL.inv_cdf(-math.expm1(log_p))
    if log_p > _DEEP:
        return -_NORMAL.inv_cdf(math.exp(log_p))
    x = math.sqrt(-2.0 * log_p)  # then Newton's method on the asymptotic log tail
    for _ in range(50):
        value, slope = _log_tail(x)
        step = (value - log_p) / slope
        x -= step
        if abs(step) < 1e-13 * x:
            break
    return x


def sigma_from_log_p(log_p):
    """One-sided Gaussian equivalent σ = Φ⁻¹(1 − p) of a natural-log probability.

    Computed from log p, accurate far into the tail (40σ ↔ log p ≈ −804.6): by the
    inverse normal of the standard library (Wichura's algorithm AS 241) while p is
    representable, and by Newton's method on the asymptotic tail series beyond.
    log p = 0 gives −inf. Accepts scalars (returns float) or arrays; no scipy
    import, so that short commands start fast.
    """
    values = np.asarray(log_p, dtype=np.float64)
    if np.isnan(values).any() or (values > 0.0).any():
        raise ValueError(f"log_p must be <= 0 (a log probability), got {log_p!r}")
    if values.ndim == 0:
        return _sigma(float(values))
    return np.array([_sigma(float(v)) for v in values.ravel()]).reshape(values.shape)


def log_p_from_sigma(sigma):
    """Natural log of the one-sided tail probability of ``sigma``: log(1 − Φ(σ))."""
    from scipy import special

    values = np.asarray(sigma, dtype=np.float64)
    if np.isnan(values).any():
        raise ValueError("sigma is NaN")
    log_p = special.log_ndtr(-values)
    return float(log_p) if log_p.ndim == 0 else log_p


def trials_log_p(log_p: float, trials: float) -> float:
    """Natural log of the post-trials probability 1 − (1 − p)^n for n independent trials.

    Computed as ``log(−expm1(n·log1p(−p)))`` while p is representable, and as
    log n + log p deep in the tail where n·p ≪ 1 (the rounding of 1 − p would
    otherwise lose everything). ``trials`` may be a non-integer effective number >= 1.
    """
    log_p = float(log_p)
    trials = float(trials)
    if math.isnan(log_p) or log_p > 0.0:
        raise ValueError(f"log_p must be <= 0, got {log_p!r}")
    if not (trials >= 1.0 and math.isfinite(trials)):
        raise ValueError(f"trials must be a finite number >= 1, got {trials!r}")
    if trials == 1.0 or log_p == -math.inf or log_p == 0.0:
        return log_p  # p = 1 stays 1 after any number of trials
    log_np = math.log(trials) + log_p
    if log_np < -40.0:
        # 1 − (1 − p)^n = n p (1 − (n − 1) p / 2 + …): the correction is below 1e-17
        return log_np
    if log_p > -700.0:
        exponent = trials * math.log1p(-math.exp(log_p))
    else:
        exponent = -math.exp(log_np)  # log1p(−p) = −p to full precision here
    if exponent < -math.log(2.0):
        return math.log1p(-math.exp(exponent))
    return math.log(-math.expm1(exponent))
