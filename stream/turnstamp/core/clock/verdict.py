"""What the clock check concludes: the verdict, its vocabulary and thresholds.

Statuses are OK, WARN and FAIL; the kinds name the effect reported (see
:mod:`turnstamp.core.clock.diagnose` for how they are chosen). An effect is real
from ``SIGNIFICANT_SIGMA`` and marginal from ``MARGINAL_SIGMA`` (one-sided Gaussian
σ after trials); its size against the tolerance sets the status.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field, is_dataclass
from typing import Any

import numpy as np

from .mistakes import Explanation
from .series import ConstantFit, DriftFit, JitterFit, StepFit
from .smear import SmearFit
from .wobble import WobbleFit

__all__ = [
    "SIGNIFICANT_SIGMA",
    "MARGINAL_SIGMA",
    "WELL_INSIDE",
    "MAX_CHUNK_SIGMA",
    "MIN_CHUNKS",
    "MIN_WOBBLE_CHUNKS",
    "ClockVerdict",
]

SIGNIFICANT_SIGMA = 5.0
"""One-sided σ (after trials) from which an effect is reported as real."""
MARGINAL_SIGMA = 3.0
"""One-sided σ (after trials) from which an effect is reported as marginal."""
WELL_INSIDE = 0.5
"""An effect smaller than this fraction of the tolerance is 'well inside' it (OK)."""
MAX_CHUNK_SIGMA = 0.1
"""Chunk offsets less precise than this (cycles) are not used: unwrapping needs ≪ 0.5."""
MIN_CHUNKS = 4
"""Fewest usable chunks for the drift and step models (2 on each side of a step)."""
MIN_WOBBLE_CHUNKS = 8
"""Fewest usable chunks for the wobble scan."""


@dataclass(frozen=True)
class ClockVerdict:
    """Outcome of :func:`diagnose`; ``to_dict()`` is JSON-serialisable.

    Attributes
    ----------
    status : {"OK", "WARN", "FAIL"}
    kind : {"none", "offset", "step", "drift", "wobble", "smeared", "no_signal",
            "insufficient_signal"}
    frequency_hz : float
        Spin frequency used to convert cycles to time, Hz.
    tolerance_cycles, tolerance_us : float
        Effective tolerance.
    reference_ns : int or None
        Reference time of the drift model (weighted mean chunk time), ns.
    span_s : float
        Time from the first to the last usable chunk midpoint, s.
    n_chunks, n_used : int
        Chunks given, and those used (detected, σ ≤ 0.1 cycles).
    offset_cycles, offset_sigma_cycles, offset_us, offset_sigma_us : float or None
        Constant offset (modulo one period).
    offset_significance_sigma : float or None
    step_cycles, step_sigma_cycles, step_us, step_sigma_us : float or None
    step_time_ns : int or None
        Boundary between the chunks either side of the step, ns.
    step_window_ns : tuple of int, or None
        Midpoints of those two chunks: the step happened between them.
    drift_us_per_hour, drift_sigma_us_per_hour : float or None
    wobble_period_s, wobble_period_sigma_s, wobble_amplitude_us, wobble_amplitude_sigma_us
        : float or None
    smear_width_cycles, smear_width_sigma_cycles, smear_width_us : float or None
    jitter_cycles : float or None
        Extra chunk-to-chunk scatter (rms), cycles.
    chi2 : dict
        Per model: {"chi2", "dof"} (and "delta_chi2", "significance_sigma").
    explanations : list of Explanation
        Time-keeping mistakes consistent with the offset or the step (within 2σ).
    lines : list of str
        Human-readable explanation.
    constant, drift, step, wobble, smear, jitter
        The underlying fits (None when not evaluated).
    """

    status: str
    kind: str
    frequency_hz: float
    tolerance_cycles: float
    tolerance_us: float
    reference_ns: int | None
    span_s: float
    n_chunks: int
    n_used: int
    offset_cycles: float | None = None
    offset_sigma_cycles: float | None = None
    offset_us: float | None = None
    offset_sigma_us: float | None = None
    offset_significance_sigma: float | None = None
    step_cycles: float | None = None
    step_sigma_cycles: float | None = None
    step_us: float | None = None
    step_sigma_us: float | None = None
    step_time_ns: int | None = None
    step_window_ns: tuple[int, int] | None = None
    drift_us_per_hour: float | None = None
    drift_sigma_us_per_hour: float | None = None
    wobble_period_s: float | None = None
    wobble_period_sigma_s: float | None = None
    wobble_amplitude_us: float | None = None
    wobble_amplitude_sigma_us: float | None = None
    smear_width_cycles: float | None = None
    smear_width_sigma_cycles: float | None = None
    smear_width_us: float | None = None
    jitter_cycles: float | None = None
    chi2: dict[str, dict[str, float]] = field(default_factory=dict)
    explanations: list[Explanation] = field(default_factory=list)
    lines: list[str] = field(default_factory=list)
    constant: ConstantFit | None = None
    drift: DriftFit | None = None
    step: StepFit | None = None
    wobble: WobbleFit | None = None
    smear: SmearFit | None = None
    jitter: JitterFit | None = None

    def to_dict(self) -> dict[str, Any]:
        """Plain dict of JSON types (non-finite numbers become None)."""
        return _jsonable(asdict(self))


def _jsonable(value: Any) -> Any:
    if is_dataclass(value) and not isinstance(value, type):
        return _jsonable(asdict(value))
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    return value
