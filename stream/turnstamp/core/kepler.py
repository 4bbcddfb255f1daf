"""Kepler's equation E − e sin E = M, solved for arrays of mean anomalies.

Theory of operation
-------------------
Kepler's equation is solved by vectorised Newton iteration on |M| in [0, π] (E is
odd in M). There f(E) = E − e sin E − M is increasing and convex, so Newton's method
started right of the root decreases monotonically onto it for any e < 1. The cold
start is the smallest of three points known to lie right of the root: one Newton
step from E = M, M + e, and π. The root stays bracketed by [M, min(M + e, π)],
narrowed at each step; a step leaving the bracket is replaced by bisection, which
makes warm starts from a nearby solved point (used between emission-time iterations
of :mod:`turnstamp.core.binarydelay`) safe as well. Iteration stops once the largest
step is below min(1e-8, √(2e-16 (1−e)/e)) rad, after which the quadratic-convergence
error is at rounding level (~1e-16 rad, growing as 1/(1 − e cos E) near periastron of
very eccentric orbits, as the problem's own conditioning does).
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np

__all__ = ["KeplerStart", "solve_kepler", "kepler_centred"]

_TWO_PI = 2.0 * math.pi
_KEPLER_MAX_ITERATIONS = 60


def _kepler_step_tolerance(e: float) -> float:
    """Newton step (rad) below which the solution is at rounding level.

    After a step δ the error left is at most e δ² / (2(1 − e)) (Newton's error bound with
    |f''| ≤ e and f' ≥ 1 − e), and the first-order update of sin E and cos E is off by
    at most δ²/2. Both are kept below ~1e-16.
    """
    return min(1e-8, math.sqrt(2e-16 * (1.0 - e) / e))


class KeplerStart(NamedTuple):
    """A previous solution on the half orbit, used as a warm start: |M|, E(|M|), cos E."""

    reduced_mean: np.ndarray
    ecc_anomaly: np.ndarray
    cos_e: np.ndarray


def _kepler_half_orbit(
    mean_anomaly: np.ndarray, e: float, start: KeplerStart | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Solve E − e sin E = M for M in [0, π] (0 < e < 1); return (E, sin E, cos E).

    Without ``start`` the iteration begins right of the root and Newton's method then
    decreases monotonically onto it (see the theory of operation). With ``start`` (a
    nearby solved point) it begins at the first-order prediction from there. Either
    way the root stays bracketed by [lo, hi], initially [M, min(M + e, π)], and a
    Newton step that would leave the bracket is replaced by bisection.
    """
    lo = mean_anomaly.copy()
    hi = mean_anomaly + e
    np.minimum(hi, math.pi, out=hi)
    ecc_anomaly, sin_e, cos_e = _first_guess(mean_anomaly, e, start, lo)
    np.minimum(ecc_anomaly, hi, out=ecc_anomaly)
    return _newton(mean_anomaly, e, ecc_anomaly, sin_e, cos_e, lo, hi)


def _first_guess(mean_anomaly: np.ndarray, e: float, start: KeplerStart | None,
                 lo: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Starting E (and work arrays for sin E, cos E): cold, or warm from ``start``."""
    if start is None:
        sin_e = np.sin(mean_anomaly)
        cos_e = np.cos(mean_anomaly)
        # One Newton step from E = M: right of the root by convexity (or capped by hi).
        ecc_anomaly = np.multiply(cos_e, -e)
        ecc_anomaly += 1.0
        np.divide(sin_e, ecc_anomaly, out=ecc_anomaly)
        ecc_anomaly *= e
        ecc_anomaly += mean_anomaly
        return ecc_anomaly, sin_e, cos_e
    sin_e = np.empty_like(mean_anomaly)
    cos_e = np.multiply(start.cos_e, -e)
    cos_e += 1.0
    ecc_anomaly = mean_anomaly - start.reduced_mean
    ecc_anomaly /= cos_e
    ecc_anomaly += start.ecc_anomaly
    np.maximum(ecc_anomaly, lo, out=ecc_anomaly)
    return ecc_anomaly, sin_e, cos_e


def _newton(mean_anomaly, e, ecc_anomaly, sin_e, cos_e, lo, hi):
    """Bracketed Newton iteration from ``ecc_anomaly``; returns (E, sin E, cos E)."""
    step, denominator = np.empty_like(ecc_anomaly), np.empty_like(ecc_anomaly)
    candidate, outside = np.empty_like(ecc_anomaly), np.empty(ecc_anomaly.shape, dtype=bool)
    tolerance = _kepler_step_tolerance(e)
    largest = math.nan
    for _ in range(_KEPLER_MAX_ITERATIONS):
        np.sin(ecc_anomaly, out=sin_e)
        np.cos(ecc_anomaly, out=cos_e)
        np.multiply(sin_e, -e, out=step)  # f(E) = E − e sin E − M
        step += ecc_anomaly
        step -= mean_anomaly
        # Shrink the bracket: f > 0 means E is right of the root.
        np.copyto(hi, ecc_anomaly, where=step > 0.0)
        np.copyto(lo, ecc_anomaly, where=step < 0.0)
        np.multiply(cos_e, -e, out=denominator)  # f'(E) = 1 − e cos E > 0
        denominator += 1.0
        step /= denominator
        np.subtract(ecc_anomaly, step, out=candidate)
        # A Newton step leaving [lo, hi] is replaced by bisection (never from a cold start).
        np.less(candidate, lo, out=outside)
        outside |= candidate > hi
        if outside.any():
            np.add(lo, hi, out=denominator)
            denominator *= 0.5
            np.copyto(candidate, denominator, where=outside)
            np.subtract(ecc_anomaly, candidate, out=step)
        ecc_anomaly, candidate = candidate, ecc_anomaly
        largest = max(float(step.max(initial=0.0)), -float(step.min(initial=0.0)))
        if largest < tolerance:
            # sin and cos at the updated E, to first order in the last step.
            np.multiply(step, cos_e, out=denominator)
            step *= sin_e
            sin_e -= denominator
            cos_e += step
            return ecc_anomaly, sin_e, cos_e
        if not math.isfinite(largest):
            break
    raise RuntimeError(f"Kepler iteration did not converge (e = {e!r}, last step {largest!r})")


def kepler_centred(
    mean_anomaly: np.ndarray, e: float, start: KeplerStart | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray, KeplerStart | None]:
    """Solve Kepler's equation for M in [−π, π].

    Returns (E, sin E, cos E, warm start for a nearby M); ``start`` is such a warm
    start from an earlier call on the same elements. Non-finite M gives NaN.
    """
    if e == 0.0:
        return mean_anomaly, np.sin(mean_anomaly), np.cos(mean_anomaly), None
    finite = np.isfinite(mean_anomaly)
    if not finite.all():
        ecc_anomaly = np.full_like(mean_anomaly, np.nan)
        sin_e, cos_e = ecc_anomaly.copy(), ecc_anomaly.copy()
        partial = None if start is None else KeplerStart(*(a[finite] for a in start))
        solved = kepler_centred(mean_anomaly[finite], e, partial)
        ecc_anomaly[finite], sin_e[finite], cos_e[finite] = solved[:3]
        warm = KeplerStart(*(np.full_like(mean_anomaly, np.nan) for _ in range(3)))
        assert solved[3] is not None
        for full, part in zip(warm, solved[3], strict=True):
            full[finite] = part
        return ecc_anomaly, sin_e, cos_e, warm
    # E(−M) = −E(M): solve for |M| in [0, π], then restore the signs of E and sin E.
    reduced = np.abs(mean_anomaly)
    np.minimum(reduced, math.pi, out=reduced)
    ecc_anomaly, sin_e, cos_e = _kepler_half_orbit(reduced, e, start)
    warm = KeplerStart(reduced, ecc_anomaly.copy(), cos_e.copy())
    np.copysign(ecc_anomaly, mean_anomaly, out=ecc_anomaly)
    np.copysign(sin_e, mean_anomaly, out=sin_e)
    return ecc_anomaly, sin_e, cos_e, warm


def solve_kepler(mean_anomaly_rad: np.ndarray | float, eccentricity: float) -> np.ndarray:
    """Eccentric anomaly E (rad) with E − e sin E = M, for any real M.

    Parameters
    ----------
    mean_anomaly_rad : array_like of float
        Mean anomaly M (radians), any value; whole turns are carried over to E.
    eccentricity : float
        Eccentricity, 0 ≤ e < 1 (tested up to 0.99).

    Returns
    -------
    numpy.ndarray
        Eccentric anomaly E (radians), in the same turn as M, accurate to ~1e-15 rad
        for moderate e (rounding grows as 1/(1 − e cos E) near periastron at high e).
    """
    e = float(eccentricity)
    if not 0.0 <= e < 1.0:
        raise ValueError(f"eccentricity = {eccentricity!r}: must be in [0, 1)")
    mean = np.asarray(mean_anomaly_rad, dtype=float)
    turns = np.round(mean / _TWO_PI)
    reduced = np.clip(mean - _TWO_PI * turns, -math.pi, math.pi)
    ecc_anomaly = kepler_centred(np.atleast_1d(reduced).astype(float), e)[0]
    return ecc_anomaly.reshape(mean.shape) + _TWO_PI * turns
