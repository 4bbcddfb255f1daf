"""Rating the effects found in a night: status and kind, and what the night could not show.

An effect is (kind, one-sided σ after trials, size in cycles). It is not even marginal
below ``MARGINAL_SIGMA``; larger than the tolerance it is a FAIL when significant
(``SIGNIFICANT_SIGMA``) and a WARN when only marginal; larger than ``WELL_INSIDE`` of the
tolerance a WARN; otherwise OK. The night's status is the worst; its kind the most
specific among equals (step, drift, wobble, then smeared, then offset).
"""

from __future__ import annotations

from .series import DriftFit
from .verdict import (
    MARGINAL_SIGMA,
    MIN_CHUNKS,
    SIGNIFICANT_SIGMA,
    STRUCTURES,
    WELL_INSIDE,
    Fits,
    Offset,
)

__all__ = ["effects", "status_and_kind", "blind_spots"]

_RANK = {"OK": 0, "WARN": 1, "FAIL": 2}
_PRIORITY = {"step": 5, "drift": 5, "wobble": 5, "smeared": 3, "offset": 1}


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


def _level(significance: float, size: float, tol: float) -> str | None:
    """Status an effect implies: None when not even marginal."""
    if significance < MARGINAL_SIGMA:
        return None
    if size > tol:
        return "FAIL" if significance >= SIGNIFICANT_SIGMA else "WARN"
    if size > WELL_INSIDE * tol:
        return "WARN"
    return "OK"


def status_and_kind(effects: list[tuple[str, float, float]], tol: float) -> tuple[str, str]:
    """(status, kind): the worst status, the most specific kind among equals."""
    rated = [(name, significance, size, level) for name, significance, size in effects
             if (level := _level(significance, size, tol)) is not None]
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


def blind_spots(n_used: int, offset: Offset, drift: DriftFit | None, tol: float) -> list[str]:
    """Reasons a tolerance-sized offset or drift could not be seen at 3σ tonight."""
    blind = []
    if n_used < MIN_CHUNKS:
        blind.append(f"only {n_used} usable chunks (need {MIN_CHUNKS} for drift and step)")
    if offset.sigma > tol / 3.0:
        blind.append(f"offset error {offset.sigma:.4f} cycles > tolerance/3")
    # statistical reach only: the model's scatter scaling is removed
    drift_reach = drift.rate_sigma_cycles_per_s / drift.scale * drift.span_s if drift else 0.0
    if drift_reach > tol / 3.0:
        blind.append(f"drift error over the night {drift_reach:.4f} cycles > tolerance/3")
    return blind
