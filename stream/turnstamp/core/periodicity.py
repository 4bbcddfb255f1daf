"""Periodicity tests on trigonometric moments: Z²ₘ, the Rayleigh test, the H-test.

Theory of operation
-------------------
Each test reads the sums kept by :class:`~turnstamp.core.moments.PhaseMoments`.
Statistics use the weighted normalisation of Kerr (2011, ApJ 732, 38):

    Z²_m = (2 / Σw²) Σ_{k≤m} (C_k² + S_k²)

which for unit weights is the Z²ₘ of Buccheri et al. (1983, A&A 128, 245). Under
the null (uniform phases, many events) Z²ₘ follows χ² with 2m degrees of freedom;
its tail has a closed form for even dof, evaluated in log space. The H-test
(de Jager, Raubenheimer & Swanepoel 1989) is H = max_m (Z²ₘ − 4m + 4) with the
chance probability exp(−0.4 H) of de Jager & Büsching (2010).

Conventions
-----------
* ``log_p`` is the **natural** logarithm of the chance probability. It is computed
  in log space and stays finite and accurate far into the tail; ``p = exp(log_p)``
  may underflow to 0.
* ``sigma`` is the one-sided Gaussian equivalent (:mod:`turnstamp.core.significance`).

The module does no I/O, holds no clock and imports neither zmq nor pyarrow.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .moments import MAX_HARMONICS, PhaseMoments
from .significance import sigma_from_log_p

__all__ = [
    "H_CALIBRATED_UP_TO",
    "TestResult",
    "z2_from_sums",
    "z2_series",
    "z2_test",
    "rayleigh_test",
    "h_test",
    "h_log_p",
    "chi2_even_log_sf",
]

H_CALIBRATED_UP_TO = 70.0
"""H beyond which exp(-0.4 H) is an extrapolation (de Jager & Büsching 2010, from memory)."""


@dataclass(frozen=True)
class TestResult:
    """Outcome of one periodicity test.

    ``log_p`` is the natural log of the chance probability (finite far into the
    tail), ``p = exp(log_p)`` (may underflow to 0) and ``sigma`` the one-sided
    Gaussian equivalent. ``harmonics`` is m for Z²ₘ, 1 for Rayleigh and the best m
    for the H-test. ``beyond_calibration`` marks an H value above the range over
    which the exp(−0.4 H) tail was checked (:data:`H_CALIBRATED_UP_TO`).
    """

    __test__ = False  # not a pytest test class, despite the name

    name: str
    statistic: float
    harmonics: int
    log_p: float
    p: float
    sigma: float
    count: int
    sum_w: float
    beyond_calibration: bool = False


def z2_from_sums(cos_sums, sin_sums, sum_w2):
    """Z²_m for m = 1..K from sums with K harmonics on the last axis (vectorised).

    ``Z²_m = (2/Σw²) Σ_{k≤m} (C_k² + S_k²)`` (Buccheri et al. 1983; Kerr 2011).
    Leading axes broadcast, so many realisations can be evaluated at once. Where
    Σw² = 0 (no events) the result is 0.
    """
    cos_sums = np.asarray(cos_sums, dtype=np.float64)
    sin_sums = np.asarray(sin_sums, dtype=np.float64)
    sum_w2 = np.asarray(sum_w2, dtype=np.float64)[..., None]
    power = np.cumsum(cos_sums * cos_sums + sin_sums * sin_sums, axis=-1)
    safe = np.where(sum_w2 > 0.0, sum_w2, 1.0)
    return np.where(sum_w2 > 0.0, 2.0 * power / safe, 0.0)


def z2_series(moments: PhaseMoments) -> np.ndarray:
    """Z²_m for m = 1..moments.harmonics (weighted normalisation; classic for w ≡ 1)."""
    return z2_from_sums(moments.cos_sums, moments.sin_sums, moments.sum_w2)


def chi2_even_log_sf(statistic: float, dof: int) -> float:
    """Natural log of P(χ² > statistic) for an even number of degrees of freedom.

    Closed form ``P = e^{−x/2} Σ_{j<dof/2} (x/2)^j / j!``, evaluated in log space
    (no underflow however large the statistic).
    """
    if dof < 2 or dof % 2:
        raise ValueError(f"dof must be a positive even integer, got {dof!r}")
    half = 0.5 * float(statistic)
    if not half > 0.0:  # includes 0 (and refuses NaN below)
        if math.isnan(half):
            raise ValueError("statistic is NaN")
        return 0.0
    log_half = math.log(half)
    log_terms = [j * log_half - math.lgamma(j + 1.0) for j in range(dof // 2)]
    top = max(log_terms)
    return min(0.0, -half + top + math.log(math.fsum(math.exp(t - top) for t in log_terms)))


def _result(name, statistic, harmonics, log_p, moments, beyond=False) -> TestResult:
    return TestResult(
        name=name,
        statistic=float(statistic),
        harmonics=int(harmonics),
        log_p=float(log_p),
        p=math.exp(log_p),
        sigma=sigma_from_log_p(log_p),
        count=int(moments.count),
        sum_w=float(moments.sum_w),
        beyond_calibration=beyond,
    )


def z2_test(moments: PhaseMoments, m: int = 2) -> TestResult:
    """Z²ₘ test: p = P(χ²_{2m} > Z²ₘ), exact closed form for even dof, in log space.

    The χ² null distribution is asymptotic (many events; for weights, many events
    with no single weight dominating; Kerr 2011). Name ``"Z2_<m>"``.
    """
    if isinstance(m, bool) or not isinstance(m, (int, np.integer)) \
            or not 1 <= m <= moments.harmonics:
        raise ValueError(f"m must be an integer in 1..{moments.harmonics}, got {m!r}")
    statistic = float(z2_series(moments)[m - 1])
    return _result(f"Z2_{int(m)}", statistic, m, chi2_even_log_sf(statistic, 2 * m), moments)


def rayleigh_test(moments: PhaseMoments) -> TestResult:
    """Rayleigh test, Z²₁, with the asymptotic chance probability p = exp(−Z²₁/2).

    Note: ``astropy.stats.circstats.rayleightest`` applies a small-sample correction
    (Wilkie 1983) for n < 50 and then differs from this; for n >= 50 both are
    exp(−n R̄²) with n R̄² = Z²₁/2.
    """
    statistic = float(z2_series(moments)[0])
    return _result("Rayleigh", statistic, 1, -0.5 * statistic, moments)


def h_log_p(h: float) -> float:
    """Natural log of the H-test chance probability, −0.4 H (de Jager & Büsching 2010)."""
    return -0.4 * float(h)


def h_test(moments: PhaseMoments) -> TestResult:
    """H-test: H = max_{1≤m≤20} (Z²ₘ − 4m + 4), with its best m.

    de Jager, Raubenheimer & Swanepoel (1989, A&A 221, 180) defined the test; the
    chance probability used here is P(>H) = exp(−0.4 H), the calibration of
    de Jager & Büsching (2010, A&A 517, L9) from ~10¹⁴ white-noise realisations.
    That calibration was checked by its authors to about H ≈ 70 (from memory);
    beyond :data:`H_CALIBRATED_UP_TO` the probability is an extrapolation and the
    result has ``beyond_calibration=True``. With weights the statistic is the
    weighted H of Kerr (2011) and the name is ``"weighted H"``.

    With fewer than 20 harmonics kept, the maximum runs over those available
    (the calibration assumes 20).
    """
    series = z2_series(moments)[:MAX_HARMONICS]
    m = np.arange(1, series.size + 1)
    penalised = series - 4.0 * m + 4.0
    best = int(np.argmax(penalised))
    h = float(penalised[best])
    name = "weighted H" if moments.weighted else "H"
    return _result(name, h, best + 1, h_log_p(h), moments, beyond=h > H_CALIBRATED_UP_TO)
