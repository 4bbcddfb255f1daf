"""Binned and harmonic pulse profiles and their summary numbers.

Sources, named beside each check: the empirical Fourier density of de Jager, Swanepoel
& Raubenheimer 1986 (A&A 170, 187; from memory) with m from the H-test (de Jager,
Raubenheimer & Swanepoel 1989, A&A 221, 180); pulsed-fraction estimators from standard
Fourier identities; direct numpy computations on the events (oracle tests);
scipy.integrate.quad; scipy.stats for binomial coverage limits.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import integrate
from scipy import stats as scipy_stats

from turnstamp.core.cycles import wrap_cycles
from turnstamp.core.moments import PhaseMoments
from turnstamp.core.peaks import PeakComponent
from turnstamp.core.periodicity import h_test, z2_series
from turnstamp.core.profile import (
    BinnedProfile,
    binned_profile,
    harmonic_density,
    harmonic_profile,
    summarize_profile,
)
from turnstamp.core.template import PulseTemplate


def cosine_sample(n: int, amplitude: float, rng, phase0: float = 0.0) -> np.ndarray:
    """Phases from f(φ) = 1 + A cos 2π(φ − φ₀) by rejection (exact)."""
    out = np.empty(0)
    while out.size < n:
        x = rng.random(2 * n)
        density = 1 + amplitude * np.cos(2 * np.pi * (x - phase0))
        keep = rng.random(2 * n) * (1 + amplitude) < density
        out = np.concatenate([out, x[keep]])
    return out[:n]


def von_mises_template(width=0.05, unpulsed=0.5, position=0.3) -> PulseTemplate:
    return PulseTemplate(name="profile test", unpulsed_fraction=unpulsed, components=[
        PeakComponent(shape="von_mises", position_cycles=position, width_cycles=width)])


# ---------------------------------------------------------------------------------------


def test_binned_profile_is_the_weighted_histogram():
    # oracle: numpy.histogram of the same events and weights
    rng = np.random.default_rng(1)
    phases, weights = rng.random(5000), rng.random(5000)
    moments = PhaseMoments(bins=20).update(phases, weights)
    profile = binned_profile(moments)
    counts, edges = np.histogram(phases, bins=20, range=(0, 1), weights=weights)
    counts2, _ = np.histogram(phases, bins=20, range=(0, 1), weights=weights**2)
    assert isinstance(profile, BinnedProfile) and profile.bins == 20
    assert np.allclose(profile.edges_cycles, edges)
    assert np.allclose(profile.counts, counts)
    assert np.allclose(profile.errors, np.sqrt(counts2))
    assert np.allclose(profile.centres_cycles, (np.arange(20) + 0.5) / 20)
    json.dumps(profile.to_dict())


def test_harmonic_density_matches_direct_sum_over_events():
    # de Jager, Swanepoel & Raubenheimer 1986 (from memory): f̂ = 1 + 2Σ(α_k cos 2πkφ +
    # β_k sin 2πkφ), α_k = Σw cos/Σw (weighted)
    rng = np.random.default_rng(2)
    phases = von_mises_template().sample(3000, rng)
    weights = rng.uniform(0.2, 1.0, phases.size)
    moments = PhaseMoments().update(phases, weights)
    grid = np.linspace(0, 1, 101)
    m = 7
    k = np.arange(1, m + 1)
    alpha = (weights * np.cos(2 * np.pi * np.outer(k, phases))).sum(axis=1) / weights.sum()
    beta = (weights * np.sin(2 * np.pi * np.outer(k, phases))).sum(axis=1) / weights.sum()
    direct = 1 + 2 * (alpha @ np.cos(2 * np.pi * np.outer(k, grid))
                      + beta @ np.sin(2 * np.pi * np.outer(k, grid)))
    assert np.allclose(harmonic_density(moments, m, grid), direct, atol=1e-12)
    assert np.allclose(harmonic_density(moments, 0, grid), 1.0)
    # mean 1 over a cycle (definition)
    assert np.mean(harmonic_density(moments, m, np.arange(512) / 512)) == pytest.approx(1.0)


def test_harmonic_profile_is_the_exact_bin_average():
    # scipy.integrate.quad of (Σw)·f̂ over each bin; the counts add up to Σw
    rng = np.random.default_rng(3)
    moments = PhaseMoments(bins=16).update(von_mises_template(0.04).sample(4000, rng))
    m = 9
    profile = harmonic_profile(moments, m)
    edges = profile.edges_cycles
    for b in range(16):
        integral = integrate.quad(lambda x: float(harmonic_density(moments, m, x)),
                                  edges[b], edges[b + 1], epsabs=1e-13)[0]
        assert profile.counts[b] == pytest.approx(moments.sum_w * integral, rel=1e-9)
    assert profile.counts.sum() == pytest.approx(moments.sum_w, rel=1e-12)
    assert harmonic_profile(moments, m, bins=64).counts.sum() == pytest.approx(moments.sum_w)


@pytest.mark.slow
def test_harmonic_profile_errors_match_monte_carlo_scatter():
    # statistical (common practice): the stated per-bin error agrees with the scatter of
    # the harmonic profile over 300 seeded realisations to within 12% on average
    template = von_mises_template(0.05, 0.4)
    rng = np.random.default_rng(4)
    counts, errors = [], []
    for _ in range(300):
        moments = PhaseMoments(bins=16).update(template.sample(2000, rng))
        profile = harmonic_profile(moments, 6)
        counts.append(profile.counts)
        errors.append(profile.errors)
    ratio = np.std(counts, axis=0) / np.mean(errors, axis=0)
    assert np.mean(ratio) == pytest.approx(1.0, abs=0.12)
    assert np.all((ratio > 0.7) & (ratio < 1.3))


def test_pulsed_fractions_closed_form_and_simulation_reference():
    # f = 1 + A cos 2πφ has PF_min = PF_pp = A and PF_rms = A/√2 exactly (Fourier
    # identities); a seeded sample of N = 2e5 events (A = 0.5, m = 3) must give them within
    # a statistical tolerance of 3/√N
    rng = np.random.default_rng(5)
    n, a = 200_000, 0.5
    moments = PhaseMoments(bins=32).update(cosine_sample(n, a, rng, phase0=0.2))
    summary = summarize_profile(moments, harmonics=3)
    tol = 3 / math.sqrt(n)
    assert summary.pulsed_fraction_rms == pytest.approx(a / math.sqrt(2), abs=tol)
    assert summary.pulsed_fraction_min == pytest.approx(a, abs=tol)
    assert summary.pulsed_fraction_peak_to_trough == pytest.approx(a, abs=tol)
    # trough at φ₀ + 0.5, background (1 − A)·N/bins per bin, peak at φ₀
    assert wrap_cycles(summary.trough_phase_cycles - 0.7) == pytest.approx(0, abs=0.01)
    assert summary.background_per_bin == pytest.approx((1 - a) * n / 32, rel=0.02)
    assert wrap_cycles(summary.peak_phase_cycles - 0.2) == pytest.approx(
        0, abs=4 * summary.peak_phase_sigma_cycles)
    assert summary.harmonics == 3 and summary.count == n
    json.dumps(summary.to_dict())


def test_rms_pulsed_fraction_is_bias_corrected_and_weight_generalised():
    # E[α_k² + β_k²] = 1/N under the null, so PF_rms = sqrt((Z²_m − 2m)/N) for unit
    # weights (bias-corrected; a Fourier identity); with weights sqrt((Z²_m,w − 2m)·Σw²/(Σw)²)
    # (the weighted Z² normalisation of Kerr 2011, ApJ 732, 38); scale invariant in w
    rng = np.random.default_rng(6)
    phases = cosine_sample(20_000, 0.3, rng)
    moments = PhaseMoments().update(phases)
    z2 = z2_series(moments)[3]
    assert summarize_profile(moments, 4).pulsed_fraction_rms == pytest.approx(
        math.sqrt((z2 - 8) / 20_000), rel=1e-12)
    weights = rng.uniform(0.1, 1.0, phases.size)
    a = summarize_profile(PhaseMoments().update(phases, weights), 4)
    b = summarize_profile(PhaseMoments().update(phases, 7.5 * weights), 4)
    assert a.pulsed_fraction_rms == pytest.approx(b.pulsed_fraction_rms, rel=1e-9)
    assert a.peak_phase_cycles == pytest.approx(b.peak_phase_cycles, abs=1e-12)
    # uniform phases: the bias correction keeps PF_rms near 0 (E[Z²_m] = 2m, the χ²_2m mean
    # of Buccheri et al. 1983)
    flat = summarize_profile(PhaseMoments().update(rng.random(50_000)), 4)
    assert flat.pulsed_fraction_rms < math.sqrt(20 / 50_000)  # Z²_4 < 28: p(χ²_8) = 5e-4


def test_default_harmonics_is_the_h_test_best_m():
    # m = argmax of the H-test (de Jager, Raubenheimer & Swanepoel 1989)
    rng = np.random.default_rng(7)
    moments = PhaseMoments().update(von_mises_template(0.03, 0.6).sample(3000, rng))
    assert summarize_profile(moments).harmonics == h_test(moments).harmonics > 1


@pytest.mark.slow
@pytest.mark.parametrize("unpulsed, events, m", [(0.85, 4000, 4), (0.0, 1000, 12)])
def test_peak_phase_coverage(unpulsed, events, m):
    # coverage (common practice): 400 seeded trials; the true peak lies within the stated
    # 1σ in a fraction inside the binomial 99.8% interval around 68.27%, within 2σ in ≥ 90%.
    # Symmetric peak, so the truncated series peaks at the true position.
    template = von_mises_template(0.05, unpulsed, position=0.3)
    rng = np.random.default_rng(20261202)
    trials = 400
    z = []
    for _ in range(trials):
        shift = rng.random()
        moments = PhaseMoments().update(np.remainder(template.sample(events, rng) + shift, 1))
        summary = summarize_profile(moments, m)
        z.append(wrap_cycles(summary.peak_phase_cycles - 0.3 - shift)
                 / summary.peak_phase_sigma_cycles)
    z = np.abs(z)
    lo, hi = scipy_stats.binom.interval(0.998, trials, 0.6827)
    assert lo <= np.sum(z < 1) <= hi
    assert np.mean(z < 2) >= 0.90


def test_empty_moments_and_bad_harmonics_are_refused():
    with pytest.raises(ValueError, match="sum_w"):
        summarize_profile(PhaseMoments())
    with pytest.raises(ValueError, match="sum_w"):
        harmonic_density(PhaseMoments(), 2, [0.1])
    moments = PhaseMoments(harmonics=5).update(np.random.default_rng(0).random(100))
    with pytest.raises(ValueError, match="harmonics = 6"):
        harmonic_profile(moments, 6)
    with pytest.raises(ValueError, match="harmonics = 0"):
        summarize_profile(moments, 0)
