"""Quick-look clock-chain check: model fits on offset series and whole synthetic nights.

Sources, named beside each check: TAI − UTC = 37 s since 2017 (IERS Bulletin C; the
leap-second table of erfa.dat), TT − TAI = 32.184 s (erfa.TTMTAI); the 20-milliperiod
tolerance (common practice); the Gaussian smearing factor exp(−2π²k²σ²) (the
characteristic function of a Gaussian); σ one-sided and tail probabilities from
scipy.stats.
Synthetic nights are built at the phase level: φ = φ_template + ν·δt(t) with an
injected timing error δt(t); everything else is known by construction.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats as scipy_stats

from turnstamp.core.clock.chunks import ChunkOffset, chunk_offsets
from turnstamp.core.clock.diagnose import diagnose
from turnstamp.core.clock.mistakes import explain_offset
from turnstamp.core.clock.series import (
    delta_chi2_sigma,
    fit_constant,
    fit_drift,
    fit_jitter,
    fit_step,
    unwrap_offsets,
)
from turnstamp.core.clock.smear import fit_smear
from turnstamp.core.clock.verdict import ClockVerdict
from turnstamp.core.clock.wobble import fit_wobble
from turnstamp.core.cycles import wrap_cycles
from turnstamp.core.moments import PhaseMoments
from turnstamp.core.peaks import PeakComponent
from turnstamp.core.periodicity import h_test
from turnstamp.core.template import PulseTemplate
from turnstamp.core.templatefit import fit_offset
from turnstamp.core.timebinned import TimeBinnedMoments

NU = 311.37  # Hz, an invented bright millisecond pulsar
NIGHT_S = 8 * 3600.0
EPOCH_NS = 819_999_600 * 10**9  # a night in 2025, ns since 2000-01-01T12:00; a whole
# number of 2-minute intervals, so that the nights fill exactly 480 one-minute intervals
TEMPLATE = PulseTemplate(
    name="invented bright pulsar", unpulsed_fraction=0.5,
    components=[PeakComponent(shape="von_mises", position_cycles=0.25, width_cycles=0.03)],
)


# ---------------------------------------------------------------------------------------
# Model fits on synthetic offset series with known answers


def test_constant_fit_is_the_weighted_mean():
    # definition of weighted least squares
    y, s = np.array([0.1, 0.2, 0.4]), np.array([0.1, 0.1, 0.2])
    fit = fit_constant(np.arange(3.0), y, s)
    w = 1 / s**2
    assert fit.value_cycles == pytest.approx(float(w @ y / w.sum()), rel=1e-14)
    assert fit.sigma_cycles == pytest.approx(1 / math.sqrt(w.sum()), rel=1e-14)
    assert fit.chi2 == pytest.approx(float(w @ (y - fit.value_cycles) ** 2)) and fit.dof == 2


def test_drift_fit_recovers_a_line():
    t = np.linspace(0, 7200, 60)
    exact = fit_drift(t, 0.01 + 3e-6 * t, np.full(t.size, 1e-3))
    assert exact.rate_cycles_per_s == pytest.approx(3e-6, rel=1e-10)
    assert exact.offset_cycles == pytest.approx(0.01 + 3e-6 * 3600, rel=1e-10)
    assert exact.excursion_cycles == pytest.approx(3e-6 * 7200, rel=1e-10)
    rng = np.random.default_rng(1)
    noisy = fit_drift(t, 3e-6 * t + rng.normal(0, 1e-3, t.size), np.full(t.size, 1e-3))
    assert noisy.rate_cycles_per_s == pytest.approx(3e-6, abs=3 * noisy.rate_sigma_cycles_per_s)
    assert noisy.significance_sigma > 20
    flat = fit_drift(t, rng.normal(0, 1e-3, t.size), np.full(t.size, 1e-3))
    assert flat.significance_sigma < 3


def test_step_fit_finds_the_split_and_size():
    rng = np.random.default_rng(2)
    t = np.arange(100) * 60.0
    y = np.where(np.arange(100) < 37, 0.0, 0.05) + rng.normal(0, 0.005, 100)
    fit = fit_step(t, y, np.full(100, 0.005))
    assert fit.index == 37 and fit.trials == 97
    assert fit.size_cycles == pytest.approx(0.05, abs=3 * fit.size_sigma_cycles)
    assert fit.significance_sigma > 10


def test_wobble_fit_recovers_period_amplitude_and_phase():
    rng = np.random.default_rng(3)
    t = np.arange(720) * 10.0
    y = 0.02 * np.cos(2 * np.pi * (t / 300.0 - 0.1)) + rng.normal(0, 0.003, t.size)
    fit = fit_wobble(t, y, np.full(t.size, 0.003), 30.0, 3600.0)
    assert fit.period_s == pytest.approx(300.0, abs=3 * fit.period_sigma_s)
    assert fit.amplitude_cycles == pytest.approx(0.02, abs=3 * fit.amplitude_sigma_cycles)
    assert wrap_cycles(fit.phase_cycles - 0.1) == pytest.approx(0, abs=3 * fit.phase_sigma_cycles)
    assert fit.significance_sigma > 20
    assert fit.trials == pytest.approx(7190 * (1 / 30 - 1 / 3600), rel=1e-6)


def test_no_false_structure_in_white_noise():
    # 60 seeded white-noise series: nothing reaches 5σ, and ≤ 2 reach 3σ per model
    # (nominal 0.135% each; the trial corrections are conservative)
    rng = np.random.default_rng(4)
    t = np.arange(200) * 60.0
    s = np.full(200, 0.004)
    hits = {"drift": [], "step": [], "wobble": []}
    for _ in range(60):
        y = rng.normal(0, 0.004, 200)
        hits["drift"].append(fit_drift(t, y, s).significance_sigma)
        hits["step"].append(fit_step(t, y, s).significance_sigma)
        hits["wobble"].append(fit_wobble(t, y, s, 180.0, 6000.0).significance_sigma)
    for name, values in hits.items():
        assert max(values) < 5, name
        assert sum(v >= 3 for v in values) <= 2, name


def test_jitter_fit_measures_extra_scatter():
    rng = np.random.default_rng(5)
    sigma = np.full(2000, 0.01)
    residual = rng.normal(0, math.hypot(0.01, 0.02), 2000)
    fit = fit_jitter(residual, sigma, 2000)
    assert fit.excess_cycles == pytest.approx(0.02, rel=0.1)
    assert fit.significance_sigma > 10
    assert fit_jitter(rng.normal(0, 0.01, 2000), sigma, 2000).significance_sigma < 3


def test_significance_convention():
    # σ is one-sided, σ = Φ⁻¹(1 − p) (scipy.stats.norm.isf). Δχ² = 25 with 1 dof has
    # p = P(|Z| > 5) = 5.733031e-7 (the two-sided 5σ value, 2·scipy.stats.norm.sf(5)),
    # i.e. one-sided σ = norm.isf(5.733031e-7) = 4.8646 (4.8916 is the two-sided σ of 1e-6)
    assert delta_chi2_sigma(25.0, 1) == pytest.approx(scipy_stats.norm.isf(5.733031e-7), rel=1e-6)
    # Δχ² = 20 with 2 dof: p = e^{-10} = 4.539993e-5 (closed-form χ²_2 tail, scipy.stats.chi2.sf)
    assert delta_chi2_sigma(20.0, 2) == pytest.approx(scipy_stats.norm.isf(math.exp(-10)))
    # 100 independent trials: p_post = 1 − (1 − p)^100
    p_post = -math.expm1(100 * math.log1p(-math.exp(-10)))
    assert delta_chi2_sigma(20.0, 2, 100) == pytest.approx(scipy_stats.norm.isf(p_post))


def test_unwrap_keeps_a_ramp_continuous():
    ramp = np.linspace(0.3, 1.9, 40)
    wrapped = np.array([wrap_cycles(x) for x in ramp])
    unwrapped = unwrap_offsets(wrapped, reference=0.3)
    assert np.allclose(unwrapped, ramp, atol=1e-12)


def test_explanations_of_known_time_mistakes():
    # TAI − UTC = 37 s since 2017-01-01 (IERS Bulletin C; erfa.dat): frac(311.37 × 37) =
    # frac(11520.69) = 0.69 → −0.31 cycles; one leap second: frac(311.37) = +0.37 cycles
    found = explain_offset(-0.31, 0.001, NU)
    assert [e.delta_t_s for e in found] == [37.0]
    assert found[0].predicted_cycles == pytest.approx(-0.31, abs=1e-9)
    assert [e.delta_t_s for e in explain_offset(0.37, 0.001, NU)] == [1.0]
    assert [e.delta_t_s for e in explain_offset(-0.37, 0.001, NU)] == [-1.0]
    assert explain_offset(0.0623, 0.0001, NU) == []


def test_smear_fit_recovers_an_injected_gaussian_jitter():
    # a Gaussian phase jitter σ multiplies harmonic k by exp(−2π²k²σ²) exactly (its
    # characteristic function), so the smear fit of template ⊗ Gaussian(0.02) returns 0.02
    rng = np.random.default_rng(6)
    phases = TEMPLATE.sample(200_000, rng)
    clean = fit_offset(PhaseMoments().update(phases), TEMPLATE)
    smeared = fit_offset(PhaseMoments().update(np.remainder(
        phases + rng.normal(0, 0.02, phases.size), 1)), TEMPLATE)
    fit = fit_smear(smeared)
    assert fit.width_cycles == pytest.approx(0.02, abs=3 * fit.width_sigma_cycles)
    assert fit.significance_sigma > 10
    assert fit_smear(clean).significance_sigma < 3


# ---------------------------------------------------------------------------------------
# Chunking


@pytest.fixture(scope="module")
def short_bright():
    """10 minutes, 200 events/s, 10-second intervals."""
    rng = np.random.default_rng(7)
    n = 120_000
    times = EPOCH_NS + np.sort(rng.integers(0, 600 * 10**9, n))
    binned = TimeBinnedMoments(10 * 10**9).update(times, TEMPLATE.sample(n, rng))
    return binned


def test_chunks_by_time(short_bright):
    chunks = chunk_offsets(short_bright, TEMPLATE, chunk_ns=60 * 10**9)
    assert len(chunks) == 10
    for c in chunks:
        assert c.end_ns - c.start_ns == 60 * 10**9
        assert abs(c.mid_ns - (c.start_ns + 30 * 10**9)) < 2 * 10**9
        assert c.detected and abs(c.shift_cycles) < 5 * c.sigma_cycles + 1e-3
    assert sum(c.count for c in chunks) == 120_000
    # the list form with the interval length inferred from the starts gives the same
    again = chunk_offsets(short_bright.intervals(), TEMPLATE, chunk_ns=60 * 10**9)
    assert again == chunks


def test_chunks_by_signal(short_bright):
    every = chunk_offsets(short_bright, TEMPLATE)  # H ≥ 36 is reached in each interval
    assert len(every) == 60
    one = chunk_offsets(short_bright, TEMPLATE, min_signal=1e9)  # never reached: one chunk
    assert len(one) == 1 and one[0].count == 120_000
    some = chunk_offsets(short_bright, TEMPLATE, min_signal=20_000.0)
    assert 1 < len(some) < 30
    for c in some:  # each closed chunk reached the threshold (the remainder joins the last)
        moments = PhaseMoments()
        for start, m in short_bright.intervals():
            if c.start_ns <= start < c.end_ns:
                moments += m
        assert h_test(moments).statistic >= 20_000.0
        assert moments.count == c.count


# ---------------------------------------------------------------------------------------
# Whole synthetic nights


@pytest.fixture(scope="module")
def base_night():
    """Event times (s from the start) and template phases: 30 pulsed + 30 unpulsed per s."""
    rng = np.random.default_rng(20261203)
    n = int(60 * NIGHT_S)
    times = np.sort(rng.uniform(0, NIGHT_S, n))
    return times, TEMPLATE.sample(n, rng)


def run_night(base, delay, interval_s=60, chunk_s=None, **kwargs):
    """Phases φ + ν·δt(t) → TimeBinnedMoments → chunk_offsets → fit_offset → diagnose."""
    times, phases = base
    tagged = np.remainder(phases + NU * delay(times), 1.0)
    binned = TimeBinnedMoments(interval_s * 10**9).update(
        EPOCH_NS + np.round(times * 1e9).astype(np.int64), tagged)
    chunks = chunk_offsets(binned, TEMPLATE, None if chunk_s is None else chunk_s * 10**9)
    verdict = diagnose(chunks, fit_offset(binned.total(), TEMPLATE), NU, **kwargs)
    json.dumps(verdict.to_dict())  # JSON-serialisable, always
    assert verdict.lines and all(isinstance(line, str) and line for line in verdict.lines)
    return verdict


def test_night_without_errors_is_ok(base_night):
    verdict = run_night(base_night, lambda t: 0 * t)
    assert (verdict.status, verdict.kind) == ("OK", "none")
    assert verdict.n_used == verdict.n_chunks == 480
    assert abs(verdict.offset_us) < 3 * verdict.offset_sigma_us


def test_constant_offset_of_200_us_fails(base_night):
    verdict = run_night(base_night, lambda t: 0 * t + 200e-6)
    assert (verdict.status, verdict.kind) == ("FAIL", "offset")
    assert verdict.offset_us == pytest.approx(200.0, abs=3 * verdict.offset_sigma_us)
    assert verdict.explanations == []
    text = " ".join(verdict.lines)
    assert "modulo one period" in text and f"{verdict.offset_us:+.1f} µs" in text


def test_leap_second_step_at_mid_night(base_night):
    # a 1 s step (a leap second) shows only as frac(ν·1 s) = 0.37 cycles
    verdict = run_night(base_night, lambda t: np.where(t >= NIGHT_S / 2, 1.0, 0.0))
    assert (verdict.status, verdict.kind) == ("FAIL", "step")
    assert verdict.step_cycles == pytest.approx(0.37, abs=3 * verdict.step_sigma_cycles)
    assert abs(verdict.step_time_ns - (EPOCH_NS + NIGHT_S / 2 * 1e9)) <= 60e9
    assert 1.0 in [e.delta_t_s for e in verdict.explanations]


def test_tai_given_as_utc_is_explained(base_night):
    # TAI − UTC = 37 s since 2017 (IERS Bulletin C; erfa.dat); event times 37 s late
    verdict = run_night(base_night, lambda t: 0 * t + 37.0)
    assert (verdict.status, verdict.kind) == ("FAIL", "offset")
    assert 37.0 in [e.delta_t_s for e in verdict.explanations]
    assert any("TAI−UTC" in line for line in verdict.lines)


def test_linear_drift_of_50_us_per_hour(base_night):
    verdict = run_night(base_night, lambda t: 50e-6 * t / 3600)
    assert (verdict.status, verdict.kind) == ("FAIL", "drift")
    assert verdict.drift_us_per_hour == pytest.approx(50.0, abs=3 * verdict.drift_sigma_us_per_hour)


def test_periodic_wobble_resolved_by_short_chunks(base_night):
    # 1 ms amplitude, 4-minute period; 20 s chunks sample it 12 times per period (their
    # averaging lowers the amplitude by sinc(20/240) = 0.989)
    verdict = run_night(base_night, lambda t: 1e-3 * np.sin(2 * np.pi * t / 240.0),
                        interval_s=20, chunk_s=20)
    assert (verdict.status, verdict.kind) == ("FAIL", "wobble")
    assert verdict.wobble_period_s == pytest.approx(240.0, abs=0.5)
    assert verdict.wobble_amplitude_us == pytest.approx(1000.0, rel=0.03)


def test_unresolved_wobble_shows_as_smeared(base_night):
    # 2-minute chunks cannot follow a 4-minute wobble: the chunk offsets scatter
    verdict = run_night(base_night, lambda t: 1e-3 * np.sin(2 * np.pi * t / 240.0),
                        chunk_s=120)
    assert (verdict.status, verdict.kind) == ("FAIL", "smeared")


def test_small_drift_inside_tolerance_does_not_fail(base_night):
    # 2 µs/h over 8 h is 16 µs = 0.005 cycles, a quarter of the 0.02-cycle tolerance
    verdict = run_night(base_night, lambda t: 2e-6 * t / 3600)
    assert verdict.status in ("OK", "WARN")
    assert verdict.kind in ("drift", "none", "offset")


def test_tolerance_in_microseconds_tightens_the_limit(base_night):
    # effective tolerance = min(tolerance_cycles, tolerance_us·1e-6·ν)
    delay = lambda t: 0 * t + 200e-6  # noqa: E731  (0.0623 cycles)
    loose = run_night(base_night, delay, tolerance_cycles=0.2)
    # well inside (< 0.1), but many σ: a real offset is flagged however small (issue 11)
    assert (loose.status, loose.kind) == ("WARN", "offset")
    assert run_night(base_night, delay, tolerance_cycles=0.1).status == "WARN"
    tight = run_night(base_night, delay, tolerance_cycles=0.1, tolerance_us=100.0)
    assert tight.status == "FAIL"
    assert tight.tolerance_cycles == pytest.approx(100e-6 * NU)


def test_no_signal_and_insufficient_signal():
    rng = np.random.default_rng(8)
    times = EPOCH_NS + np.sort(rng.integers(0, 3600 * 10**9, 5000))
    binned = TimeBinnedMoments(60 * 10**9).update(times, rng.random(5000))
    chunks = chunk_offsets(binned, TEMPLATE)
    verdict = diagnose(chunks, fit_offset(binned.total(), TEMPLATE), NU)
    assert (verdict.status, verdict.kind) == ("WARN", "no_signal")
    assert "cannot be judged" in " ".join(verdict.lines)
    assert diagnose([], None, NU).kind == "no_signal"  # no events at all
    # 150 pulsed events on 3000 background in an hour: detected, but the offset error
    # exceeds a third of the tolerance
    phases = np.concatenate([TEMPLATE.components[0].sample(150, rng), rng.random(3000)])
    order = np.argsort(rng.random(phases.size))
    times = EPOCH_NS + np.sort(rng.integers(0, 3600 * 10**9, phases.size))
    binned = TimeBinnedMoments(60 * 10**9).update(times, phases[order])
    night = fit_offset(binned.total(), TEMPLATE)
    verdict = diagnose(chunk_offsets(binned, TEMPLATE), night, NU)
    assert night.detected
    assert (verdict.status, verdict.kind) == ("WARN", "insufficient_signal")


def test_noise_nights_never_name_a_fault():
    rng = np.random.default_rng(10)
    # a sparse night (2 events a minute, no pulse): tiny chunks pass a 3σ line far more
    # often than 0.13 %, so none of them may count as a detection
    times = EPOCH_NS + np.sort(rng.integers(0, int(NIGHT_S) * 10**9, 1000))
    binned = TimeBinnedMoments(10 * 10**9).update(times, rng.random(1000))
    chunks = chunk_offsets(binned, TEMPLATE, 60 * 10**9)
    assert not any(c.detected for c in chunks)
    assert diagnose(chunks, fit_offset(binned.total(), TEMPLATE), NU).kind == "no_signal"
    # a dense night without pulse: 480 chunks, 6 over the line at random phases (0.65
    # expected; 6 or more has a chance of 6e-5, far from a 5σ effect): still no signal
    night = fit_offset(PhaseMoments().update(rng.random(480_000)), TEMPLATE)
    assert not night.detected
    chunks = [ChunkOffset(EPOCH_NS + i * 60 * 10**9, EPOCH_NS + (i + 1) * 60 * 10**9,
                          EPOCH_NS + i * 60 * 10**9 + 30 * 10**9,
                          float(rng.uniform(-0.5, 0.5)), 0.02, 100.0, 30.0, 1000, 1000.0,
                          i % 80 == 7) for i in range(480)]
    verdict = diagnose(chunks, night, NU)
    assert (verdict.status, verdict.kind, verdict.n_used) == ("WARN", "no_signal", 6)


def test_verdict_from_synthetic_chunks_round_trips_to_json():
    rng = np.random.default_rng(9)
    night = fit_offset(PhaseMoments().update(TEMPLATE.sample(50_000, rng)), TEMPLATE)
    chunks = [ChunkOffset(EPOCH_NS + i * 60 * 10**9, EPOCH_NS + (i + 1) * 60 * 10**9,
                          EPOCH_NS + i * 60 * 10**9 + 30 * 10**9, float(rng.normal(0, 0.003)),
                          0.003, 800.0, 40.0, 1000, 1000.0, True) for i in range(50)]
    verdict = diagnose(chunks, night, NU)
    assert isinstance(verdict, ClockVerdict) and verdict.status == "OK"
    data = json.loads(json.dumps(verdict.to_dict()))
    assert data["kind"] == "none" and data["n_used"] == 50
    assert set(data["chi2"]) >= {"constant", "drift", "step", "wobble"}
