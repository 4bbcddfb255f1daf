"""Quick-look check of the clock chain: is tonight's pulse where the template says?

Theory of operation
-------------------
An error δt(t) in the event times moves the phase of a pulsar of frequency ν by
ν·δt(t) cycles. We cut the night into chunks, measure the template offset of each
(``fit_offset``), and ask which simple history of δt explains the offsets:

1. ``chunk_offsets`` merges consecutive time intervals into chunks, by a fixed
   length or until the chunk's H-test reaches a threshold, and fits each.
2. ``diagnose`` unwraps the chunk offsets (cycles are continuous from chunk to
   chunk; the whole series is known only modulo one cycle) and fits, by weighted
   least squares: a constant, a linear drift, one step (best split; the search
   over splits counts as trials), and a sinusoidal wobble (periods from three
   chunk spacings to half the span; the independent frequencies count as trials).
   The night profile is also compared with the template for broadening: with a
   Gaussian phase jitter of rms σ_s, each harmonic is damped by exp(−2π²k²σ_s²).
   Excess chunk scatter that no model explains is a jitter too.

Each effect gets a significance from Δχ² (χ² tail → one-sided Gaussian σ, after
trials). A structured model is judged against its own residual scatter
(Δχ² divided by max(1, χ²/dof), an F-test), so that a noisy night cannot fake a
drift. Thresholds: ≥ 5σ (``SIGNIFICANT_SIGMA``) is an effect, 3–5σ
(``MARGINAL_SIGMA``) marginal. Its size, compared with the tolerance
(20 milliperiods by default, common practice), sets the status:

    size > tolerance → FAIL (WARN when only marginal);
    size > tolerance/2 → WARN;  otherwise OK.

Sizes: offset |μ|; step |Δ|; drift |rate|·span (how far the phase moves during
the night); wobble peak-to-peak 2A; smear and jitter their rms width.
The kind reported is the effect with the worst status; ties go to the more
specific description (step, drift, wobble, then smeared, then offset). The
offset is that of the whole-night profile, or, when a structured model is
significant (the night profile is then a blend), that model's constant term.
Too little signal to see a tolerance-sized offset or drift at 3σ gives WARN
(``insufficient_signal``); no pulse at all gives WARN (``no_signal``).

The model fits and their significances are in :mod:`turnstamp.core.offsetfits`
(re-exported here). The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field, is_dataclass
from typing import Any

import numpy as np

from turnstamp.core.offsetfits import (
    ConstantFit,
    DriftFit,
    JitterFit,
    SmearFit,
    StepFit,
    WobbleFit,
    _significance,
    fit_constant,
    fit_drift,
    fit_jitter,
    fit_smear,
    fit_step,
    fit_wobble,
    unwrap_offsets,
)
from turnstamp.core.stats import PhaseMoments, h_test
from turnstamp.core.template import (
    OffsetFit,
    PulseTemplate,
    cycles_to_us,
    fit_offset,
    wrap_cycles,
)

__all__ = [
    "KNOWN_TIME_MISTAKES",
    "SIGNIFICANT_SIGMA",
    "MARGINAL_SIGMA",
    "DEFAULT_MIN_SIGNAL",
    "ChunkOffset",
    "ConstantFit",
    "DriftFit",
    "StepFit",
    "WobbleFit",
    "SmearFit",
    "JitterFit",
    "Explanation",
    "ClockVerdict",
    "chunk_offsets",
    "unwrap_offsets",
    "fit_constant",
    "fit_drift",
    "fit_step",
    "fit_wobble",
    "fit_smear",
    "fit_jitter",
    "explain_offset",
    "diagnose",
]

KNOWN_TIME_MISTAKES = (
    (1.0, "one leap second (missed, or applied twice)"),
    (18.0, "GPS−UTC (GPS time read as UTC, or the reverse; 18 s since 2017)"),
    (19.0, "TAI−GPS (GPS time read as TAI, or the reverse)"),
    (32.184, "TT−TAI (TAI read as TT, or the reverse)"),
    (37.0, "TAI−UTC (TAI read as UTC, or the reverse; 37 s since 2017)"),
    (69.184, "TT−UTC (UTC read as TT, or the reverse)"),
)
"""(Δt in s, description) of time-keeping mistakes; REFERENCES §3.7. Both signs are tried."""

SIGNIFICANT_SIGMA = 5.0
"""One-sided σ (after trials) from which an effect is reported as real."""
MARGINAL_SIGMA = 3.0
"""One-sided σ (after trials) from which an effect is reported as marginal."""
WELL_INSIDE = 0.5
"""An effect smaller than this fraction of the tolerance is 'well inside' it (OK)."""
DEFAULT_MIN_SIGNAL = 36.0
"""H-test value that closes a chunk (≈ 5σ with P = exp(−0.4 H)); REFERENCES §8."""
MAX_CHUNK_SIGMA = 0.1
"""Chunk offsets less precise than this (cycles) are not used: unwrapping needs ≪ 0.5."""
MIN_CHUNKS = 4
"""Fewest usable chunks for the drift and step models (2 on each side of a step)."""
MIN_WOBBLE_CHUNKS = 8
"""Fewest usable chunks for the wobble scan."""


# --------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class ChunkOffset:
    """Template offset of one chunk of the night.

    Attributes
    ----------
    start_ns, end_ns : int
        Chunk boundaries (the time scale of the intervals; ns).
    mid_ns : int
        Σw-weighted mean of the interval midpoints, ns.
    shift_cycles, sigma_cycles : float
        Offset (positive = data later) and its 1σ error, cycles.
    amplitude, amplitude_sigma : float
        Pulsed signal b̂ and σ_b, weighted counts.
    count : int
        Events.
    sum_w : float
        Σw.
    detected : bool
        Pulse detected in this chunk (``OffsetFit.detected``).
    """

    start_ns: int
    end_ns: int
    mid_ns: int
    shift_cycles: float
    sigma_cycles: float
    amplitude: float
    amplitude_sigma: float
    count: int
    sum_w: float
    detected: bool


@dataclass(frozen=True)
class Explanation:
    """A time-keeping mistake whose phase offset frac(ν·Δt) matches the data."""

    delta_t_s: float
    label: str
    predicted_cycles: float
    deviation_sigma: float


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


# --------------------------------------------------------------------------------------
# Chunks
# --------------------------------------------------------------------------------------


def chunk_offsets(
    intervals,
    template: PulseTemplate,
    chunk_ns: int | None = None,
    min_signal: float = DEFAULT_MIN_SIGNAL,
    *,
    interval_ns: int | None = None,
    target_sigma_cycles: float | None = None,
    harmonics: int | None = None,
    cache: dict | None = None,
) -> list[ChunkOffset]:
    """Group consecutive time intervals into chunks and fit the template to each.

    Parameters
    ----------
    intervals : list of (int, PhaseMoments), or TimeBinnedMoments
        ``TimeBinnedMoments.intervals()``: interval start (ns) and moments, sorted.
    template : PulseTemplate
        Expected pulse shape.
    chunk_ns : int, optional
        Fixed chunk length, ns; chunk j holds the intervals starting in
        [j·chunk_ns, (j+1)·chunk_ns) (multiples from the time origin, so that chunks
        stay put as old intervals are dropped). When None, chunks
        grow until their H-test reaches ``min_signal`` (or their offset error reaches
        ``target_sigma_cycles``); a weaker remainder joins the last chunk.
    min_signal : float
        H-test value that closes a chunk (default 36 ≈ 5σ).
    interval_ns : int, optional
        Interval length, ns. Default: the ``interval_ns`` of a TimeBinnedMoments, or
        the greatest common divisor of the gaps between starts.
    target_sigma_cycles : float, optional
        Also close a chunk once its fitted offset error is at most this (cycles).
    harmonics : int, optional
        Passed to :func:`fit_offset`.
    cache : dict, optional
        Fits of earlier calls, keyed by the chunk's extent and content; pass the same
        dict each time and a chunk whose data did not change is not refitted.

    Returns
    -------
    list of ChunkOffset
        In time order.
    """
    if hasattr(intervals, "intervals"):
        if interval_ns is None:
            interval_ns = int(intervals.interval_ns)
        intervals = intervals.intervals()
    items = sorted(((int(s), m) for s, m in intervals), key=lambda item: item[0])
    if not items:
        return []
    starts = np.array([s for s, _ in items], dtype=np.int64)
    if interval_ns is None:
        gaps = np.diff(starts)
        gaps = gaps[gaps > 0]
        interval_ns = int(np.gcd.reduce(gaps)) if gaps.size else int(chunk_ns or 0)
    if chunk_ns is not None and int(chunk_ns) <= 0:
        raise ValueError(f"chunk_ns = {chunk_ns!r}: must be a positive number of ns")

    groups: list[list[tuple[int, PhaseMoments]]] = []
    if chunk_ns is not None:
        keys = starts // int(chunk_ns)
        for key in np.unique(keys):
            groups.append([items[i] for i in np.flatnonzero(keys == key)])
    else:
        current: list[tuple[int, PhaseMoments]] = []
        total: PhaseMoments | None = None
        for item in items:
            current.append(item)
            total = item[1].copy() if total is None else total + item[1]
            if total.sum_w2 <= 0:
                continue
            done = h_test(total).statistic >= min_signal
            if not done and target_sigma_cycles is not None:
                trial = fit_offset(total, template, harmonics)
                done = trial.detected and trial.sigma_cycles <= target_sigma_cycles
            if done:
                groups.append(current)
                current, total = [], None
        if current:
            if groups:
                groups[-1].extend(current)
            else:
                groups.append(current)

    out = []
    for group in groups:
        total = group[0][1].copy()
        for _, m in group[1:]:
            total += m
        first = group[0][0]
        weights = np.array([m.sum_w for _, m in group], dtype=float)
        offsets = np.array([s - first for s, _ in group], dtype=float) + 0.5 * interval_ns
        mid = first + int(round(float(weights @ offsets / weights.sum()))) if weights.sum() > 0 \
            else first + int(round(float(offsets.mean())))
        key = (first, int(group[-1][0]), total.count, total.sum_w, total.sum_w2,
               float(total.cos_sums[0]), id(template), harmonics)
        if cache is not None and key in cache:
            out.append(cache[key])
            continue
        fit = fit_offset(total, template, harmonics)
        out.append(
            ChunkOffset(
                start_ns=int(first),
                end_ns=int(group[-1][0] + interval_ns),
                mid_ns=int(mid),
                shift_cycles=fit.shift_cycles,
                sigma_cycles=fit.sigma_cycles,
                amplitude=fit.amplitude,
                amplitude_sigma=fit.amplitude_sigma,
                count=int(total.count),
                sum_w=float(total.sum_w),
                detected=bool(fit.detected),
            )
        )
        if cache is not None:
            if len(cache) > 100_000:
                cache.clear()
            cache[key] = out[-1]
    return out


# --------------------------------------------------------------------------------------
# Verdict
# --------------------------------------------------------------------------------------



def explain_offset(
    offset_cycles: float, sigma_cycles: float, frequency_hz: float, n_sigma: float = 2.0,
    frequency_spread_hz: float = 0.0,
) -> list[Explanation]:
    """Time-keeping mistakes Δt whose phase offset frac(ν·Δt) matches ``offset_cycles``.

    Parameters
    ----------
    offset_cycles, sigma_cycles : float
        Measured offset (positive = data late) and 1σ error, cycles.
    frequency_hz : float
        Spin frequency ν, Hz.
    n_sigma : float
        Match when |wrap(offset − ν·Δt)| ≤ n_sigma·σ + |Δt|·frequency_spread_hz.
    frequency_spread_hz : float
        How far the apparent frequency wanders over the night (Doppler): a time error
        Δt shifts phase by ν(t)·Δt, so the prediction is only good to |Δt|·spread.

    Returns
    -------
    list of Explanation
        Δt = ±1, ±18, ±19, ±32.184, ±37, ±69.184 s (REFERENCES §3.7); positive Δt
        means the event times are late by Δt.
    """
    out: list[Explanation] = []
    if not (math.isfinite(offset_cycles) and sigma_cycles > 0 and math.isfinite(sigma_cycles)):
        return out
    for dt, label in KNOWN_TIME_MISTAKES:
        for sign in (+1.0, -1.0):
            predicted = wrap_cycles(frequency_hz * sign * dt)
            slack = dt * abs(frequency_spread_hz)
            deviation = max(abs(wrap_cycles(offset_cycles - predicted)) - slack, 0.0) \
                / sigma_cycles
            if deviation <= n_sigma:
                out.append(Explanation(sign * dt, label, predicted, deviation))
    return sorted(out, key=lambda e: e.deviation_sigma)


_RANK = {"OK": 0, "WARN": 1, "FAIL": 2}
_PRIORITY = {"step": 5, "drift": 5, "wobble": 5, "smeared": 3, "offset": 1}


def _level(significance: float, size: float, tol: float) -> str | None:
    """Status an effect implies: None when not even marginal."""
    if significance < MARGINAL_SIGMA:
        return None
    if size > tol:
        return "FAIL" if significance >= SIGNIFICANT_SIGMA else "WARN"
    if size > WELL_INSIDE * tol:
        return "WARN"
    return "OK"


def _fmt_us(cycles: float, nu: float) -> str:
    return f"{cycles_to_us(cycles, nu):+.1f}"


def diagnose(
    chunks: list[ChunkOffset],
    night_fit: OffsetFit | None,
    frequency_hz: float,
    tolerance_cycles: float = 0.02,
    tolerance_us: float | None = None,
    frequency_spread_hz: float = 0.0,
) -> ClockVerdict:
    """Judge the clock chain from chunk offsets and the whole-night fit.

    Parameters
    ----------
    chunks : list of ChunkOffset
        From :func:`chunk_offsets`.
    night_fit : OffsetFit or None
        ``fit_offset`` of the whole night's moments (None when there are no events).
    frequency_hz : float
        Spin frequency ν, Hz (converts cycles to µs).
    tolerance_cycles : float
        Largest acceptable phase error, cycles (0.02: the "20-milliperiod" common
        practice, REFERENCES §8).
    tolerance_us : float, optional
        Also a limit in µs; the effective tolerance is the smaller of the two.
    frequency_spread_hz : float
        Half-range of the apparent (Doppler-shifted) frequency over the night; widens
        the match of known time-keeping mistakes (see :func:`explain_offset`).

    Returns
    -------
    ClockVerdict
        Status, kind, numbers with uncertainties, χ² of each model, and ``lines``.
    """
    nu = float(frequency_hz)
    if not (nu > 0 and math.isfinite(nu)):
        raise ValueError(f"frequency_hz = {frequency_hz!r}: must be a finite number > 0")
    if not tolerance_cycles > 0:
        raise ValueError(f"tolerance_cycles = {tolerance_cycles!r}: must be > 0")
    tol = float(tolerance_cycles)
    if tolerance_us is not None:
        if not tolerance_us > 0:
            raise ValueError(f"tolerance_us = {tolerance_us!r}: must be > 0")
        tol = min(tol, float(tolerance_us) * 1e-6 * nu)
    tol_us = cycles_to_us(tol, nu)
    period_us = 1e6 / nu

    chunks = sorted(chunks, key=lambda c: c.mid_ns)
    used = [c for c in chunks if c.detected and math.isfinite(c.shift_cycles)
            and 0 < c.sigma_cycles <= MAX_CHUNK_SIGMA]
    n_used = len(used)
    lines: list[str] = []
    result: dict[str, Any] = dict(frequency_hz=nu, tolerance_cycles=tol, tolerance_us=tol_us,
                                  n_chunks=len(chunks), n_used=n_used, reference_ns=None,
                                  span_s=0.0)
    chi2_table: dict[str, dict[str, float]] = {}
    tol_text = f"tolerance {tol:.4f} cycles = {tol_us:.1f} µs at {nu:.6g} Hz"

    night_ok = night_fit is not None and bool(night_fit.detected) \
        and math.isfinite(night_fit.shift_cycles)
    if not night_ok and n_used < MIN_CHUNKS:
        # a few chunks over the 3σ line while the whole night shows nothing are what
        # chance gives among many chunks: not a measurement to judge the clock by
        if night_fit is None or not night_fit.sum_w > 0:
            lines.append(f"No pulsed signal: no events tonight ({len(chunks)} chunks).")
        else:
            lines.append(
                f"No pulsed signal: night amplitude {night_fit.amplitude:.4g} ± "
                f"{night_fit.amplitude_sigma:.4g} weighted counts "
                f"({night_fit.significance_sigma:.1f}σ after the search over phase), "
                f"and {n_used or 'none'} of the {len(chunks)} chunks detected the pulse"
                + (" (as chance allows)." if n_used else ".")
            )
        lines.append(
            "The clock chain cannot be judged tonight. A constant offset would not hide the "
            "pulse; an error that varies by a large part of a period within the night "
            "(or a wrong spin model) would."
        )
        return ClockVerdict(status="WARN", kind="no_signal", lines=lines, **result)

    # ---- unwrapped chunk series ------------------------------------------------------
    t = y = sig = np.zeros(0)
    constant = drift = step = wobble = jitter = None
    if n_used:
        ref_shift = night_fit.shift_cycles if night_ok and night_fit is not None else \
            min(used, key=lambda c: c.sigma_cycles).shift_cycles
        mids = np.array([c.mid_ns for c in used], dtype=np.int64)
        t = (mids - mids[0]).astype(float) * 1e-9
        sig = np.array([c.sigma_cycles for c in used])
        y = unwrap_offsets([c.shift_cycles for c in used], ref_shift)
        w = 1.0 / sig**2
        y = y - math.floor(float(w @ y / w.sum()) + 0.5)  # weighted mean in [−0.5, 0.5)
        result["span_s"] = float(t[-1] - t[0])
        result["reference_ns"] = int(mids[0] + round(float(w @ t / w.sum()) * 1e9))
        constant = fit_constant(t, y, sig)
        chi2_table["constant"] = {"chi2": constant.chi2, "dof": constant.dof}
    lines.append(
        f"{len(chunks)} chunks, {n_used} used (detected, σ ≤ {MAX_CHUNK_SIGMA} cycles), "
        f"span {result['span_s'] / 3600:.2f} h; {tol_text}."
    )

    # ---- structured models ----------------------------------------------------------------
    if n_used >= MIN_CHUNKS:
        drift = fit_drift(t, y, sig)
        step = fit_step(t, y, sig)
        chi2_table["drift"] = {"chi2": drift.chi2, "dof": drift.dof,
                               "delta_chi2": drift.delta_chi2,
                               "significance_sigma": drift.significance_sigma}
        chi2_table["step"] = {"chi2": step.chi2, "dof": step.dof, "delta_chi2": step.delta_chi2,
                              "significance_sigma": step.significance_sigma}
        spacing = float(np.median(np.diff(t))) if n_used > 1 else 0.0
        min_period, max_period = 3.0 * spacing, 0.5 * result["span_s"]
        if n_used >= MIN_WOBBLE_CHUNKS and 0 < min_period < max_period:
            wobble = fit_wobble(t, y, sig, min_period, max_period)
            chi2_table["wobble"] = {"chi2": wobble.chi2, "dof": wobble.dof,
                                    "delta_chi2": wobble.delta_chi2,
                                    "significance_sigma": wobble.significance_sigma}
    smear = fit_smear(night_fit) if night_ok and night_fit is not None else None
    if smear is not None:
        chi2_table["smear"] = {"delta_chi2": smear.delta_chi2,
                               "significance_sigma": smear.significance_sigma}

    structures = [(name, fit) for name, fit in (("step", step), ("drift", drift),
                                                ("wobble", wobble)) if fit is not None]
    best_structure = max(structures, key=lambda item: item[1].significance_sigma, default=None)
    # ---- offset -------------------------------------------------------------------------
    # With a significant structure the night profile is a blend; its constant term is
    # the better offset. Otherwise the whole-night fit uses every event.
    if best_structure is not None and best_structure[1].significance_sigma >= SIGNIFICANT_SIGMA:
        name, fit = best_structure
        assert constant is not None
        off = constant.value_cycles if isinstance(fit, StepFit) else fit.offset_cycles
        off_sigma = constant.sigma_cycles * fit.scale
        source = f"constant term of the {name} model"
    elif night_ok and night_fit is not None:
        off, off_sigma = night_fit.shift_cycles, night_fit.sigma_cycles
        source = "whole-night profile"
    else:
        assert constant is not None
        off = constant.value_cycles
        off_sigma = constant.sigma_cycles * math.sqrt(
            max(1.0, constant.chi2 / max(constant.dof, 1))
        )
        source = "mean of the chunks; the whole-night profile shows no pulse"
    off_sig = _significance((off / off_sigma) ** 2, 1) if off_sigma > 0 else 0.0
    result.update(offset_cycles=off, offset_sigma_cycles=off_sigma,
                  offset_us=cycles_to_us(off, nu), offset_sigma_us=cycles_to_us(off_sigma, nu),
                  offset_significance_sigma=off_sig)

    if constant is not None and constant.dof > 0:
        residual_model = "constant"
        residual = y - constant.value_cycles
        dof = constant.dof
        if best_structure is not None and best_structure[1].significance_sigma >= SIGNIFICANT_SIGMA:
            residual_model, fit = best_structure
            residual = y - _model_values(residual_model, fit, t)
            dof = fit.dof
        jitter = fit_jitter(residual, sig, dof, residual_model)
        result["jitter_cycles"] = jitter.excess_cycles

    # ---- effects ------------------------------------------------------------------------------
    effects: list[tuple[str, float, float]] = [("offset", off_sig, abs(off))]
    if step is not None:
        effects.append(("step", step.significance_sigma, abs(step.size_cycles)))
    if drift is not None:
        effects.append(("drift", drift.significance_sigma, drift.excursion_cycles))
    if wobble is not None:
        effects.append(("wobble", wobble.significance_sigma, 2.0 * wobble.amplitude_cycles))
    if smear is not None:
        effects.append(("smeared", smear.significance_sigma, smear.width_cycles))
    if jitter is not None and jitter.model == "constant":
        effects.append(("smeared", jitter.significance_sigma, jitter.excess_cycles))
    # only the most significant structured model competes: the others fit the same data
    if best_structure is not None:
        effects = [e for e in effects if e[0] not in ("step", "drift", "wobble")
                   or e[0] == best_structure[0]]

    rated: list[tuple[str, float, float, str]] = []
    for name, significance, size in effects:
        level = _level(significance, size, tol)
        if level is not None:
            rated.append((name, significance, size, level))
    status, kind = "OK", "none"
    if rated:
        top = max(rated, key=lambda r: (_RANK[r[3]], _PRIORITY[r[0]] if r[3] != "OK" else 0, r[1]))
        status = top[3]
        significant = [r for r in rated if r[1] >= SIGNIFICANT_SIGMA]
        if status != "OK" or significant:
            if status == "OK":
                top = max(significant, key=lambda r: (_PRIORITY[r[0]], r[1]))
            kind = top[0]

    # ---- can we see a tolerance-sized effect at all? -----------------------------------------
    blind = []
    if n_used < MIN_CHUNKS:
        blind.append(f"only {n_used} usable chunks (need {MIN_CHUNKS} for drift and step)")
    if off_sigma > tol / 3.0:
        blind.append(f"offset error {off_sigma:.4f} cycles > tolerance/3")
    # statistical reach only: the model's scatter scaling is removed
    drift_reach = drift.rate_sigma_cycles_per_s / drift.scale * drift.span_s if drift else 0.0
    if drift_reach > tol / 3.0:
        blind.append(f"drift error over the night {drift_reach:.4f} cycles > tolerance/3")
    if blind and status == "OK":
        status, kind = "WARN", "insufficient_signal"

    # ---- numbers for the verdict -----------------------------------------------------------
    explanations: list[Explanation] = []
    if step is not None:
        before, after = used[step.index - 1], used[step.index]
        result.update(
            step_cycles=step.size_cycles, step_sigma_cycles=step.size_sigma_cycles,
            step_us=cycles_to_us(step.size_cycles, nu),
            step_sigma_us=cycles_to_us(step.size_sigma_cycles, nu),
            step_time_ns=int((before.end_ns + after.start_ns) // 2),
            step_window_ns=(int(before.mid_ns), int(after.mid_ns)),
        )
    if drift is not None:
        result.update(
            drift_us_per_hour=cycles_to_us(drift.rate_cycles_per_s, nu) * 3600.0,
            drift_sigma_us_per_hour=cycles_to_us(drift.rate_sigma_cycles_per_s, nu) * 3600.0,
        )
    if wobble is not None:
        result.update(
            wobble_period_s=wobble.period_s, wobble_period_sigma_s=wobble.period_sigma_s,
            wobble_amplitude_us=cycles_to_us(wobble.amplitude_cycles, nu),
            wobble_amplitude_sigma_us=cycles_to_us(wobble.amplitude_sigma_cycles, nu),
        )
    if smear is not None:
        result.update(smear_width_cycles=smear.width_cycles,
                      smear_width_sigma_cycles=smear.width_sigma_cycles,
                      smear_width_us=cycles_to_us(smear.width_cycles, nu))

    # ---- lines ------------------------------------------------------------------------------
    head = {
        "none": "no significant effect",
        "offset": "constant offset",
        "step": "step",
        "drift": "linear drift",
        "wobble": "periodic wobble",
        "smeared": "smeared profile",
        "insufficient_signal": "too little signal to judge",
    }[kind]
    lines.insert(0, f"{status}: {head} ({tol_text}).")
    lines.append(
        f"Offset ({source}): {off:+.5f} ± {off_sigma:.5f} cycles = "
        f"{_fmt_us(off, nu)} ± {cycles_to_us(off_sigma, nu):.1f} µs, {off_sig:.1f}σ."
    )
    if kind in ("offset", "step") or (kind == "none" and off_sig >= MARGINAL_SIGMA):
        what, value, err = ("offset", off, off_sigma) if kind != "step" else \
            ("step", step.size_cycles, step.size_sigma_cycles)  # type: ignore[union-attr]
        explanations = explain_offset(value, err, nu,
                                      frequency_spread_hz=frequency_spread_hz)
        lines.append(
            f"Offsets are known only modulo one period ({period_us:.1f} µs): "
            f"{_fmt_us(value, nu)} µs cannot be told from {_fmt_us(value, nu)} ± n·"
            f"{period_us:.1f} µs, so an error of whole periods (or a whole-second error at a "
            f"frequency with integer ν·Δt) is invisible."
        )
        if explanations:
            lines.append(
                f"The {what} is consistent (within 2σ) with: " + "; ".join(
                    f"Δt = {e.delta_t_s:+g} s, {e.label} → frac(ν·Δt) = "
                    f"{e.predicted_cycles:+.4f} cycles ({e.deviation_sigma:.1f}σ)"
                    for e in explanations
                ) + "."
            )
        else:
            lines.append(
                f"The {what} matches none of the usual whole-second time-scale mistakes "
                "(±1, 18, 19, 32.184, 37, 69.184 s) within 2σ."
            )
    # one structured model is described: the chosen kind, or else the best if marginal
    shown = kind if kind in ("step", "drift", "wobble") else None
    if shown is None and best_structure is not None \
            and best_structure[1].significance_sigma >= MARGINAL_SIGMA:
        shown = best_structure[0]
    if shown == "step" and step is not None:
        start_ns = used[0].mid_ns
        lines.append(
            f"Step: {step.size_cycles:+.5f} ± {step.size_sigma_cycles:.5f} cycles = "
            f"{_fmt_us(step.size_cycles, nu)} ± {cycles_to_us(step.size_sigma_cycles, nu):.1f} µs "
            f"at {result['step_time_ns']} ns "
            f"({(result['step_time_ns'] - start_ns) * 1e-9 / 3600:.2f} h after the first chunk; "
            f"between chunk midpoints {result['step_window_ns'][0]} and "
            f"{result['step_window_ns'][1]} ns), {step.significance_sigma:.1f}σ after "
            f"{step.trials:.0f} split positions."
        )
    if shown == "drift" and drift is not None:
        lines.append(
            f"Drift: {result['drift_us_per_hour']:+.2f} ± {result['drift_sigma_us_per_hour']:.2f} "
            f"µs/h, i.e. {drift.excursion_cycles:.4f} cycles "
            f"({cycles_to_us(drift.excursion_cycles, nu):.1f} µs) over "
            f"{drift.span_s / 3600:.2f} h, {drift.significance_sigma:.1f}σ."
        )
    if shown == "wobble" and wobble is not None:
        lines.append(
            f"Wobble: period {wobble.period_s:.3f} ± {wobble.period_sigma_s:.3f} s, amplitude "
            f"{result['wobble_amplitude_us']:.1f} ± {result['wobble_amplitude_sigma_us']:.1f} µs "
            f"({wobble.amplitude_cycles:.4f} cycles), {wobble.significance_sigma:.1f}σ after "
            f"{wobble.trials:.0f} independent periods."
        )
    structured = kind in ("step", "drift", "wobble")
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
    fitted = [f"{name} {v['chi2']:.1f} ({v['dof']:.0f})" for name, v in chi2_table.items()
              if "chi2" in v]
    if fitted:
        lines.append("χ² (dof): " + ", ".join(fitted) + ".")
    if blind:
        lines.append("Limited sensitivity: " + "; ".join(blind) + ".")

    return ClockVerdict(
        status=status, kind=kind, chi2=chi2_table, explanations=explanations, lines=lines,
        constant=constant, drift=drift, step=step, wobble=wobble, smear=smear, jitter=jitter,
        **result,
    )


def _model_values(name: str, fit: Any, t: np.ndarray) -> np.ndarray:
    """Fitted offsets (cycles) of a structured model at times ``t`` (s)."""
    if name == "drift":
        return fit.offset_cycles + fit.rate_cycles_per_s * (t - fit.reference_s)
    if name == "step":
        return np.where(np.arange(t.size) < fit.index, fit.before_cycles, fit.after_cycles)
    x = t - t.min()
    return fit.offset_cycles + fit.amplitude_cycles * np.cos(
        2.0 * np.pi * (x / fit.period_s - fit.phase_cycles)
    )
