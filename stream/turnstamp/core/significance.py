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

import numpy as np
from scipy import special

__all__ = ["sigma_from_log_p", "log_p_from_sigma", "trials_log_p"]


def sigma_from_log_p(log_p):
    """One-sided Gaussian equivalent σ = Φ⁻¹(1 − p) of a natural-log probability.

    Uses ``scipy.special.ndtri_exp`` (σ = −Φ⁻¹(p) computed from log p), accurate
    far into the tail (40σ ↔ log p ≈ −804.6). log p = 0 gives −inf. Accepts
    scalars (returns float) or arrays.
    """
    values = np.asarray(log_p, dtype=np.float64)
    if np.isnan(values).any() or (values > 0.0).any():
        raise ValueError(f"log_p must be <= 0 (a log probability), got {log_p!r}")
    sigma = -special.ndtri_exp(values)
    return float(sigma) if sigma.ndim == 0 else sigma


def log_p_from_sigma(sigma):
    """Natural log of the one-sided tail probability of ``sigma``: log(1 − Φ(σ))."""
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
