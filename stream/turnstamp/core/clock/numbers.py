"""The verdict's numbers: fitted models as values and sizes in µs, for the fields and lines.

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..cycles import cycles_to_us
from .chunks import ChunkOffset
from .verdict import Fits

__all__ = ["model_values", "model_numbers", "size_of"]


def model_values(name: str, fit: Any, t: np.ndarray, t_fitted: np.ndarray) -> np.ndarray:
    """Offsets (cycles) of a structured model at times ``t`` (s); ``t_fitted`` are the
    times it was fitted on (a step's index counts among them)."""
    if name == "drift":
        return fit.offset_cycles + fit.rate_cycles_per_s * (t - fit.reference_s)
    if name == "step":
        edge = 0.5 * (t_fitted[fit.index - 1] + t_fitted[fit.index])
        return np.where(t < edge, fit.before_cycles, fit.after_cycles)
    x = t - t_fitted.min()
    return fit.offset_cycles + fit.amplitude_cycles * np.cos(
        2.0 * np.pi * (x / fit.period_s - fit.phase_cycles)
    )


def model_numbers(fits: Fits, used: list[ChunkOffset], nu: float) -> dict[str, Any]:
    """The verdict's numbers of the step, drift, wobble and smear, in µs where timed."""
    out: dict[str, Any] = {}
    step, drift, wobble, smear = fits.step, fits.drift, fits.wobble, fits.smear
    if step is not None and fits.mids_ns is not None:
        by_mid = {c.mid_ns: c for c in used}
        before = by_mid[int(fits.mids_ns[step.index - 1])]
        after = by_mid[int(fits.mids_ns[step.index])]
        out.update(
            step_cycles=step.size_cycles, step_sigma_cycles=step.size_sigma_cycles,
            step_us=cycles_to_us(step.size_cycles, nu),
            step_sigma_us=cycles_to_us(step.size_sigma_cycles, nu),
            step_time_ns=int((before.end_ns + after.start_ns) // 2),
            step_window_ns=(int(before.mid_ns), int(after.mid_ns)),
        )
    if drift is not None:
        out.update(
            drift_us_per_hour=cycles_to_us(drift.rate_cycles_per_s, nu) * 3600.0,
            drift_sigma_us_per_hour=cycles_to_us(drift.rate_sigma_cycles_per_s, nu) * 3600.0,
        )
    if wobble is not None:
        out.update(
            wobble_period_s=wobble.period_s, wobble_period_sigma_s=wobble.period_sigma_s,
            wobble_amplitude_us=cycles_to_us(wobble.amplitude_cycles, nu),
            wobble_amplitude_sigma_us=cycles_to_us(wobble.amplitude_sigma_cycles, nu),
        )
    if smear is not None:
        out.update(smear_width_cycles=smear.width_cycles,
                   smear_width_sigma_cycles=smear.width_sigma_cycles,
                   smear_width_us=cycles_to_us(smear.width_cycles, nu))
    return out


def size_of(kind: str, result: dict[str, Any]) -> dict[str, Any]:
    """``size``, ``size_sigma`` and ``size_unit`` of the effect reported (a named mistake
    keeps the fitted size; its Δt is ``mistake_s``)."""
    nu = result["frequency_hz"]
    if kind == "step" and result.get("step_us") is not None:
        return dict(size=result["step_us"], size_sigma=result["step_sigma_us"], size_unit="µs")
    if kind == "drift":
        return dict(size=result.get("drift_us_per_hour"),
                    size_sigma=result.get("drift_sigma_us_per_hour"), size_unit="µs/h")
    if kind == "wobble":
        return dict(size=result.get("wobble_amplitude_us"),
                    size_sigma=result.get("wobble_amplitude_sigma_us"), size_unit="µs")
    if kind == "smeared":
        width = result.get("smear_width_cycles") or result.get("jitter_cycles") or 0.0
        sigma = result.get("smear_width_sigma_cycles")
        return dict(size=cycles_to_us(width, nu),
                    size_sigma=None if sigma is None else cycles_to_us(sigma, nu),
                    size_unit="µs")
    return dict(size=result.get("offset_us"), size_sigma=result.get("offset_sigma_us"),
                size_unit="µs")
