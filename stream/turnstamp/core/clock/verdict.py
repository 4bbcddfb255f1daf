"""What the clock check concludes: the verdict, its vocabulary and thresholds.

Statuses are OK, WARN and FAIL; the kinds name the effect reported (see
:mod:`turnstamp.core.clock.diagnose` for how they are chosen). An effect is real
from ``SIGNIFICANT_SIGMA`` and marginal from ``MARGINAL_SIGMA`` (one-sided Gaussian
σ after trials); its size against the tolerance and its σ set the status
(:mod:`turnstamp.core.clock.rating`). Each kind is tested at those levels after its
own trials, so its false-alarm probability on a clean night is ``FALSE_ALARM``
(``turnstamp bench --clock`` measures them). ``Tolerance``, ``Fits`` and ``Offset``
carry the diagnosis's intermediate results between its rooms.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field, is_dataclass
from typing import Any

import numpy as np
from scipy import special

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
    "STRUCTURES",
    "DECIDED_FRACTION",
    "FALSE_ALARM",
    "Tolerance",
    "Fits",
    "Offset",
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
STRUCTURES = ("step", "drift", "wobble")
"""The structured models of the offset series (as against offset and smear)."""
DECIDED_FRACTION = 1.0 / 3.0
"""The night is decided once the offset error is at most this fraction of the tolerance
(an offset of the tolerance would then stand out at 3σ)."""
FALSE_ALARM = {
    "marginal": float(special.ndtr(-MARGINAL_SIGMA)),
    "significant": float(special.ndtr(-SIGNIFICANT_SIGMA)),
}
"""Nominal chance, per kind and per clean night, that noise alone reaches each level (each
kind's significance is corrected for its own trials: splits, periods)."""


@dataclass(frozen=True)
class Tolerance:
    """The spin frequency ``nu`` (Hz) and the effective tolerance, in cycles and µs."""

    nu: float
    cycles: float
    us: float

    @property
    def text(self) -> str:
        """The tolerance in words, as the verdict lines quote it."""
        return f"tolerance {self.cycles:.4f} cycles = {self.us:.1f} µs at {self.nu:.6g} Hz"


@dataclass
class Fits:
    """The unwrapped chunk series (t in s, y and sig in cycles) and the models fitted.

    The arrays hold the chunks kept after outliers were set aside (``n_rejected``);
    ``mids_ns`` are their midpoints (ns, the chunks' time scale).
    """

    t: np.ndarray
    y: np.ndarray
    sig: np.ndarray
    mids_ns: np.ndarray | None = None
    n_rejected: int = 0
    constant: ConstantFit | None = None
    drift: DriftFit | None = None
    step: StepFit | None = None
    wobble: WobbleFit | None = None
    smear: SmearFit | None = None
    jitter: JitterFit | None = None
    chi2: dict[str, dict[str, float]] = field(default_factory=dict)

    @property
    def best_structure(self) -> tuple[str, Any] | None:
        """The most significant of step, drift and wobble (name, fit), if any was fitted."""
        fitted = [(name, getattr(self, name)) for name in STRUCTURES
                  if getattr(self, name) is not None]
        return max(fitted, key=lambda item: item[1].significance_sigma, default=None)

    @property
    def significant_structure(self) -> tuple[str, Any] | None:
        """``best_structure`` when it reaches ``SIGNIFICANT_SIGMA``."""
        best = self.best_structure
        return best if best is not None and best[1].significance_sigma >= SIGNIFICANT_SIGMA \
            else None


@dataclass(frozen=True)
class Offset:
    """The night's constant offset (cycles), its 1σ, where it comes from, its σ-significance."""

    value: float
    sigma: float
    source: str
    significance: float


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
        Time-keeping mistakes whose predicted chunk series fits the data, best first.
    mistake_s : float or None
        The time-keeping mistake named (s; positive: event times late), when one is.
    size, size_sigma : float or None
        Size of the effect reported and its 1σ, in ``size_unit``.
    size_unit : str
        µs for offset, step, smear and jitter; µs/h for a drift; µs amplitude for a
        wobble; s for a named mistake.
    false_alarm_probability : float or None
        Nominal chance that noise alone gives this kind at this level on a clean night.
    minutes_needed : float or None
        While undecided: more minutes at tonight's rate until the offset error reaches
        ``DECIDED_FRACTION`` of the tolerance.
    n_rejected : int
        Chunks set aside as outliers (:mod:`turnstamp.core.clock.robust`).
    attribution : str or None
        With several pulsars: ``clock`` (shared by all) or ``model`` (this target alone).
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
    mistake_s: float | None = None
    size: float | None = None
    size_sigma: float | None = None
    size_unit: str = "µs"
    false_alarm_probability: float | None = None
    minutes_needed: float | None = None
    n_rejected: int = 0
    attribution: str | None = None
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
