"""The clock-chain diagnosis: which simple history of the timing error explains the night.

Theory of operation
-------------------
An error δt(t) in the event times moves the phase of a pulsar of frequency ν by
ν·δt(t) cycles. ``diagnose`` takes the chunk offsets (:mod:`.chunks`), unwraps them
(cycles are continuous from chunk to chunk; the whole series is known only modulo
one cycle) and fits, by weighted least squares: a constant, a linear drift, one
step (best split; the search over splits counts as trials), and a sinusoidal
wobble (periods from three chunk spacings to half the span; the independent
frequencies count as trials) (:mod:`.series`, :mod:`.wobble`). The night profile is
also compared with the template for broadening (:mod:`.smear`): with a Gaussian
phase jitter of rms σ_s, each harmonic is damped by exp(−2π²k²σ_s²). Excess chunk
scatter that no model explains is a jitter too.

Each effect gets a significance from Δχ² (χ² tail → one-sided Gaussian σ, after
trials). Thresholds: ≥ 5σ is an effect, 3–5σ marginal (:mod:`.verdict`). Its size,
compared with the tolerance (20 milliperiods by default, common practice), sets the
status:

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

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..cycles import cycles_to_us
from ..templatefit import OffsetFit
from . import wording
from .chunks import ChunkOffset
from .mistakes import Explanation, explain_offset
from .rating import blind_spots, effects, status_and_kind
from .series import (
    JitterFit,
    StepFit,
    delta_chi2_sigma,
    fit_constant,
    fit_drift,
    fit_jitter,
    fit_step,
    unwrap_offsets,
)
from .smear import fit_smear
from .verdict import (
    MARGINAL_SIGMA,
    MAX_CHUNK_SIGMA,
    MIN_CHUNKS,
    MIN_WOBBLE_CHUNKS,
    ClockVerdict,
    Fits,
    Offset,
    Tolerance,
)
from .wobble import fit_wobble

__all__ = ["diagnose", "usable_chunks"]

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
        From :func:`turnstamp.core.clock.chunks.chunk_offsets`.
    night_fit : OffsetFit or None
        ``fit_offset`` of the whole night's moments (None when there are no events).
    frequency_hz : float
        Spin frequency ν, Hz (converts cycles to µs).
    tolerance_cycles : float
        Largest acceptable phase error, cycles (0.02: the "20-milliperiod" rule of
        high-energy folding, common practice).
    tolerance_us : float, optional
        Also a limit in µs; the effective tolerance is the smaller of the two.
    frequency_spread_hz : float
        Half-range of the apparent (Doppler-shifted) frequency over the night; widens
        the match of known time-keeping mistakes (see :func:`.mistakes.explain_offset`).

    Returns
    -------
    ClockVerdict
        Status, kind, numbers with uncertainties, χ² of each model, and ``lines``.
    """
    scale = _tolerance(frequency_hz, tolerance_cycles, tolerance_us)
    chunks = sorted(chunks, key=lambda c: c.mid_ns)
    used = usable_chunks(chunks)
    result: dict[str, Any] = dict(frequency_hz=scale.nu, tolerance_cycles=scale.cycles,
                                  tolerance_us=scale.us, n_chunks=len(chunks),
                                  n_used=len(used), reference_ns=None, span_s=0.0)
    night = night_fit if _night_detected(night_fit) else None
    if night is None and len(used) < MIN_CHUNKS:
        lines = wording.no_signal_lines(chunks, used, night_fit)
        return ClockVerdict(status="WARN", kind="no_signal", lines=lines, **result)
    fits = _series(used, night, result)
    _fit_structures(fits, len(used), result["span_s"])
    fits.smear = fit_smear(night) if night is not None else None
    if fits.smear is not None:
        fits.chi2["smear"] = {"delta_chi2": fits.smear.delta_chi2,
                              "significance_sigma": fits.smear.significance_sigma}
    offset = _offset(fits, night)
    result.update(offset_cycles=offset.value, offset_sigma_cycles=offset.sigma,
                  offset_us=cycles_to_us(offset.value, scale.nu),
                  offset_sigma_us=cycles_to_us(offset.sigma, scale.nu),
                  offset_significance_sigma=offset.significance)
    fits.jitter = _jitter(fits)
    if fits.jitter is not None:
        result["jitter_cycles"] = fits.jitter.excess_cycles
    status, kind = status_and_kind(effects(offset, fits), scale.cycles)
    blind = blind_spots(len(used), offset, fits.drift, scale.cycles)
    if blind and status == "OK":
        status, kind = "WARN", "insufficient_signal"
    result.update(_model_numbers(fits, used, scale.nu))
    matched = _matched_mistakes(kind, offset, fits.step, scale.nu, frequency_spread_hz)
    lines = wording.verdict_lines(status, kind, scale, len(chunks), used, result,
                                  offset, fits, matched, blind)
    return ClockVerdict(
        status=status, kind=kind, chi2=fits.chi2,
        explanations=[] if matched is None else matched[3], lines=lines,
        constant=fits.constant, drift=fits.drift, step=fits.step, wobble=fits.wobble,
        smear=fits.smear, jitter=fits.jitter, **result,
    )


def _tolerance(frequency_hz: float, tolerance_cycles: float,
               tolerance_us: float | None) -> Tolerance:
    """The effective tolerance: the smaller of the limit in cycles and that in µs."""
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
    return Tolerance(nu, tol, cycles_to_us(tol, nu))


def usable_chunks(chunks: list[ChunkOffset]) -> list[ChunkOffset]:
    """Chunks that detected the pulse with an offset known to ``MAX_CHUNK_SIGMA`` cycles."""
    return [c for c in chunks if c.detected and math.isfinite(c.shift_cycles)
            and 0 < c.sigma_cycles <= MAX_CHUNK_SIGMA]


def _night_detected(night_fit: OffsetFit | None) -> bool:
    return night_fit is not None and bool(night_fit.detected) \
        and math.isfinite(night_fit.shift_cycles)


def _series(used: list[ChunkOffset], night: OffsetFit | None, result: dict) -> Fits:
    """The unwrapped offset series (mean in [−0.5, 0.5) cycles) and its constant fit.

    Sets ``span_s`` and ``reference_ns`` (the weighted mean chunk time) in ``result``.
    """
    if not used:
        empty = np.zeros(0)
        return Fits(empty, empty, empty)
    ref_shift = night.shift_cycles if night is not None else \
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
    fits = Fits(t, y, sig, constant=constant)
    fits.chi2["constant"] = {"chi2": constant.chi2, "dof": constant.dof}
    return fits


def _fit_structures(fits: Fits, n_used: int, span_s: float) -> None:
    """Drift and step with enough chunks; the wobble with enough for a period scan."""
    if n_used < MIN_CHUNKS:
        return
    t, y, sig = fits.t, fits.y, fits.sig
    fits.drift = fit_drift(t, y, sig)
    fits.step = fit_step(t, y, sig)
    for name in ("drift", "step"):
        fit = getattr(fits, name)
        fits.chi2[name] = {"chi2": fit.chi2, "dof": fit.dof, "delta_chi2": fit.delta_chi2,
                           "significance_sigma": fit.significance_sigma}
    spacing = float(np.median(np.diff(t))) if n_used > 1 else 0.0
    min_period, max_period = 3.0 * spacing, 0.5 * span_s
    if n_used >= MIN_WOBBLE_CHUNKS and 0 < min_period < max_period:
        fits.wobble = fit_wobble(t, y, sig, min_period, max_period)
        fits.chi2["wobble"] = {"chi2": fits.wobble.chi2, "dof": fits.wobble.dof,
                               "delta_chi2": fits.wobble.delta_chi2,
                               "significance_sigma": fits.wobble.significance_sigma}


def _offset(fits: Fits, night: OffsetFit | None) -> Offset:
    """The constant offset of the night.

    With a significant structure the night profile is a blend; its constant term is
    the better offset. Otherwise the whole-night fit uses every event.
    """
    structure = fits.significant_structure
    if structure is not None:
        name, fit = structure
        assert fits.constant is not None
        off = fits.constant.value_cycles if isinstance(fit, StepFit) else fit.offset_cycles
        off_sigma = fits.constant.sigma_cycles * fit.scale
        source = f"constant term of the {name} model"
    elif night is not None:
        off, off_sigma = night.shift_cycles, night.sigma_cycles
        source = "whole-night profile"
    else:
        constant = fits.constant
        assert constant is not None
        off = constant.value_cycles
        off_sigma = constant.sigma_cycles * math.sqrt(
            max(1.0, constant.chi2 / max(constant.dof, 1))
        )
        source = "mean of the chunks; the whole-night profile shows no pulse"
    significance = delta_chi2_sigma((off / off_sigma) ** 2, 1) if off_sigma > 0 else 0.0
    return Offset(off, off_sigma, source, significance)


def _jitter(fits: Fits) -> JitterFit | None:
    """Extra chunk scatter about the significant structure, or about the constant."""
    constant = fits.constant
    if constant is None or constant.dof <= 0:
        return None
    model, residual, dof = "constant", fits.y - constant.value_cycles, constant.dof
    structure = fits.significant_structure
    if structure is not None:
        model, fit = structure
        residual = fits.y - _model_values(model, fit, fits.t)
        dof = fit.dof
    return fit_jitter(residual, fits.sig, dof, model)


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


def _model_numbers(fits: Fits, used: list[ChunkOffset], nu: float) -> dict[str, Any]:
    """The verdict's numbers of the step, drift, wobble and smear, in µs where timed."""
    out: dict[str, Any] = {}
    step, drift, wobble, smear = fits.step, fits.drift, fits.wobble, fits.smear
    if step is not None:
        before, after = used[step.index - 1], used[step.index]
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


def _matched_mistakes(kind: str, offset: Offset, step: StepFit | None, nu: float,
                      spread_hz: float) -> tuple[str, float, float, list[Explanation]] | None:
    """(what, value, error, explanations) for an offset or step worth explaining, else None."""
    if not (kind in ("offset", "step") or (kind == "none"
                                           and offset.significance >= MARGINAL_SIGMA)):
        return None
    if kind == "step":
        assert step is not None
        what, value, err = "step", step.size_cycles, step.size_sigma_cycles
    else:
        what, value, err = "offset", offset.value, offset.sigma
    return what, value, err, explain_offset(value, err, nu, frequency_spread_hz=spread_hz)
