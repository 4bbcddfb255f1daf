"""The clock-chain diagnosis: which simple history of the timing error explains the night.

Theory of operation
-------------------
An error δt(t) in the event times moves the phase of a pulsar by about ν_app·δt(t)
cycles. ``diagnose`` takes the chunk offsets (:mod:`.chunks`) that detected the pulse
unambiguously, widens the errors of chunks whose amplitude fluctuated above the
night's (selection by detection favours them), unwraps them without carrying cycle
slips and sets rare outliers aside (:mod:`.robust`), then fits by weighted least
squares: a constant, a linear drift, one step (best split; the search counts as
trials) and a sinusoidal wobble (periods from three chunk spacings to half the
span; the independent frequencies count as trials) (:mod:`.series`, :mod:`.wobble`).
Outliers are judged again against a significant structure. The night profile is
compared with the template for broadening (:mod:`.smear`); excess chunk scatter no
model explains is a jitter.

Each effect gets a one-sided significance after its trials; :mod:`.rating` turns
significance, size and tolerance into the status. The offset is that of the
whole-night profile (which uses every event: a faint source whose chunks never
detect the pulse is still judged), or, when a structured model is significant,
that model's constant term. Then the usual time-keeping mistakes are predicted as
whole chunk series through the apparent frequency at each chunk
(:mod:`.mistakes`, :mod:`.apparent`); a mistake that fits well names the fault
(kind ``offset`` or ``step``, ``mistake_s``). The night is undecided
(WARN ``insufficient_signal``, with the minutes still needed) while the offset error
exceeds a third of the tolerance; no pulse at all is WARN ``no_signal``.

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np
from scipy import special

from ..cycles import cycles_to_us, wrap_cycles
from ..templatefit import DETECTION_SIGMA, MIN_DETECTION_EVENTS, OffsetFit
from . import numbers, wording
from .apparent import ConstantSpin, SpinView
from .chunks import ChunkOffset
from .mistakes import Explanation, explain_series
from .rating import blind_spots, effects, level, limitations, status_and_kind
from .robust import outliers, unwrap_robust
from .series import delta_chi2_sigma, fit_constant, fit_drift, fit_jitter, fit_step
from .smear import fit_smear
from .verdict import (
    DECIDED_FRACTION,
    FALSE_ALARM,
    MARGINAL_SIGMA,
    MAX_CHUNK_SIGMA,
    MIN_CHUNKS,
    MIN_WOBBLE_CHUNKS,
    SIGNIFICANT_SIGMA,
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
    *,
    spin: SpinView | None = None,
    time_text: Callable[[int], str] | None = None,
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
        Without ``spin``: half-range of the apparent frequency over the night, which
        loosens the match of time-keeping mistakes by |Δt|·spread.
    spin : SpinView, optional
        The pulsar at the site (:class:`~.apparent.SiteSpin`): each mistake is then
        predicted chunk by chunk through the apparent frequency. Default: ν all night.
    time_text : callable, optional
        Instant (ns, the chunks' scale) -> text for the lines; the pipeline gives UTC
        calendar times. Default: the label in the chunks' scale.

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
    if night is None and (len(used) < MIN_CHUNKS or chance_detections(chunks, used)):
        lines = wording.no_signal_lines(chunks, used, night_fit)
        return ClockVerdict(status="WARN", kind="no_signal", lines=lines, size=None,
                            **result)
    fits = _series(used, chunks, night, result)
    fits.smear = fit_smear(night) if night is not None else None
    if fits.smear is not None:
        fits.chi2["smear"] = {"delta_chi2": fits.smear.delta_chi2,
                              "significance_sigma": fits.smear.significance_sigma}
    offset = _offset(fits, night)
    result.update(offset_cycles=offset.value, offset_sigma_cycles=offset.sigma,
                  offset_us=cycles_to_us(offset.value, scale.nu),
                  offset_sigma_us=cycles_to_us(offset.sigma, scale.nu),
                  offset_significance_sigma=offset.significance, n_rejected=fits.n_rejected)
    fits.jitter = _jitter(fits)
    if fits.jitter is not None:
        result["jitter_cycles"] = fits.jitter.excess_cycles
    found = effects(offset, fits)
    status, kind = status_and_kind(found, scale.cycles)
    explanations = _explanations(status, offset, fits, spin, scale.nu, frequency_spread_hz)
    named = explanations[0] if explanations else None
    if named is not None:
        status, kind = _named_status(named, fits, spin, scale), named.pattern
        result["mistake_s"] = named.delta_t_s
    blind = blind_spots(offset, scale.cycles)
    if blind and status == "OK":
        status, kind = "WARN", "insufficient_signal"
        result["minutes_needed"] = _minutes_needed(chunks, offset.sigma, scale.cycles)
    result.update(numbers.model_numbers(fits, used, scale.nu))
    result.update(numbers.size_of(kind, result))
    result["false_alarm_probability"] = _false_alarm(kind, status, found)
    notes = limitations(len(used), fits.drift, scale.cycles)
    lines = wording.verdict_lines(status, kind, scale, len(chunks), used, result, offset,
                                  fits, explanations, blind + notes,
                                  time_text or wording.label_text)
    return ClockVerdict(
        status=status, kind=kind, chi2=fits.chi2, explanations=explanations, lines=lines,
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
    """Chunks that detected the pulse unambiguously, known to ``MAX_CHUNK_SIGMA`` cycles."""
    return [c for c in chunks if c.detected and not c.ambiguous
            and math.isfinite(c.shift_cycles) and 0 < c.sigma_cycles <= MAX_CHUNK_SIGMA]


def chance_detections(chunks: list[ChunkOffset], used: list[ChunkOffset]) -> bool:
    """The usable chunks are no more than chance gives: among the M chunks with enough
    events to detect anything, noise alone passes each one's threshold with
    probability p = Φ(−DETECTION_SIGMA), and k or more of them do so with a
    probability (binomial tail) above that of a significant effect (Φ(−5))."""
    able = sum(c.sum_w > 0 and c.count >= MIN_DETECTION_EVENTS for c in chunks)
    chance = float(special.ndtr(-DETECTION_SIGMA))
    tail = float(special.bdtrc(len(used) - 1, able, chance)) if used else 1.0
    return tail > FALSE_ALARM["significant"]


def _night_detected(night_fit: OffsetFit | None) -> bool:
    return night_fit is not None and bool(night_fit.detected) \
        and math.isfinite(night_fit.shift_cycles)


def _pulsed_fractions(chunks: list[ChunkOffset]) -> np.ndarray:
    """Fitted pulsed fraction (amplitude/Σw) of each chunk (NaN without events)."""
    amplitude = np.array([c.amplitude for c in chunks], dtype=float)
    sum_w = np.array([c.sum_w for c in chunks], dtype=float)
    return amplitude / np.where(sum_w > 0, sum_w, np.nan)


def _honest_sigma(used: list[ChunkOffset], chunks: list[ChunkOffset]) -> np.ndarray:
    """Chunk errors, widened where the amplitude fluctuated above the typical pulsed
    fraction of *all* the night's chunks (detected or not): a chunk that passed the
    detection cut on an upward fluctuation overstates its precision (the error scales
    as 1/amplitude)."""
    sigma = np.array([c.sigma_cycles for c in used])
    every = _pulsed_fractions(chunks)
    every = every[np.isfinite(every)]
    typical = float(np.median(every)) if every.size else 0.0
    if not typical > 0:
        return sigma
    return sigma * np.maximum(1.0, _pulsed_fractions(used) / typical)


def _series(used: list[ChunkOffset], chunks: list[ChunkOffset], night: OffsetFit | None,
            result: dict) -> Fits:
    """The unwrapped offset series (mean in [−0.5, 0.5) cycles), outliers set aside, and
    its models. Sets ``span_s`` and ``reference_ns`` (the weighted mean chunk time)."""
    if not used:
        empty = np.zeros(0)
        return Fits(empty, empty, empty, mids_ns=np.zeros(0, np.int64))
    ref_shift = night.shift_cycles if night is not None else \
        min(used, key=lambda c: c.sigma_cycles).shift_cycles
    mids = np.array([c.mid_ns for c in used], dtype=np.int64)
    t = (mids - mids[0]).astype(float) * 1e-9
    sig = _honest_sigma(used, chunks)
    y = unwrap_robust([c.shift_cycles for c in used], ref_shift)
    w = 1.0 / sig**2
    y = y - math.floor(float(w @ y / w.sum()) + 0.5)  # weighted mean in [−0.5, 0.5)
    kept = ~outliers(y - float(w @ y / w.sum()), sig)
    fits = _fit_models(t, y, sig, mids, kept)
    structure = fits.significant_structure
    if structure is not None:  # outliers judged again against the structure found
        model = numbers.model_values(structure[0], structure[1], t, fits.t)
        again = ~outliers(y - model, sig)
        if not np.array_equal(again, kept):
            fits = _fit_models(t, y, sig, mids, again)
    kept_mids = fits.mids_ns
    assert kept_mids is not None
    result["span_s"] = float(fits.t[-1] - fits.t[0]) if fits.t.size else 0.0
    wk = 1.0 / fits.sig**2
    result["reference_ns"] = int(kept_mids[0] + round(float(wk @ (fits.t - fits.t[0])
                                                             / wk.sum()) * 1e9))
    return fits


def _fit_models(t, y, sig, mids, kept) -> Fits:
    """Constant, drift, step and wobble on the kept chunks."""
    fits = Fits(t[kept], y[kept], sig[kept], mids_ns=mids[kept],
                n_rejected=int((~kept).sum()))
    fits.constant = constant = fit_constant(fits.t, fits.y, fits.sig)
    fits.chi2["constant"] = {"chi2": constant.chi2, "dof": constant.dof}
    n = fits.t.size
    if n < MIN_CHUNKS:
        return fits
    fits.drift = fit_drift(fits.t, fits.y, fits.sig)
    fits.step = fit_step(fits.t, fits.y, fits.sig)
    for name in ("drift", "step"):
        fit = getattr(fits, name)
        fits.chi2[name] = {"chi2": fit.chi2, "dof": fit.dof, "delta_chi2": fit.delta_chi2,
                           "significance_sigma": fit.significance_sigma}
    span = float(fits.t[-1] - fits.t[0])
    spacing = float(np.median(np.diff(fits.t))) if n > 1 else 0.0
    min_period, max_period = 3.0 * spacing, 0.5 * span
    if n >= MIN_WOBBLE_CHUNKS and 0 < min_period < max_period:
        fits.wobble = fit_wobble(fits.t, fits.y, fits.sig, min_period, max_period)
        fits.chi2["wobble"] = {"chi2": fits.wobble.chi2, "dof": fits.wobble.dof,
                               "delta_chi2": fits.wobble.delta_chi2,
                               "significance_sigma": fits.wobble.significance_sigma}
    return fits


def _offset(fits: Fits, night: OffsetFit | None) -> Offset:
    """The constant offset of the night.

    With a significant structure the night profile is a blend; its constant term is
    the better offset. Otherwise the whole-night fit uses every event.
    """
    structure = fits.significant_structure
    constant = fits.constant
    if structure is not None and constant is not None:
        name, fit = structure
        off = constant.value_cycles if name == "step" else fit.offset_cycles
        off_sigma = constant.sigma_cycles * fit.scale
        source = f"constant term of the {name} model"
    elif night is not None:
        off, off_sigma = night.shift_cycles, night.sigma_cycles
        source = "whole-night profile"
    else:
        assert constant is not None
        off = constant.value_cycles
        off_sigma = constant.sigma_cycles * math.sqrt(
            max(1.0, constant.chi2 / max(constant.dof, 1)))
        source = "mean of the chunks; the whole-night profile shows no pulse"
    significance = delta_chi2_sigma((off / off_sigma) ** 2, 1) if off_sigma > 0 else 0.0
    return Offset(off, off_sigma, source, significance)


def _jitter(fits: Fits):
    """Extra chunk scatter about the significant structure, or about the constant."""
    constant = fits.constant
    if constant is None or constant.dof <= 0:
        return None
    model, residual, dof = "constant", fits.y - constant.value_cycles, constant.dof
    structure = fits.significant_structure
    if structure is not None:
        model, fit = structure
        residual = fits.y - numbers.model_values(model, fit, fits.t, fits.t)
        dof = fit.dof
    return fit_jitter(residual, fits.sig, dof, model)


def _explanations(status: str, offset: Offset, fits: Fits, spin: SpinView | None,
                  nu: float, spread_hz: float) -> list[Explanation]:
    """Time-keeping mistakes whose predicted chunk series fits (or, without usable chunks,
    whose offset matches the night's), best first; only when something was seen."""
    if status == "OK" and offset.significance < MARGINAL_SIGMA:
        return []
    view = spin if spin is not None else ConstantSpin(nu)
    if fits.mids_ns is None or fits.y.size == 0:
        y, sig, mids = np.array([offset.value]), np.array([offset.sigma]), np.zeros(1, np.int64)
        view = ConstantSpin(nu)
    else:
        y, sig, mids = fits.y, fits.sig, fits.mids_ns
    slack = 0.0 if spin is not None else abs(spread_hz)
    return explain_series(y, sig, lambda dt: view.shift_cycles(mids, dt), slack_hz=slack)


def _named_status(named: Explanation, fits: Fits, spin: SpinView | None,
                  scale: Tolerance) -> str:
    """FAIL when the mistake's phase error exceeds the tolerance, else WARN."""
    size = abs(named.predicted_cycles)
    if fits.mids_ns is not None and fits.mids_ns.size and spin is not None:
        moved = np.asarray(spin.shift_cycles(fits.mids_ns, named.delta_t_s), dtype=float)
        if named.step_index is not None:
            moved = moved[named.step_index:]
        size = float(np.max(np.abs(wrap_cycles(moved))))
    return level("offset", SIGNIFICANT_SIGMA, size, scale.cycles) or "WARN"


def _minutes_needed(chunks: list[ChunkOffset], sigma: float, tol: float) -> float | None:
    """More minutes at tonight's rate until the offset error is ``DECIDED_FRACTION`` of tol."""
    if not chunks or not (sigma > 0 and math.isfinite(sigma)):
        return None
    observed_s = (max(c.end_ns for c in chunks) - min(c.start_ns for c in chunks)) * 1e-9
    needed = DECIDED_FRACTION * tol
    return max(observed_s / 60.0 * ((sigma / needed) ** 2 - 1.0), 0.0)


def _false_alarm(kind: str, status: str, found: list[tuple[str, float, float]]) -> float | None:
    """Nominal false-alarm probability of the kind reported, at the level it reached."""
    levels = [significance for name, significance, _ in found if name == kind]
    if status == "OK" or not levels:
        return None
    return FALSE_ALARM["significant" if max(levels) >= SIGNIFICANT_SIGMA else "marginal"]
