"""Maximum-likelihood phase offset of photon data against a template, from its moments.

Theory of operation
-------------------
Event phases x = φ − δ (cycles) follow f(x) = 1 − p + p·s(x), s the template's
pulsed shape (unit area) and p the pulsed fraction. The data enter through the
trigonometric moments P_k = Σ w e^{2πikφ}, k = 1..m; rotated to a trial offset δ,
y(δ) = (Re, Im of P_k e^{−2πikδ}) is a sum of independent terms, so (central limit)
y ≈ Normal(W₁·p·μ, W₂·C(p)) with μ = (Re S_k, Im S_k), W₁ = Σw, W₂ = Σw² and C(p)
the covariance of one event's (cos 2πkx, sin 2πkx) under f, exact through S_n for
n ≤ 2m (:func:`turnstamp.core.templatenoise.moment_covariance`). The fit minimises

    Q(δ, p) = (y(δ) − W₁ p μ)ᵀ [W₂ C(p̃)]⁻¹ (y(δ) − W₁ p μ),    p ≥ 0,

the generalised least-squares (optimal generalised-method-of-moments) distance of
the moments: its estimator is the efficient one among those built on these
moments, reaching the Cramér–Rao bound 1/(N ∫ f'²/f dx) whenever the score
∂ log f/∂δ is well described by m harmonics. p is profiled out exactly (in
whitened coordinates p̂(δ) = max(tᵀỹ, 0)/|t|²; the constraint p ≥ 0 stops a
shape from fitting its own negative half a cycle away); p̃ is updated from p̂ and
the fit repeated (three rounds at most). Under uniform phases (p̃ = 0) C = ½I and Q
is Taylor's (1992) cross-correlation.

Steps: Q on a grid of step 1/max(128, 16m) cycles (every local minimum bracketed),
safeguarded Newton on Q' = 0 from the best node. σ comes from the observed
information 2/Q''. The 68% interval is where Q − Q_min ≤ 1 (profile likelihood,
asymmetric near threshold), and near threshold both are widened by
sqrt(z²/(z² − ``CALIBRATION``)), z = p̂/σ_p̂: fits selected by a detection cut
are mostly upward fluctuations of the amplitude, whose observed information then
overstates the precision; the factor is a calibration measured by
``turnstamp bench --clock`` (1σ and 2σ coverage). A second local minimum within
Δχ² ≤ ``AMBIGUITY_DELTA_CHI2`` makes the fit *ambiguous* (two peaks comparably
likely, e.g. main pulse and interpulse).

References
----------
Hansen L.P. 1982, Econometrica 50, 1029 (efficient generalised method of moments;
from memory). Taylor J.H. 1992, Phil. Trans. R. Soc. Lond. A 341, 117.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from .cycles import wrap_cycles
from .templatenoise import moment_covariance

__all__ = ["LikelihoodFit", "likelihood_offset", "bracketed_root", "AMBIGUITY_DELTA_CHI2",
           "CALIBRATION", "widening"]

AMBIGUITY_DELTA_CHI2 = 4.0
"""A second minimum of Q closer than this to the best makes the fit ambiguous."""
CALIBRATION = 2.0
"""κ of the near-threshold widening sqrt(z²/(z² − κ)) (measured: ``turnstamp bench --clock``)."""
_ROUNDS = 3  # updates of the covariance's pulsed fraction
_RIDGE = (1e-5, 0.03, 10.0)  # relative ridge of the covariance: clip(10/N, 1e-5, 0.03)
_MAX_WIDENING = 2.0


@dataclass(frozen=True)
class LikelihoodFit:
    """Result of :func:`likelihood_offset` (cycles; amplitudes in weighted counts)."""

    shift_cycles: float
    sigma_cycles: float
    curvature_sigma_cycles: float
    interval_cycles: tuple[float, float]
    amplitude: float
    amplitude_sigma: float
    ambiguous: bool
    alternative_shift_cycles: float | None
    alternative_delta_chi2: float


def bracketed_root(slope: Callable[[float], tuple[float, float]], left: float, right: float,
                   start: float, tolerance: float = 1e-12) -> float:
    """Root of an increasing function g in [left, right] (g(left) < 0 < g(right)).

    Newton's method on ``slope(x) -> (g, g')``, with a step leaving the shrinking
    bracket replaced by bisection.
    """
    x = start
    for _ in range(60):
        g, dg = slope(x)
        if g < 0:
            left = x
        else:
            right = x
        trial = x - g / dg if dg > 0 else 0.5 * (left + right)
        if not left < trial < right:
            trial = 0.5 * (left + right)
        if abs(trial - x) < tolerance:
            return trial
        x = trial
    return x


class _Objective:
    """Q(δ) profiled over p ≥ 0, with the covariance at pulsed fraction ``fraction``.

    With M = [W₂C]⁻¹ in blocks (cos, sin) and z_k = P_k e^{−2πikδ}, the quadratic
    yᵀMy = 2 Re Σ_jk [A_jk z_j z_k + B_jk z_j z_k*], A = ¼(M_cc − M_ss) − ½i M_cs,
    B = ¼(M_cc + M_ss) + ½i M_cs, is a trigonometric polynomial in δ (frequencies
    −(m−1)..2m), and so is the projection tᵀỹ = Re Σ_k v_k z_k: both are summed once,
    after which Q and its derivatives cost O(m) per shift and a grid one FFT.
    """

    def __init__(self, data: np.ndarray, sum_w: float, sum_w2: float, extended: np.ndarray,
                 fraction: float):
        m = data.size
        unit, covariance = moment_covariance(extended, m, fraction)
        inverse = _inverse(sum_w2 * covariance, _ridge(sum_w, sum_w2))
        cc, cs, ss = inverse[:m, :m], inverse[:m, m:], inverse[m:, m:]
        plus = (0.25 * (cc - ss) - 0.5j * cs) * np.outer(data, data)
        cross = (0.25 * (cc + ss) + 0.5j * cs) * np.outer(data, np.conj(data))
        j = np.arange(m)
        self.frequencies = np.arange(-(m - 1), 2 * m + 1)
        size = self.frequencies.size
        quadratic = np.zeros(size, complex)
        for index, values in (((j[:, None] + j[None, :] + 2) + (m - 1), plus),
                              ((j[:, None] - j[None, :]) + (m - 1), cross)):
            flat = index.ravel()
            quadratic += np.bincount(flat, values.real.ravel(), size) \
                + 1j * np.bincount(flat, values.imag.ravel(), size)
        self.quadratic = 2.0 * quadratic
        u = sum_w * (inverse @ unit)
        self.linear = (u[:m] - 1j * u[m:]) * data
        self.k = np.arange(1, m + 1)
        self.tt = float(sum_w * sum_w * unit @ inverse @ unit)
        self.unit, self.inverse, self.sum_w2 = unit, inverse, sum_w2
        rate = -2j * np.pi * self.frequencies
        # rows: the coefficients of Q and of tᵀỹ times (−2πin)^order, order = 0, 1, 2
        linear = np.zeros(size, complex)
        linear[self.k + (m - 1)] = self.linear
        self._derivatives = np.concatenate([
            np.stack([self.quadratic * rate**order for order in range(3)]),
            np.stack([linear * rate**order for order in range(3)])])
        self._rate = rate

    def values(self, shifts) -> np.ndarray:
        """Q(δ) at each shift (cycles)."""
        shifts = np.atleast_1d(np.asarray(shifts, dtype=float))
        # elementwise sums: BLAS threads cost more than they save on arrays this small
        phase = np.exp(-2j * np.pi * np.outer(self.frequencies, shifts))
        quadratic = np.real(np.sum(self.quadratic[:, None] * phase, axis=0))
        linear = phase[self.k + (self.k.size - 1)]  # frequencies 1..m
        a = np.maximum(np.real(np.sum(self.linear[:, None] * linear, axis=0)), 0.0)
        return quadratic - a * a / self.tt

    def on_grid(self, n: int) -> np.ndarray:
        """Q(j/n), j = 0..n−1, by FFT (the coefficients folded modulo n: exact)."""
        quadratic = np.zeros(n, complex)
        np.add.at(quadratic, self.frequencies % n, self.quadratic)
        linear = np.zeros(n, complex)
        np.add.at(linear, self.k % n, self.linear)
        a = np.maximum(np.real(np.fft.fft(linear)), 0.0)
        return np.real(np.fft.fft(quadratic)) - a * a / self.tt

    def local(self, shift: float) -> tuple[float, float, float, float]:
        """(Q, Q', Q'', tᵀỹ) at one shift."""
        q, q1, q2, a, a1, a2 = np.real(self._derivatives @ np.exp(self._rate * shift)).tolist()
        if a > 0:
            q -= a * a / self.tt
            q1 -= 2.0 * a * a1 / self.tt
            q2 -= 2.0 * (a1 * a1 + a * a2) / self.tt
        return q, q1, q2, a

    def minimum(self, node: float, step: float) -> float:
        """The local minimum of Q within a grid step of ``node``."""
        left, right = node - step, node + step
        if self.local(left)[1] >= 0 or self.local(right)[1] <= 0:
            return node  # flat or degenerate: keep the grid node
        return bracketed_root(lambda x: self.local(x)[1:3], left, right, node)


def _sandwich_factor(objective: _Objective, extended: np.ndarray, fraction: float) -> float:
    """Var ŝ (sandwich) over the observed-information variance, when the fit's weight
    matrix is not exactly the inverse covariance at the data's ``fraction`` (it was
    built at the previous round's fraction, with a ridge).

    Linearising Q'/2 ≈ μᵀJᵀ(WP)e about the truth (J the rotation generator, W the
    weight, P = I − μμᵀW/μᵀWμ removing the amplitude, e the noise of covariance Ω):
    Var ŝ = hᵀΩh / (μᵀJᵀWPJμ)², h = WPJμ, which is 1/(μᵀJᵀWPJμ) when W = Ω⁻¹.
    """
    m = objective.k.size
    unit, weight = objective.unit, objective.inverse
    k2pi = 2.0 * np.pi * np.concatenate([objective.k, objective.k])
    turned = k2pi * np.concatenate([unit[m:], -unit[:m]])  # J μ: d/dδ of the rotated mean
    weighted = weight @ unit
    projected = weight @ turned - weighted * (weighted @ turned) / (unit @ weighted)
    _, truth = moment_covariance(extended, m, fraction)
    information = float(turned @ projected)
    return float(projected @ truth @ projected) / information if information > 0 else 1.0


def _ridge(sum_w: float, sum_w2: float) -> float:
    """Relative ridge of the covariance for N_eff = (Σw)²/Σw² events.

    At p → 1 a narrow peak makes the covariance nearly singular; along directions whose
    variance is below ~10/N of the largest, the moments are too few to be Gaussian and
    the constraint they express is template detail no real pulse follows exactly. Their
    weight is capped (the sandwich error accounts for the misweighting). Measured by
    ``turnstamp bench --clock``: without it the scatter at N = 300 and no background
    was 1.2–1.4× the bound.
    """
    low, high, scale = _RIDGE
    effective = sum_w * sum_w / sum_w2 if sum_w2 > 0 else 1.0
    return min(max(scale / effective, low), high)


def _inverse(covariance: np.ndarray, relative: float) -> np.ndarray:
    """Inverse of a covariance with a ridge of ``relative`` times its largest variance."""
    ridge = relative * float(np.max(np.diag(covariance)))
    try:
        np.linalg.cholesky(covariance + ridge * np.eye(covariance.shape[0]))
        return np.linalg.inv(covariance + ridge * np.eye(covariance.shape[0]))
    except np.linalg.LinAlgError:
        values, vectors = np.linalg.eigh(covariance)
        values = np.maximum(values, relative * values.max())
        return (vectors / values) @ vectors.T


def _grid(m: int) -> np.ndarray:
    n = max(128, 16 * m)
    return np.arange(n) / n


def _local_minima(values: np.ndarray) -> np.ndarray:
    """Indices of the cyclic local minima of grid values, best first."""
    low = (values < np.roll(values, 1)) & (values <= np.roll(values, -1))
    index = np.flatnonzero(low)
    return index[np.argsort(values[index])]


def _alternative(objective: _Objective, grid: np.ndarray, values: np.ndarray, shift: float,
                 best: float) -> tuple[float | None, float]:
    """The second-best local minimum (its shift and Δχ² above the best), if any."""
    step = grid[1]
    for index in _local_minima(values):
        node = float(grid[index])
        if abs((node - shift + 0.5) % 1.0 - 0.5) > 1.5 * step:
            other = objective.minimum(node, step)
            return other, float(objective.values(other)[0]) - best
    return None, math.inf


def _bound(objective: _Objective, shift: float, best: float, direction: float,
           sigma: float, level: float) -> float:
    """Distance (cycles) from ``shift`` to where Q − Q_min first reaches ``level`` (≤ 0.5)."""
    scale = sigma if math.isfinite(sigma) and sigma > 0 else 0.01
    offsets = np.concatenate([scale * np.geomspace(0.25, 8.0, 16), np.linspace(0.0, 0.5, 17)])
    offsets = np.unique(offsets[(offsets > 0) & (offsets <= 0.5)])
    above = np.flatnonzero(objective.values(shift + direction * offsets) - best >= level)
    if above.size == 0:
        return 0.5
    i = int(above[0])
    left = float(offsets[i - 1]) if i > 0 else 0.0

    def slope(x: float) -> tuple[float, float]:
        q, q1, q2, _ = objective.local(shift + direction * x)
        return q - best - level, direction * q1

    return bracketed_root(slope, left, float(offsets[i]), 0.5 * (left + float(offsets[i])),
                          tolerance=1e-12)


def widening(z: float) -> float:
    """sqrt(z²/(z² − κ)), capped: the near-threshold calibration of the errors."""
    if not z > 0:
        return _MAX_WIDENING
    room = z * z - CALIBRATION
    return min(math.sqrt(z * z / room), _MAX_WIDENING) if room > 0 else _MAX_WIDENING


def likelihood_offset(data: np.ndarray, sum_w: float, sum_w2: float, extended: np.ndarray,
                      start_fraction: float) -> LikelihoodFit:
    """The maximum-likelihood offset (see the theory of operation).

    Parameters
    ----------
    data : numpy.ndarray of complex, shape (m,)
        P_k = Σ w e^{2πikφ}, k = 1..m (φ in cycles).
    sum_w, sum_w2 : float
        Σw and Σw² of the events.
    extended : numpy.ndarray of complex, shape (2m,)
        Template coefficients S_n, n = 1..2m.
    start_fraction : float
        First guess of the pulsed fraction p (e.g. from the cross-correlation amplitude).

    Returns
    -------
    LikelihoodFit
        Shift in (−0.5, 0.5] cycles (positive: data later), its calibrated 1σ and
        68% interval, the observed-information σ, the amplitude W₁p̂ and its σ, and
        the ambiguity between two comparably likely minima.
    """
    grid = _grid(data.size)
    fraction = min(max(float(start_fraction), 0.0), 1.0)
    for _ in range(_ROUNDS):
        objective = _Objective(data, sum_w, sum_w2, extended, fraction)
        values = objective.on_grid(grid.size)
        shift = objective.minimum(float(grid[int(np.argmin(values))]), float(grid[1]))
        best, _, curvature, projection = objective.local(shift)
        updated = min(max(projection / objective.tt, 0.0), 1.0)
        if abs(updated - fraction) <= 1e-3 * max(updated, 1e-2):
            break
        fraction = updated
    curvature_sigma = math.sqrt(2.0 / curvature) if curvature > 0 else math.inf
    curvature_sigma *= math.sqrt(max(_sandwich_factor(objective, extended, updated), 1.0))
    amplitude_sigma = sum_w / math.sqrt(objective.tt) if objective.tt > 0 else math.inf
    amplitude = sum_w * max(projection, 0.0) / objective.tt if objective.tt > 0 else 0.0
    factor = widening(amplitude / amplitude_sigma if amplitude_sigma > 0 else 0.0)
    low = _bound(objective, shift, best, -1.0, curvature_sigma, 1.0)
    high = _bound(objective, shift, best, +1.0, curvature_sigma, 1.0)
    sigma = min(max(curvature_sigma, 0.5 * (low + high)) * factor, 0.5)
    other, delta = _alternative(objective, grid, values, shift, best)
    wrapped = wrap_cycles(shift)
    return LikelihoodFit(
        shift_cycles=wrapped,
        sigma_cycles=sigma,
        curvature_sigma_cycles=curvature_sigma,
        interval_cycles=(wrapped - low * factor, wrapped + high * factor),
        amplitude=amplitude,
        amplitude_sigma=amplitude_sigma,
        ambiguous=bool(delta <= AMBIGUITY_DELTA_CHI2),
        alternative_shift_cycles=None if other is None else wrap_cycles(other),
        alternative_delta_chi2=delta,
    )
