"""Emission time of pulses known by their arrival time: t_e + Δ(t_e) = t_a.

Theory of operation
-------------------
Photon arrival times are known, the binary delay Δ is a function of the emission
time. The equation is solved by fixed-point iteration on the delay d ← Δ(t_a − d),
from d = 0. Each step shrinks the error by about the orbital speed v/c, so a few
steps reach 1e-12 s. Iterating on the (small) delay rather than on t_e keeps the
stopping test free of the rounding of large time values. Elements that have not
settled after ``EMISSION_MAX_ITERATIONS`` steps (orbital speeds near c, non-finite
times, or a Shapiro delay diverging at an exact conjunction with sin i = 1) are
returned flagged, never raised. Elements that have settled leave the iteration, and
the Kepler solution of the previous step is the warm start of the next.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from .kepler import KeplerStart

__all__ = ["EMISSION_TOLERANCE_S", "EMISSION_MAX_ITERATIONS", "solve_emission_delay"]

#: The emission-time iteration stops for an element once its delay changes by less.
EMISSION_TOLERANCE_S = 1e-12
#: At most this many delay evaluations per element in ``solve_emission_delay``.
EMISSION_MAX_ITERATIONS = 12

DelayFunction = Callable[[np.ndarray, np.ndarray, KeplerStart | None],
                         tuple[np.ndarray, KeplerStart | None]]


def solve_emission_delay(evaluate: DelayFunction, t_arrival: np.ndarray,
                         extra: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Delay d (s) with d = Δ(t_a − d) for each element, and whether it converged.

    Parameters
    ----------
    evaluate : callable
        ``evaluate(base, offset, start) -> (delay_s, warm start)``: the total delay at
        t = base + offset (TDB s since the orbit's epoch), ``start`` a Kepler warm start
        from the previous call (or None).
    t_arrival, extra : numpy.ndarray
        Arrival times split into a large exact part and a small remainder (s), 1-D.

    Returns
    -------
    delay_s : numpy.ndarray
        d = t_a − t_e (seconds). Unconverged elements keep the last iterate.
    converged : numpy.ndarray of bool
        False where the iteration did not settle (including non-finite input).
    """
    delay_s = np.zeros_like(t_arrival)
    converged = np.zeros(t_arrival.shape, dtype=bool)
    active: np.ndarray | None = None  # indices still iterating; None means all
    warm: KeplerStart | None = None  # Kepler solution at the previous iterate
    for _ in range(EMISSION_MAX_ITERATIONS):
        if active is None:
            previous = delay_s
            updated, warm = evaluate(t_arrival, extra - previous, warm)
        else:
            previous = delay_s[active]
            updated, warm = evaluate(t_arrival[active], extra[active] - previous, warm)
        going = ~(np.abs(updated - previous) < EMISSION_TOLERANCE_S)  # NaN: not done
        if active is None:
            delay_s = updated
            converged = ~going
            active = np.flatnonzero(going)
        else:
            delay_s[active] = updated
            converged[active[~going]] = True
            active = active[going]
        if active.size == 0:
            break
        if warm is not None and active.size < going.size:
            warm = KeplerStart(*(a[going] for a in warm))
    return delay_s, converged
