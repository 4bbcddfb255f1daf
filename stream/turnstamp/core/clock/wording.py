"""The clock verdict in words: the lines a person reads in the live view and the report.

Every number in the lines is also a field of the verdict; the lines only say them,
with units, in the order status, data, offset, the mistake that explains it, the
model that explains the night, what it would take by chance, and what limits the
check. Instants are given by a ``time_text`` function: UTC calendar times in the
service and the commands (:func:`utc_text`).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np

from ..cycles import cycles_to_us
from ..timebase import LeapSecondTable, Scale, format_instant, from_tt
from .verdict import (
    DECIDED_FRACTION,
    MARGINAL_SIGMA,
    MAX_CHUNK_SIGMA,
    STRUCTURES,
    Fits,
    Offset,
    Tolerance,
)

if TYPE_CHECKING:
    from ..templatefit import OffsetFit
    from .chunks import ChunkOffset
    from .mistakes import Explanation

__all__ = ["no_signal_lines", "verdict_lines", "utc_text", "label_text"]

TimeText = Callable[[int], str]

_HEADS = {
    "none": "no significant effect",
    "offset": "constant offset",
    "step": "step",
    "drift": "linear drift",
    "wobble": "periodic wobble",
    "smeared": "smeared profile",
    "insufficient_signal": "too little signal to judge",
}


def utc_text(leaps: LeapSecondTable) -> TimeText:
    """TT instant (ns) -> UTC calendar time, e.g. ``2026-12-01T21:04:05Z``."""
    def text(tt_ns: int) -> str:
        utc, _ = from_tt(np.array([int(tt_ns)], dtype=np.int64), Scale.UTC, leaps)
        return format_instant(int(utc[0]), 0) + "Z"

    return text


def label_text(ns: int) -> str:
    """An instant as the calendar label of its own time scale (no UTC table at hand)."""
    return format_instant(int(ns), 0) + " (chunk time scale)"


def _fmt_us(cycles: float, nu: float) -> str:
    return f"{cycles_to_us(cycles, nu):+.1f}"


def no_signal_lines(chunks: list[ChunkOffset], used: list[ChunkOffset],
                    night_fit: OffsetFit | None) -> list[str]:
    """Why the night cannot be judged.

    A few chunks over the 3σ line while the whole night shows nothing are what chance
    gives among many chunks: not a measurement to judge the clock by.
    """
    n_used = len(used)
    if night_fit is None or not night_fit.sum_w > 0:
        first = f"No pulsed signal: no events tonight ({len(chunks)} chunks)."
    else:
        first = (
            f"No pulsed signal: night amplitude {night_fit.amplitude:.4g} ± "
            f"{night_fit.amplitude_sigma:.4g} weighted counts "
            f"({night_fit.significance_sigma:.1f}σ after the search over phase), "
            f"and {n_used or 'none'} of the {len(chunks)} chunks detected the pulse"
            + (" (as chance allows)." if n_used else ".")
        )
    return [first, (
        "The clock chain cannot be judged tonight. A constant offset would not hide the "
        "pulse; an error that varies by a large part of a period within the night "
        "(or a wrong spin model) would."
    )]


def verdict_lines(status: str, kind: str, scale: Tolerance, n_chunks: int,
                  used: list[ChunkOffset], result: dict[str, Any], offset: Offset, fits: Fits,
                  explanations: list[Explanation], limits: list[str],
                  time_text: TimeText) -> list[str]:
    """The verdict's lines, status first."""
    nu = scale.nu
    head = _HEADS[kind]
    if explanations:
        best = explanations[0]
        head += f", named: event times {best.delta_t_s:+g} s off ({best.label})"
    rejected = result.get("n_rejected", 0)
    lines = [
        f"{status}: {head} ({scale.text}).",
        f"{n_chunks} chunks, {len(used)} used (pulse detected unambiguously, σ ≤ "
        f"{MAX_CHUNK_SIGMA} cycles)" + (f", {rejected} set aside as outliers" if rejected
                                        else "")
        + f", span {result['span_s'] / 3600:.2f} h"
        + (f" from {time_text(used[0].mid_ns)}" if used else "") + ".",
        f"Offset ({offset.source}): {offset.value:+.5f} ± {offset.sigma:.5f} cycles = "
        f"{_fmt_us(offset.value, nu)} ± {cycles_to_us(offset.sigma, nu):.1f} µs, "
        f"{offset.significance:.1f}σ.",
    ]
    if explanations or kind in ("offset", "step") or offset.significance >= MARGINAL_SIGMA:
        lines += _mistake_lines(explanations, offset.value, nu)
    if used:
        lines += _structure_lines(kind, fits, result, used[0].mid_ns, nu, time_text)
    lines += _scatter_lines(kind, fits, nu)
    fitted = [f"{name} {v['chi2']:.1f} ({v['dof']:.0f})" for name, v in fits.chi2.items()
              if "chi2" in v]
    if fitted:
        lines.append("χ² (dof): " + ", ".join(fitted) + ".")
    if result.get("false_alarm_probability") is not None:
        lines.append(f"Chance that noise alone gives this on a clean night: "
                     f"{result['false_alarm_probability']:.1e}.")
    if result.get("minutes_needed") is not None:
        lines.append(
            f"Undecided: about {result['minutes_needed']:.0f} more minutes at tonight's rate "
            f"would bring the offset error from {cycles_to_us(offset.sigma, nu):.1f} µs to "
            f"{DECIDED_FRACTION * scale.us:.1f} µs (a third of the tolerance).")
    if limits:
        lines.append("Limited sensitivity: " + "; ".join(limits) + ".")
    return lines


def _mistake_lines(explanations: list[Explanation], value: float, nu: float) -> list[str]:
    """The one-period ambiguity, and the time-keeping mistakes the series matches."""
    period_us = 1e6 / nu
    lines = [
        f"Offsets are known only modulo one period ({period_us:.1f} µs): "
        f"{_fmt_us(value, nu)} µs cannot be told from {_fmt_us(value, nu)} ± n·"
        f"{period_us:.1f} µs, so an error of whole periods (or a whole-second error at a "
        f"frequency with integer ν·Δt) is invisible."
    ]
    if explanations:
        lines.append(
            "Predicted chunk by chunk through the apparent (Doppler-shifted) frequency, the "
            "series fits: " + "; ".join(
                f"Δt = {e.delta_t_s:+g} s as {'a step' if e.pattern == 'step' else 'an offset'}"
                f", {e.label} (χ² {e.chi2:.1f} for {e.dof} chunks, Δχ² {e.evidence:.0f} "
                f"against no error)" for e in explanations[:3]) + ".")
    else:
        lines.append(
            "No usual whole-second time-scale mistake (±1, 18, 19, 32.184, 37, 69.184 s) "
            "predicts this series."
        )
    return lines


def _structure_lines(kind: str, fits: Fits, result: dict[str, Any], first_mid_ns: int,
                     nu: float, time_text: TimeText) -> list[str]:
    """One structured model described: the chosen kind, or else the best if marginal."""
    shown = kind if kind in STRUCTURES else None
    best = fits.best_structure
    if shown is None and best is not None and best[1].significance_sigma >= MARGINAL_SIGMA:
        shown = best[0]
    step, drift, wobble = fits.step, fits.drift, fits.wobble
    if shown == "step" and step is not None:
        window = result["step_window_ns"]
        return [
            f"Step: {step.size_cycles:+.5f} ± {step.size_sigma_cycles:.5f} cycles = "
            f"{_fmt_us(step.size_cycles, nu)} ± {cycles_to_us(step.size_sigma_cycles, nu):.1f} µs "
            f"at {time_text(result['step_time_ns'])} "
            f"({(result['step_time_ns'] - first_mid_ns) * 1e-9 / 3600:.2f} h after the first "
            f"chunk; between chunk midpoints {time_text(window[0])} and "
            f"{time_text(window[1])}), {step.significance_sigma:.1f}σ after "
            f"{step.trials:.0f} split positions."
        ]
    if shown == "drift" and drift is not None:
        return [
            f"Drift: {result['drift_us_per_hour']:+.2f} ± {result['drift_sigma_us_per_hour']:.2f} "
            f"µs/h, i.e. {drift.excursion_cycles:.4f} cycles "
            f"({cycles_to_us(drift.excursion_cycles, nu):.1f} µs) over "
            f"{drift.span_s / 3600:.2f} h, {drift.significance_sigma:.1f}σ."
        ]
    if shown == "wobble" and wobble is not None:
        return [
            f"Wobble: period {wobble.period_s:.3f} ± {wobble.period_sigma_s:.3f} s, amplitude "
            f"{result['wobble_amplitude_us']:.1f} ± {result['wobble_amplitude_sigma_us']:.1f} µs "
            f"({wobble.amplitude_cycles:.4f} cycles), {wobble.significance_sigma:.1f}σ after "
            f"{wobble.trials:.0f} independent periods."
        ]
    return []


def _scatter_lines(kind: str, fits: Fits, nu: float) -> list[str]:
    """The smear of the night profile and the extra chunk scatter, when worth saying."""
    lines = []
    smear, jitter = fits.smear, fits.jitter
    structured = kind in STRUCTURES
    if smear is not None and (kind == "smeared" or (
            not structured and smear.significance_sigma >= MARGINAL_SIGMA)):
        lines.append(
            f"Night profile broader than the template by a Gaussian of rms "
            f"{smear.width_cycles:.4f} ± {smear.width_sigma_cycles:.4f} cycles "
            f"({cycles_to_us(smear.width_cycles, nu):.1f} µs), {smear.significance_sigma:.1f}σ "
            "(a template that does not match the data's shape also shows up here)."
        )
    if jitter is not None and (jitter.significance_sigma >= MARGINAL_SIGMA or kind == "smeared"):
        lines.append(
            f"Chunk scatter about the {jitter.model} model: χ² = {jitter.chi2:.1f} for "
            f"{jitter.dof} dof, extra rms {jitter.excess_cycles:.4f} cycles "
            f"({cycles_to_us(jitter.excess_cycles, nu):.1f} µs), "
            f"{jitter.significance_sigma:.1f}σ."
        )
    if kind == "smeared":
        lines.append(
            "While the profile is smeared the offset above belongs to a distorted profile "
            "and says little about a constant clock offset."
        )
    return lines
