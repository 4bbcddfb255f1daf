"""Pulse profiles from trigonometric moments: binned, harmonic, and their summary.

Theory of operation
-------------------
A ``PhaseMoments`` holds, for phases φ (cycles) and weights w, the sums
Σw, Σw², C_k = Σw cos 2πkφ, S_k = Σw sin 2πkφ and a weighted histogram. Two
profile estimates follow:

* the **binned profile**: Σw per bin with error sqrt(Σw²);
* the **harmonic (Fourier) profile**, the empirical density truncated at m
  harmonics (de Jager, Swanepoel & Raubenheimer 1986),

      f̂(φ) = 1 + 2 Σ_{k≤m} (α_k cos 2πkφ + β_k sin 2πkφ),   α_k = C_k/Σw, β_k = S_k/Σw,

  which has mean 1 over a cycle. Averaged over a bin of width Δ = 1/n centred at c,
  cos 2πkφ becomes sinc(kΔ)·cos 2πkc (sinc(x) = sin πx/πx), so the expected
  weighted counts per bin are (Σw/n)·[1 + 2 Σ sinc(k/n)(α_k cos 2πkc + β_k sin 2πkc)].

Every statistic of f̂ at a point is a trigonometric polynomial g(φ) averaged over
the events: (1/Σw) Σ w_i g(φ_i). Its variance is (Σw²/(Σw)²)·Var[g(φ)], and
Var[g] is itself an average of the trigonometric polynomial g², whose coefficients
are the convolution of those of g. It is evaluated with the data's own
moments (harmonics above those kept are taken as zero). For uniform phases this
reduces to Var α_k = Var β_k = Σw²/(2(Σw)²), uncorrelated; a strong pulse makes
the variance at its flanks larger than that.

The peak phase φ̂ solves f̂'(φ̂) = 0; by the delta method
σ_φ = sqrt(Var f̂'(φ̂)) / |f̂''(φ̂)|.

Pulsed fractions (standard Fourier identities): minimum-based 1 − min f̂; peak-to-trough
(max − min)/(max + min); RMS, bias-corrected, sqrt(2 Σ_{k≤m}(α_k² + β_k²) − 2m Σw²/(Σw)²),
which for unit weights is sqrt((Z²_m − 2m)/N).

References
----------
de Jager O.C., Swanepoel J.W.H., Raubenheimer B.C. 1986, A&A 170, 187 (from memory).
de Jager O.C., Raubenheimer B.C., Swanepoel J.W.H. 1989, A&A 221, 180 (H-test; best m).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from turnstamp.core.moments import PhaseMoments
from turnstamp.core.periodicity import h_test, z2_series

__all__ = [
    "BinnedProfile",
    "ProfileSummary",
    "binned_profile",
    "harmonic_density",
    "harmonic_profile",
    "summarize_profile",
]

_GRID_PER_HARMONIC = 32  # extremum search grid: step 1/(32 m) cycles, then Newton
_MIN_GRID = 512


@dataclass(frozen=True)
class BinnedProfile:
    """A pulse profile on equal phase bins.

    Attributes
    ----------
    edges_cycles : numpy.ndarray
        Bin edges, n + 1 values from 0 to 1 cycles.
    counts : numpy.ndarray
        Weighted counts Σw per bin (or their expectation, for a harmonic profile).
    errors : numpy.ndarray
        1σ uncertainty of ``counts`` (weighted counts).
    """

    edges_cycles: np.ndarray
    counts: np.ndarray
    errors: np.ndarray

    @property
    def bins(self) -> int:
        """Number of bins n."""
        return int(self.counts.size)

    @property
    def centres_cycles(self) -> np.ndarray:
        """Bin centres, cycles."""
        return 0.5 * (self.edges_cycles[:-1] + self.edges_cycles[1:])

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly lists."""
        return {
            "edges_cycles": self.edges_cycles.tolist(),
            "counts": self.counts.tolist(),
            "errors": self.errors.tolist(),
        }


@dataclass(frozen=True)
class ProfileSummary:
    """Shape numbers of the harmonic profile f̂ (mean 1 over a cycle).

    Attributes
    ----------
    harmonics : int
        Number of harmonics m in f̂.
    count : int
        Events.
    sum_w : float
        Σw (weighted counts).
    density_min, density_max : float
        min and max of f̂ (dimensionless; the minimum can dip below 0 from noise).
    trough_phase_cycles : float
        Phase of the minimum of f̂, cycles [0, 1).
    background_per_bin : float
        Weighted counts per bin of ``bins`` equal bins at the minimum of f̂
        (max(density_min, 0)·Σw/bins).
    bins : int
        Bins that ``background_per_bin`` refers to (those of the moments' histogram).
    pulsed_fraction_min : float
        1 − max(density_min, 0).
    pulsed_fraction_peak_to_trough : float
        (max − min)/(max + min) of f̂, with the minimum clipped at 0.
    pulsed_fraction_rms : float
        Bias-corrected RMS pulsed fraction (0 when the bias exceeds the power).
    peak_phase_cycles : float
        Phase of the maximum of f̂, cycles [0, 1).
    peak_phase_sigma_cycles : float
        1σ uncertainty of ``peak_phase_cycles`` (delta method), cycles.
    """

    harmonics: int
    count: int
    sum_w: float
    density_min: float
    density_max: float
    trough_phase_cycles: float
    background_per_bin: float
    bins: int
    pulsed_fraction_min: float
    pulsed_fraction_peak_to_trough: float
    pulsed_fraction_rms: float
    peak_phase_cycles: float
    peak_phase_sigma_cycles: float

    def to_dict(self) -> dict[str, Any]:
        """JSON-friendly dict (non-finite numbers become None)."""
        return {
            key: (None if isinstance(v, float) and not math.isfinite(v) else v)
            for key, v in asdict(self).items()
        }


# --------------------------------------------------------------------------------------


def _check_moments(moments: PhaseMoments) -> None:
    if not moments.sum_w > 0.0:
        raise ValueError(
            f"moments.sum_w = {moments.sum_w!r}: the profile of no events is undefined"
        )


def _check_harmonics(moments: PhaseMoments, harmonics: int, minimum: int = 0) -> int:
    if isinstance(harmonics, bool) or not isinstance(harmonics, (int, np.integer)) or not (
        minimum <= harmonics <= moments.harmonics
    ):
        raise ValueError(
            f"harmonics = {harmonics!r}: must be an integer in {minimum}..{moments.harmonics}"
        )
    return int(harmonics)


def _coefficients(moments: PhaseMoments, m: int) -> np.ndarray:
    """ρ_k = α_k + iβ_k = (C_k + iS_k)/Σw for k = 1..m."""
    return (np.asarray(moments.cos_sums[:m]) + 1j * np.asarray(moments.sin_sums[:m])) / float(
        moments.sum_w
    )


def _evaluate(rho: np.ndarray, phases: Any, order: int = 0) -> np.ndarray:
    """d^order f̂/dφ^order with f̂ = 1 + 2 Re Σ ρ_k* e^{2πikφ}; φ in cycles."""
    k = np.arange(1, rho.size + 1)
    phases = np.asarray(phases, dtype=float)
    terms = np.exp(2j * np.pi * np.multiply.outer(phases, k)) * (2j * np.pi * k) ** order
    value = 2.0 * np.real(terms @ np.conj(rho))
    return value + 1.0 if order == 0 else value


def _variance_of_mean(moments: PhaseMoments, g: np.ndarray) -> float:
    """Var of (1/Σw) Σ w_i g(φ_i) for g = Σ_{n=−m..m} g_n e^{−2πinφ}.

    Var = (Σw²/(Σw)²)·(E[g²] − E[g]²), the expectations taken with the data's own
    moments E[e^{−2πinφ}] = ρ_n* (zero beyond the harmonics kept).
    """
    m = (g.size - 1) // 2
    available = moments.harmonics
    rho = np.zeros(2 * m, dtype=complex)
    top = min(2 * m, available)
    rho[:top] = _coefficients(moments, top)
    expect = np.concatenate([rho[::-1], [1.0], np.conj(rho)])  # n = −2m..2m
    g2 = np.convolve(g, g)
    mean = complex(g @ expect[m : 3 * m + 1])
    second = float(np.real(g2 @ expect))
    var = max(second - mean.real**2, 0.0)
    return var * float(moments.sum_w2) / float(moments.sum_w) ** 2


def _two_sided(positive: np.ndarray) -> np.ndarray:
    """Coefficients of 2 Re Σ_k a_k e^{−2πikφ} on n = −m..m."""
    return np.concatenate([np.conj(positive[::-1]), [0.0], positive])


def _extremum(rho: np.ndarray, start: float, sign: float) -> float:
    """Newton refinement of a maximum (sign = +1) or minimum (sign = −1) of f̂."""
    x = start
    for _ in range(20):
        d1 = float(_evaluate(rho, x, 1))
        d2 = float(_evaluate(rho, x, 2))
        if sign * d2 >= 0:
            break
        step = -d1 / d2
        if abs(step) > 0.05 / max(rho.size, 1):
            break
        x += step
        if abs(step) < 1e-13:
            break
    return float(np.remainder(x, 1.0))


# --------------------------------------------------------------------------------------


def binned_profile(moments: PhaseMoments) -> BinnedProfile:
    """Weighted histogram of the phases.

    Parameters
    ----------
    moments : PhaseMoments
        Moments of the phases (cycles).

    Returns
    -------
    BinnedProfile
        ``moments.bins`` equal bins on [0, 1) cycles; counts Σw, errors sqrt(Σw²).
    """
    n = int(moments.bins)
    return BinnedProfile(
        edges_cycles=np.linspace(0.0, 1.0, n + 1),
        counts=np.asarray(moments.hist_w, dtype=float).copy(),
        errors=np.sqrt(np.asarray(moments.hist_w2, dtype=float)),
    )


def harmonic_density(moments: PhaseMoments, harmonics: int, phases) -> np.ndarray:
    """Empirical Fourier density f̂(φ) truncated at ``harmonics``.

    Parameters
    ----------
    moments : PhaseMoments
        Moments of the phases (cycles), with Σw > 0.
    harmonics : int
        Number of harmonics m, 0..moments.harmonics (0 gives the flat density 1).
    phases : array_like
        Where to evaluate, cycles.

    Returns
    -------
    numpy.ndarray
        f̂(φ) = 1 + 2 Σ_{k≤m}(α_k cos 2πkφ + β_k sin 2πkφ), dimensionless, mean 1.
    """
    _check_moments(moments)
    m = _check_harmonics(moments, harmonics)
    return _evaluate(_coefficients(moments, m), np.asarray(phases, dtype=float))


def harmonic_profile(
    moments: PhaseMoments, harmonics: int, bins: int | None = None
) -> BinnedProfile:
    """Expected weighted counts per bin from f̂, comparable with :func:`binned_profile`.

    Parameters
    ----------
    moments : PhaseMoments
        Moments of the phases (cycles), with Σw > 0.
    harmonics : int
        Number of harmonics m, 0..moments.harmonics.
    bins : int, optional
        Number of equal bins on [0, 1); default ``moments.bins``.

    Returns
    -------
    BinnedProfile
        counts_b = (Σw/n)·[1 + 2 Σ_k sinc(k/n)(α_k cos 2πkc_b + β_k sin 2πkc_b)], the exact
        bin average of f̂; errors are their 1σ statistical uncertainty (module notes).
    """
    _check_moments(moments)
    m = _check_harmonics(moments, harmonics)
    n = int(moments.bins if bins is None else bins)
    if n < 1:
        raise ValueError(f"bins = {bins!r}: must be >= 1")
    rho = _coefficients(moments, m)
    k = np.arange(1, m + 1)
    damped = rho * np.sinc(k / n)
    edges = np.linspace(0.0, 1.0, n + 1)
    centres = 0.5 * (edges[:-1] + edges[1:])
    scale = float(moments.sum_w) / n
    counts = scale * _evaluate(damped, centres)
    errors = np.empty(n)
    for b, c in enumerate(centres):
        # bin average of f̂ is the event mean of 1 + 2 Re Σ_k sinc(k/n) e^{2πikc} e^{−2πikφ}
        a = np.sinc(k / n) * np.exp(2j * np.pi * k * c)
        errors[b] = scale * math.sqrt(_variance_of_mean(moments, _two_sided(a)))
    return BinnedProfile(edges_cycles=edges, counts=counts, errors=errors)


def summarize_profile(moments: PhaseMoments, harmonics: int | None = None) -> ProfileSummary:
    """Background level, pulsed fractions and peak phase of the harmonic profile.

    Parameters
    ----------
    moments : PhaseMoments
        Moments of the phases (cycles), with Σw > 0.
    harmonics : int, optional
        Number of harmonics m (1..moments.harmonics); default the H-test's best m.

    Returns
    -------
    ProfileSummary
        See its attributes. Phases in cycles, levels in weighted counts per bin.

    Notes
    -----
    The peak-phase error is the delta-method σ_φ = sqrt(Var f̂'(φ̂))/|f̂''(φ̂)|, valid
    when the peak stands well above the noise; with several peaks of similar height
    the reported peak may jump between them. It is calibrated (Monte Carlo coverage)
    for a fixed m; when m is chosen by the H-test on the same data the spread is
    larger (about 1.3σ in a simulation at 10% pulsed fraction), so pass ``harmonics``
    when the error matters. For an asymmetric peak the truncated series peaks away
    from the true maximum (a bias, not counted in σ_φ).
    """
    _check_moments(moments)
    m = h_test(moments).harmonics if harmonics is None else _check_harmonics(moments, harmonics, 1)
    rho = _coefficients(moments, m)
    k = np.arange(1, m + 1)
    n_grid = max(_MIN_GRID, _GRID_PER_HARMONIC * m)
    grid = np.arange(n_grid) / n_grid
    values = _evaluate(rho, grid)
    peak = _extremum(rho, float(grid[np.argmax(values)]), +1.0)
    trough = _extremum(rho, float(grid[np.argmin(values)]), -1.0)
    f_max = max(float(_evaluate(rho, peak)), float(values.max()))
    f_min = min(float(_evaluate(rho, trough)), float(values.min()))

    # f̂'(φ̂) is the event mean of g(φ) = 2 Re Σ_k (2πik) e^{2πikφ̂} e^{−2πikφ}
    a = 2j * np.pi * k * np.exp(2j * np.pi * k * peak)
    var_slope = _variance_of_mean(moments, _two_sided(a))
    curvature = float(_evaluate(rho, peak, 2))
    sigma_peak = math.sqrt(var_slope) / abs(curvature) if curvature < 0 else math.inf

    floor = max(f_min, 0.0)
    bins = int(moments.bins)
    z2 = float(z2_series(moments)[m - 1])
    ratio = float(moments.sum_w2) / float(moments.sum_w) ** 2
    rms_sq = (z2 - 2.0 * m) * ratio
    return ProfileSummary(
        harmonics=int(m),
        count=int(moments.count),
        sum_w=float(moments.sum_w),
        density_min=f_min,
        density_max=f_max,
        trough_phase_cycles=trough,
        background_per_bin=floor * float(moments.sum_w) / bins,
        bins=bins,
        pulsed_fraction_min=1.0 - floor,
        pulsed_fraction_peak_to_trough=(f_max - floor) / (f_max + floor),
        pulsed_fraction_rms=math.sqrt(rms_sq) if rms_sq > 0 else 0.0,
        peak_phase_cycles=peak,
        peak_phase_sigma_cycles=sigma_peak,
    )
