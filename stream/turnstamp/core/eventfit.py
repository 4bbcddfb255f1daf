"""Maximum-likelihood phase offset from the events' own phases (where they are kept).

Theory of operation
-------------------
The moments fit (:mod:`turnstamp.core.templatelikelihood`) sees the data through 20
harmonics. Where the events' phases are at hand (an archive checked the morning
after), the offset is fitted to them directly. Event i of weight w_i (a probability
of being from the pulsar; 1 without weights) at phase φ_i has density

    f_i(δ, p) = 1 + w_i·p·(s(φ_i − δ) − 1)

(s the template's pulsed shape of unit area, p the pulsed fraction of the source's
events; Kerr 2011, eq. 2, from memory), and the fit maximises ℓ = Σ log f_i.
p is profiled out: ℓ is concave in p, so for each δ safeguarded Newton finds p̂(δ) in
[0, p_max] (p_max keeps every f_i > 0). δ follows safeguarded Newton on the profile
ℓ_p(δ) = ℓ(δ, p̂(δ)) from the moments fit, whose grid search over the whole cycle
already chose the peak (and says whether another is comparably likely). By the
envelope theorem ℓ_p' = ∂ℓ/∂δ and, with p̂ inside its range,
ℓ_p'' = ℓ_δδ − ℓ_δp²/ℓ_pp (the observed information of δ with p unknown).

σ is the observed-information error sqrt(−1/ℓ_p''); the 68% interval is where
ℓ_p ≥ max − ½ (profile likelihood), asymmetric near threshold, and σ the larger of
the curvature error and the interval's half width. Fits near threshold are widened as
the moments fit's are (the same measured calibration, ``turnstamp bench --clock``).

s, s' and s'' are tabulated on 4 096 phases from the template's Fourier
coefficients (peaks: to 1e-12 of the first; a binned profile: its trigonometric
interpolant through the bin centres, the step function's sinc(k/n) divided out,
up to k < n/2), read by linear interpolation; s is kept ≥ 0. A whole night of
events is fitted by cells of phase (``COMPACT_ABOVE``), at the cost of a chunk's.

References
----------
Kerr M. 2011, ApJ 732, 38 (weighted photon likelihood; from memory). Cramér H. 1946,
Mathematical Methods of Statistics (the bound the fit reaches; from memory).
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np

from .cycles import wrap_cycles
from .template import PulseTemplate
from .templatefit import OffsetFit
from .templatelikelihood import bracketed_root, widening

__all__ = ["refine_with_events", "template_tables", "TABLE_SIZE"]

TABLE_SIZE = 4096
"""Phases tabulated per cycle (linear interpolation error ~ (1/4096)²/8 of s'')."""
_MAX_HARMONIC = TABLE_SIZE // 2 - 1
_TAIL = 1e-12  # peaks: harmonics kept while |S_k| exceeds this × |S_1|
COMPACT_ABOVE = 1 << 18
"""More events than this are fitted by cells of phase (2¹⁶ a cycle; weighted: 2¹² × 256
weight levels), each its events' mean phase and weight counted as many times: the
phases move by ≪ a peak's width: on 10⁶ events the maximum moves by 3e-12 cycles."""
_QUADRATIC_Z = 10.0  # amplitude / σ above which ℓ_p is taken as quadratic (no bracketing)
_TABLES: dict[int, tuple[PulseTemplate, np.ndarray]] = {}


def template_tables(template: PulseTemplate) -> np.ndarray:
    """s, s', s'' of the template's pulsed shape on ``TABLE_SIZE`` + 1 phases (cycles⁻¹,
    cycles⁻², cycles⁻³; the last column repeats the first), shape (3, TABLE_SIZE + 1)."""
    kept = _TABLES.get(id(template))
    if kept is not None and kept[0] is template:
        return kept[1]
    if template.max_harmonic is None:
        coefficients = template.fourier(_MAX_HARMONIC)
        strong = np.flatnonzero(np.abs(coefficients) > _TAIL * abs(coefficients[0]))
        coefficients = coefficients[:int(strong[-1]) + 1 if strong.size else 1]
    else:
        n = len(template.binned_profile or ())
        k = np.arange(1, min((n - 1) // 2, _MAX_HARMONIC) + 1)
        coefficients = template.fourier(k.size) / np.sinc(k / n)
    spectrum = np.zeros(TABLE_SIZE // 2 + 1, dtype=complex)
    spectrum[:coefficients.size + 1] = TABLE_SIZE * np.conj(np.concatenate([[1.0],
                                                                            coefficients]))
    ik = 2j * np.pi * np.arange(spectrum.size)  # d/dx of conj(S_k) e^{+2πikx}
    rows = np.array([np.fft.irfft(spectrum * ik**order, TABLE_SIZE) for order in (0, 1, 2)])
    rows[0] = np.maximum(rows[0], 0.0)
    table = np.concatenate([rows, rows[:, :1]], axis=1)
    if len(_TABLES) > 64:
        _TABLES.clear()
    _TABLES[id(template)] = (template, table)
    return table


def _compact(phases: np.ndarray, weights: np.ndarray | None):
    """(phases, weights, multiplicities): above ``COMPACT_ABOVE`` events, the events of
    each cell of phase (and weight) as one event of their mean phase (and weight)
    counted as many times; else the events themselves (multiplicities None)."""
    if phases.size <= COMPACT_ABOVE:
        return phases, weights, None
    if weights is None:
        cell, length = (phases * (1 << 16)).astype(np.int64), 1 << 16
    else:
        top = max(float(weights.max()), 1e-300)
        level = np.rint(weights * (255.0 / top)).astype(np.int64)
        cell, length = (phases * (1 << 12)).astype(np.int64) * 256 + level, 1 << 20
    count = np.bincount(cell, minlength=length)
    kept = count > 0
    n = count[kept].astype(float)
    mean_phase = np.bincount(cell, phases, length)[kept] / n
    mean_weight = None if weights is None else np.bincount(cell, weights, length)[kept] / n
    return mean_phase, mean_weight, n


class _Profile:
    """ℓ_p(δ) of one set of events, with its first two derivatives."""

    def __init__(self, phases: np.ndarray, weights: np.ndarray | None, table: np.ndarray):
        phases = np.remainder(np.asarray(phases, dtype=float), 1.0)
        weights = None if weights is None else np.asarray(weights, dtype=float)
        self.phases, self.weights, self.count = _compact(phases, weights)
        self.table = table
        self.fraction = 0.5
        self.top = 1.0

    def _sum(self, x: np.ndarray) -> float:
        return float(x.sum()) if self.count is None else float(self.count @ x)

    def _shape(self, shift: float):
        x = np.remainder(self.phases - shift, 1.0) * TABLE_SIZE
        i = np.minimum(x.astype(np.int64), TABLE_SIZE - 1)
        t = x - i
        lo, hi = self.table[:, i], self.table[:, i + 1]
        return lo + t * (hi - lo)

    def _fraction(self, a: np.ndarray) -> tuple[float, float]:
        """p̂ maximising Σ log(1 + p·a) on [0, p_max], and ℓ_pp there (safeguarded Newton)."""
        worst = float(-a.min()) if a.size else 0.0
        top = self.top = min(1.0, (1.0 - 1e-9) / worst) if worst > 0 else 1.0
        lo, hi, p = 0.0, top, min(max(self.fraction, 0.0), top)
        for _ in range(60):
            ratio = a / (1.0 + p * a)
            slope, curve = self._sum(ratio), -self._sum(ratio * ratio)
            if slope > 0:
                lo = p
            else:
                hi = p
            if (p == 0.0 and slope <= 0) or (p == top and slope >= 0):
                return p, curve
            step = p - slope / curve if curve < 0 else 0.5 * (lo + hi)
            new = step if lo < step < hi else 0.5 * (lo + hi)
            if abs(new - p) <= 1e-9 * max(p, 1e-3):
                return new, curve
            p = new
        return p, curve

    def local(self, shift: float) -> tuple[float, float, float, float, float]:
        """(ℓ_p, ℓ_p', ℓ_p'', p̂, ℓ_pp) at ``shift`` cycles."""
        s, ds, d2s = self._shape(shift)
        w = 1.0 if self.weights is None else self.weights
        a = w * (s - 1.0)
        p, lpp = self._fraction(a)
        self.fraction = p
        f = 1.0 + p * a
        score = w * ds / f
        value = self._sum(np.log(f))
        slope = -p * self._sum(score)
        curve = self._sum(p * w * d2s / f - (p * score) ** 2)
        if 0.0 < p < self.top and lpp < 0:
            cross = -self._sum(score / f)
            curve -= cross * cross / lpp
        return value, slope, curve, p, lpp

    def maximum(self, start: float, reach: float, tolerance: float) -> tuple[float, tuple]:
        """Safeguarded Newton on ℓ_p' = 0 from ``start`` (steps at most ``reach`` cycles,
        halved while both ℓ_p and |ℓ_p'| get worse) until a step is below ``tolerance``
        cycles; the maximum and ``local`` there."""
        shift, here = start, self.local(start)
        for _ in range(50):
            value, slope, curve = here[:3]
            step = -slope / curve if curve < 0 else math.copysign(reach, slope)
            step = max(-reach, min(reach, step))
            for _ in range(30):
                trial = self.local(shift + step)
                # near the maximum ℓ_p's change is below its rounding: the slope decides
                if trial[0] >= value or abs(trial[1]) < abs(slope):
                    break
                step *= 0.5
            shift, here = shift + step, trial
            if abs(step) <= tolerance:
                break
        return shift, here

    def bound(self, shift: float, best: float, direction: float, sigma: float) -> float:
        """Distance (cycles, ≤ 0.5) to where ℓ_p falls ½ below ``best`` on one side."""
        left, right = 0.0, min(sigma, 0.5)
        while self.local(shift + direction * right)[0] > best - 0.5:
            if right >= 0.5:
                return 0.5
            left, right = right, min(2.0 * right, 0.5)

        def slope(x: float) -> tuple[float, float]:  # increasing: the fall below best − ½
            value, d1, _, _, _ = self.local(shift + direction * x)
            return best - 0.5 - value, -direction * d1

        return bracketed_root(slope, left, right, 0.5 * (left + right), tolerance=1e-3 * sigma)


def refine_with_events(fit: OffsetFit, phases, template: PulseTemplate,
                       weights=None) -> OffsetFit:
    """The moments fit ``fit`` refined on the events' phases (see the theory of operation).

    Parameters
    ----------
    fit : OffsetFit
        The moments fit of the same events (its shift starts the search; detection,
        significance and ambiguity are kept from it).
    phases : array_like
        Event phases, cycles.
    template : PulseTemplate
        The expected pulse.
    weights : array_like, optional
        Photon weights in [0, 1] (probability of coming from the pulsar); None for 1.

    Returns
    -------
    OffsetFit
        ``method="events"``: shift (cycles, positive = data later), its 1σ and 68%
        interval, amplitude p̂·Σw and its σ. ``fit`` unchanged when it has no shift
        or there are no events.
    """
    phases = np.asarray(phases, dtype=float)
    if phases.size == 0 or not math.isfinite(fit.shift_cycles):
        return fit
    profile = _Profile(phases, weights, template_tables(template))
    profile.fraction = min(max(fit.amplitude / fit.sum_w, 0.01), 0.99) \
        if fit.sum_w > 0 and math.isfinite(fit.amplitude) else 0.5
    scale = min(fit.curvature_sigma_cycles, fit.sigma_cycles, 0.05) \
        if math.isfinite(fit.sigma_cycles) else 0.05
    scale = max(scale, 1e-6)
    shift, (best, _, curve, p, lpp) = profile.maximum(fit.shift_cycles, scale, 1e-6 * scale)
    curvature_sigma = math.sqrt(-1.0 / curve) if curve < 0 else math.inf
    sum_w = float(np.sum(weights)) if weights is not None else float(phases.size)
    amplitude_sigma = sum_w / math.sqrt(-lpp) if lpp < 0 else math.inf
    z = p * sum_w / amplitude_sigma if amplitude_sigma > 0 else 0.0
    factor = widening(z)
    if z >= _QUADRATIC_Z and math.isfinite(curvature_sigma):
        low = high = curvature_sigma
    else:
        start = curvature_sigma if math.isfinite(curvature_sigma) else 0.05
        low = profile.bound(shift, best, -1.0, start)
        high = profile.bound(shift, best, +1.0, start)
    sigma = min(max(curvature_sigma, 0.5 * (low + high)) * factor, 0.5)
    wrapped = wrap_cycles(shift)
    return replace(fit, shift_cycles=wrapped, sigma_cycles=sigma,
                   curvature_sigma_cycles=curvature_sigma,
                   interval_cycles=(wrapped - low * factor, wrapped + high * factor),
                   amplitude=p * sum_w, amplitude_sigma=amplitude_sigma, method="events")
