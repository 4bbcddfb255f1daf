"""Rating the effects found in a night: status and kind, and what the night could not show.

An effect is (kind, one-sided σ after trials, size in cycles). Below ``MARGINAL_SIGMA``
it is not seen. A *timing* effect (offset, step, drift, wobble) is rated from its σ
and the tolerance together:

    significant (≥ ``SIGNIFICANT_SIGMA``) and larger than the tolerance → FAIL;
    significant and within the tolerance → WARN (a real clock effect, however small:
        a bright source flags offsets far below the tolerance when they are many σ);
    marginal (3–5σ) and larger than ``WELL_INSIDE`` of the tolerance → WARN;
    marginal and smaller → OK.

A *scatter* effect (a smeared profile, extra chunk jitter) is rated by size alone,
as before: larger than the tolerance FAIL (WARN when only marginal), larger than
``WELL_INSIDE`` of it WARN. Each level has the stated false-alarm probability
(:data:`~turnstamp.core.clock.verdict.FALSE_ALARM`). The night's status is the
worst; its kind the most specific among equals (step, drift, wobble, then smeared,
then offset).
"""

from __future__ import annotations

from .series import DriftFit
from .verdict import (
    DECIDED_FRACTION,
    MARGINAL_SIGMA,
    MIN_CHUNKS,
    SIGNIFICANT_SIGMA,
    STRUCTURES,
    WELL_INSIDE,
    Fits,
    Offset,
)

__all__ = ["effects", "level", "status_and_kind", "blind_spots", "limitations"]

_RANK = {"OK": 0, "WARN": 1, "FAIL": 2}
_PRIORITY = {"step": 5, "drift": 5, "wobble": 5, "smeared": 3, "offset": 1}
_TIMING = ("offset", "step", "drift", "wobble")


def effects(offset: Offset, fits: Fits) -> list[tuple[str, float, float]]:
    """(kind, significance σ, size in cycles) of every effect that competes."""
    effects: list[tuple[str, float, float]] = [("offset", offset.significance,
                                                abs(offset.value))]
    if fits.step is not None:
        effects.append(("step", fits.step.significance_sigma, abs(fits.step.size_cycles)))
    if fits.drift is not None:
        effects.append(("drift", fits.drift.significance_sigma, fits.drift.excursion_cycles))
    if fits.wobble is not None:
        effects.append(("wobble", fits.wobble.significance_sigma,
                        2.0 * fits.wobble.amplitude_cycles))
    if fits.smear is not None:
        effects.append(("smeared", fits.smear.significance_sigma, fits.smear.width_cycles))
    if fits.jitter is not None and fits.jitter.model == "constant":
        effects.append(("smeared", fits.jitter.significance_sigma, fits.jitter.excess_cycles))
    # only the most significant structured model competes: the others fit the same data
    best = fits.best_structure
    if best is not None:
        effects = [e for e in effects if e[0] not in STRUCTURES or e[0] == best[0]]
    return effects


def level(kind: str, significance: float, size: float, tol: float) -> str | None:
    """Status an effect implies (see the module notes); None when not even marginal."""
    if significance < MARGINAL_SIGMA:
        return None
    if significance >= SIGNIFICANT_SIGMA:
        if size > tol:
            return "FAIL"
        return "WARN" if kind in _TIMING or size > WELL_INSIDE * tol else "OK"
    if size > tol:
        return "WARN"
    return "WARN" if size > WELL_INSIDE * tol else "OK"


def status_and_kind(effects: list[tuple[str, float, float]], tol: float) -> tuple[str, str]:
    """(status, kind): the worst status, the most specific kind among equals."""
    rated = [(name, significance, size, rating) for name, significance, size in effects
             if (rating := level(name, significance, size, tol)) is not None]
    if not rated:
        return "OK", "none"
    top = max(rated, key=lambda r: (_RANK[r[3]], _PRIORITY[r[0]] if r[3] != "OK" else 0, r[1]))
    status = top[3]
    significant = [r for r in rated if r[1] >= SIGNIFICANT_SIGMA]
    if status == "OK" and not significant:
        return status, "none"
    if status == "OK":
        top = max(significant, key=lambda r: (_PRIORITY[r[0]], r[1]))
    return status, top[0]


def blind_spots(offset: Offset, tol: float) -> list[str]:
    """Why the night is undecided: a tolerance-sized offset would not stand out at 3σ."""
    if offset.sigma > DECIDED_FRACTION * tol:
        return [f"offset error {offset.sigma:.4f} cycles > tolerance/3"]
    return []


def limitations(n_used: int, drift: DriftFit | None, tol: float) -> list[str]:
    """What tonight could not test (said, but no reason for a WARN once the offset is known)."""
    notes = []
    if n_used < MIN_CHUNKS:
        notes.append(f"only {n_used} usable chunks (need {MIN_CHUNKS} for drift and step)")
    # statistical reach only: the model's scatter scaling is removed
    drift_reach = drift.rate_sigma_cycles_per_s / drift.scale * drift.span_s if drift else 0.0
    if drift_reach > DECIDED_FRACTION * tol:
        notes.append(f"drift error over the night {drift_reach:.4f} cycles > tolerance/3")
    return notes
