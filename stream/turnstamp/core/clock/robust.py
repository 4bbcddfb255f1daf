"""The chunk-offset series made safe to fit: slip-free unwrapping and rare outliers set aside.

Theory of operation
-------------------
Offsets are known modulo one cycle. Unwrapping each value against the one before
(``numpy.unwrap``) lets a single bad chunk decide the cycle count of every chunk
after it: a chunk locked onto an interpulse 0.47 cycles away, followed by an
ordinary chunk just beyond half a turn from it, turns the rest of the night into a
whole-cycle "step". ``unwrap_robust`` instead places each value within half a turn
of the last *trusted* value; a value more than ``TRUSTED_CYCLES`` from it is kept
but not trusted,
so it cannot move the predictions that follow. Three untrusted values in a row that
agree with each other are a real change of level (a step larger than a quarter
turn) and become the new trusted history.

Outliers: a chunk whose residual from the reference model exceeds k_n σ, with
k_n = Φ⁻¹(1 − α/(2n)) (α = ``NIGHT_REJECTION_ODDS``: the chance that any good chunk
of a night of n is set aside) and at least ``MIN_LIMIT_SIGMA``, is set aside.
When more than ``MAX_OUTLIER_FRACTION`` of the chunks exceed it the scatter is
real (a jitter, an unresolved wobble) and nothing is set aside.

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from ..cycles import wrap_cycles

__all__ = ["TRUSTED_CYCLES", "NIGHT_REJECTION_ODDS", "MIN_LIMIT_SIGMA", "MAX_OUTLIER_FRACTION",
           "unwrap_robust", "outlier_limit", "outliers"]

TRUSTED_CYCLES = 0.25
"""A value further than this from its prediction does not steer the unwrapping."""
NIGHT_REJECTION_ODDS = 0.01
"""Chance that a night of good chunks has any chunk set aside as an outlier."""
MIN_LIMIT_SIGMA = 4.0
"""Outlier threshold in σ, at least."""
MAX_OUTLIER_FRACTION = 0.02
"""More chunks than this fraction beyond the threshold: the scatter is real, keep them all."""
_REBASE = 3


def unwrap_robust(shifts, reference: float = 0.0) -> np.ndarray:
    """Offsets (cycles, time order) made continuous without carrying a cycle slip.

    Parameters
    ----------
    shifts : array_like
        Offsets in cycles (any cycle), in time order.
    reference : float
        Phase (cycles) the first prediction starts from.

    Returns
    -------
    numpy.ndarray
        Each offset moved by whole cycles to lie within half a turn of its prediction.
    """
    values = np.atleast_1d(np.asarray(
        wrap_cycles(np.asarray(shifts, dtype=float) - reference), dtype=float))
    out = np.empty(values.size)
    last = 0.0  # the last trusted value
    pending: list[float] = []
    for i, value in enumerate(values):
        placed = last + wrap_cycles(value - last)
        out[i] = placed
        if abs(placed - last) <= TRUSTED_CYCLES:
            last, pending = placed, []
            continue
        pending = [p for p in pending if abs(wrap_cycles(placed - p)) <= TRUSTED_CYCLES]
        pending.append(placed)
        if len(pending) >= _REBASE:  # a real change of level: trusted from now on
            last, pending = placed, []
    return reference + out


def outlier_limit(n: int) -> float:
    """k_n (σ): beyond it a residual among n is an outlier (see the theory of operation)."""
    if n <= 0:
        return math.inf
    tail = NIGHT_REJECTION_ODDS / (2.0 * n)
    return max(MIN_LIMIT_SIGMA, float(-special.ndtri(tail)))


def outliers(residuals, sigma) -> np.ndarray:
    """Which chunks to set aside: |residual| > k_n σ, unless too many are (real scatter)."""
    r = np.abs(np.asarray(residuals, dtype=float)) / np.asarray(sigma, dtype=float)
    beyond = r > outlier_limit(r.size)
    if beyond.sum() > max(1, MAX_OUTLIER_FRACTION * r.size):
        return np.zeros(r.size, bool)
    return beyond
