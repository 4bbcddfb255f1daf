"""Phase moments and periodicity statistics against published values and libraries.

Sources: REFERENCES.md §1 (Z²ₘ, Rayleigh, H-test, weighted forms, σ ↔ p, trials) and
§8 (significance thresholds); scipy.stats / scipy.special; astropy.stats.circstats;
mpmath as a high-precision oracle. Each check names its source beside it.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys

import mpmath
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import stats as scipy_stats

from turnstamp.core.stats import (
    DEFAULT_BINS,
    H_CALIBRATED_UP_TO,
    MAX_HARMONICS,
    PhaseMoments,
    TestResult,
    TimeBinnedMoments,
    chi2_even_log_sf,
    h_log_p,
    h_test,
    log_p_from_sigma,
    rayleigh_test,
    sigma_from_log_p,
    trials_log_p,
    z2_from_sums,
    z2_series,
    z2_test,
)
from turnstamp.errors import InputError

SIX_PHASES = [0.0, 0.1, 0.2, 0.25, 0.3, 0.9]  # REFERENCES.md §1.1
SIX_WEIGHTS = [1.0, 0.5, 0.5, 1.0, 0.2, 0.1]  # REFERENCES.md §1.4


# ---------------------------------------------------------------------------------------------
# direct (slow, obvious) numpy computations used as the oracle


def direct_sums(phases, weights=None, harmonics=MAX_HARMONICS):
    phases = np.asarray(phases, dtype=float)
    w = np.ones_like(phases) if weights is None else np.asarray(weights, dtype=float)
    angle = 2.0 * np.pi * np.arange(1, harmonics + 1)[:, None] * phases[None, :]
    return np.cos(angle) @ w, np.sin(angle) @ w, float(w.sum()), float(w @ w)


def direct_z2(phases, weights=None, harmonics=MAX_HARMONICS):
    cos, sin, _, sum_w2 = direct_sums(phases, weights, harmonics)
    if sum_w2 == 0.0:
        return np.zeros(harmonics)
    return 2.0 / sum_w2 * np.cumsum(cos**2 + sin**2)


def direct_hist(phases, weights=None, bins=DEFAULT_BINS):
    phases = np.asarray(phases, dtype=float)
    w = np.ones_like(phases) if weights is None else np.asarray(weights, dtype=float)
    index = np.floor(phases * bins).astype(int)
    return (np.bincount(index, w, minlength=bins), np.bincount(index, w * w, minlength=bins))


def assert_moments_match(moments, phases, weights=None, rel=1e-9):
    """Sums agree with the direct computation to ``rel`` relative to Σ|w| (the brief)."""
    phases = np.asarray(phases, dtype=float)
    cos, sin, sum_w, sum_w2 = direct_sums(phases, weights, moments.harmonics)
    scale = rel * max(sum_w, 1e-300)
    assert moments.count == phases.size
    assert moments.sum_w == pytest.approx(sum_w, rel=1e-12, abs=1e-300)
    assert moments.sum_w2 == pytest.approx(sum_w2, rel=1e-12, abs=1e-300)
    np.testing.assert_allclose(moments.cos_sums, cos, rtol=0, atol=scale)
    np.testing.assert_allclose(moments.sin_sums, sin, rtol=0, atol=scale)
    hist_w, hist_w2 = direct_hist(phases, weights, moments.bins)
    np.testing.assert_allclose(moments.hist_w, hist_w, rtol=1e-12, atol=1e-12 * sum_w)
    np.testing.assert_allclose(moments.hist_w2, hist_w2, rtol=1e-12, atol=1e-12 * sum_w2)


def assert_same_moments(a, b, rel=1e-9):
    assert (a.harmonics, a.bins, a.count, a.weighted) == (b.harmonics, b.bins, b.count, b.weighted)
    scale = rel * max(abs(a.sum_w), abs(b.sum_w), 1e-300)
    for name in ("cos_sums", "sin_sums", "hist_w", "hist_w2"):
        np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=0, atol=scale,
                                   err_msg=name)
    assert a.sum_w == pytest.approx(b.sum_w, rel=1e-12, abs=1e-300)
    assert a.sum_w2 == pytest.approx(b.sum_w2, rel=1e-12, abs=1e-300)


# ---------------------------------------------------------------------------------------------
# Z²ₘ, H and Rayleigh check values


@pytest.mark.parametrize("phase", [0.0, 0.37])
def test_identical_phases_give_2mN(phase):
    # REFERENCES.md §1.1 [calc]: N identical phases → Z²_m = 2mN exactly (N=100, m=2 → 400).
    moments = PhaseMoments().update(np.full(100, phase))
    m = np.arange(1, MAX_HARMONICS + 1)
    np.testing.assert_allclose(z2_series(moments), 2 * m * 100, rtol=1e-12)
    assert z2_test(moments, 2).statistic == pytest.approx(400.0, rel=1e-12)
    # REFERENCES.md §1.3 [calc]: H = 40N − 76 for N ≥ 3, at m = 20; N = 100 → 3924.
    result = h_test(moments)
    assert result.statistic == pytest.approx(3924.0, rel=1e-12)
    assert result.harmonics == 20
    # far beyond the H ≈ 70 calibration range (de Jager & Büsching 2010, from memory)
    assert result.beyond_calibration
    assert result.log_p == pytest.approx(-0.4 * 3924.0, rel=1e-12)  # finite, no underflow
    assert result.p == 0.0


def test_h_for_one_and_two_events():
    # REFERENCES.md §1.3 [calc]: N = 2 → H = 4; N = 1 → H = 2 at m = 1.
    assert h_test(PhaseMoments().update([0.3, 0.3])).statistic == pytest.approx(4.0, rel=1e-12)
    single = h_test(PhaseMoments().update([0.3]))
    assert single.statistic == pytest.approx(2.0, rel=1e-12)
    assert single.harmonics == 1


def test_evenly_spaced_phases():
    # REFERENCES.md §1.1 [calc]: phases i/N → Z²_m = 0 for m < N and Z²_N = 2N (N = 10).
    series = z2_series(PhaseMoments().update(np.arange(10) / 10))
    np.testing.assert_allclose(series[:9], 0.0, atol=1e-12)
    assert series[9] == pytest.approx(20.0, rel=1e-12)
    # REFERENCES.md §1.3 [calc]: evenly spaced phases with N > 20 give H = 0.
    assert h_test(PhaseMoments().update(np.arange(25) / 25)).statistic == pytest.approx(
        0.0, abs=1e-12)


def test_six_phase_set_unweighted():
    # REFERENCES.md §1.1 [calc] (mpmath, 15 digits) and §1.3: H = Z²_1 at m = 1.
    moments = PhaseMoments().update(SIX_PHASES)
    np.testing.assert_allclose(
        z2_series(moments)[:3], [5.0921206733934, 5.42545400672673, 7.0517890247835], rtol=1e-12)
    result = h_test(moments)
    assert result.name == "H"
    assert result.statistic == pytest.approx(5.0921206733934, rel=1e-12)
    assert result.harmonics == 1
    assert (result.count, result.sum_w) == (6, 6.0)


def test_six_phase_set_weighted():
    # REFERENCES.md §1.4 [calc]: weighted Z² with the 1/Σw² normalisation of Kerr (2011).
    moments = PhaseMoments().update(SIX_PHASES, SIX_WEIGHTS)
    assert moments.weighted
    np.testing.assert_allclose(
        z2_series(moments)[:3], [4.78720982720357, 5.14412416295846, 6.23437430816315],
        rtol=1e-12)
    result = h_test(moments)
    assert result.name == "weighted H"
    assert result.statistic == pytest.approx(4.78720982720357, rel=1e-12)
    assert result.harmonics == 1
    assert result.sum_w == pytest.approx(3.3, rel=1e-15)


def test_weighted_h_equals_unweighted_for_unit_weights_and_is_scale_invariant(rng):
    # REFERENCES.md §1.4 [calc]: w ≡ 1 reproduces the classic values; w → c·w changes nothing.
    phases = rng.random(500) ** 2  # a pulsed-looking, non-uniform set
    plain = h_test(PhaseMoments().update(phases))
    unit = h_test(PhaseMoments().update(phases, np.ones(phases.size)))
    assert unit.name == "weighted H" and plain.name == "H"
    assert unit.statistic == pytest.approx(plain.statistic, rel=1e-12)
    assert unit.harmonics == plain.harmonics
    weights = rng.random(phases.size)
    reference = z2_series(PhaseMoments().update(phases, weights))
    for factor in (1e-3, 7.5, 1e6):
        scaled = PhaseMoments().update(phases, factor * weights)
        np.testing.assert_allclose(z2_series(scaled), reference, rtol=1e-12)
        assert h_test(scaled).statistic == pytest.approx(h_test(
            PhaseMoments().update(phases, weights)).statistic, rel=1e-12)


def test_rayleigh_six_phases_is_asymptotic_not_small_sample():
    # REFERENCES.md §1.2 [calc]: asymptotic p = 0.07838988822258776; astropy's small-sample
    # corrected value for this n = 6 set is 0.07323199778294642, which we deliberately do not use.
    result = rayleigh_test(PhaseMoments().update(SIX_PHASES))
    assert result.name == "Rayleigh" and result.harmonics == 1
    assert result.statistic == pytest.approx(5.0921206733934, rel=1e-12)
    assert result.p == pytest.approx(0.07838988822258776, rel=1e-12)
    assert abs(result.p - 0.07323199778294642) > 1e-3


@pytest.mark.parametrize("n", [50, 200, 5000])
def test_rayleigh_matches_astropy_for_n_at_least_50(rng, n):
    # astropy.stats.circstats.rayleightest: p = exp(−n R̄²) for n ≥ 50 (REFERENCES.md §1.2).
    from astropy.stats.circstats import rayleightest

    phases = (rng.normal(0.3, 0.35, n)) % 1.0
    ours = rayleigh_test(PhaseMoments().update(phases))
    theirs = float(rayleightest(2.0 * np.pi * phases))
    assert ours.p == pytest.approx(theirs, rel=1e-9)


# ---------------------------------------------------------------------------------------------
# chance probabilities


def test_z2_probability_check_values():
    # REFERENCES.md §1.1 [calc]: Z²_2 = 20 → 11 e^{-10}; Z²_1 = 20 → e^{-10}.
    assert math.exp(chi2_even_log_sf(20.0, 4)) == pytest.approx(4.993992273873e-4, rel=1e-12)
    assert math.exp(chi2_even_log_sf(20.0, 2)) == pytest.approx(4.539992976248e-5, rel=1e-12)
    # one-sided σ = 3.290865 for the first (REFERENCES.md §1.1)
    assert sigma_from_log_p(chi2_even_log_sf(20.0, 4)) == pytest.approx(3.290865, abs=1e-6)
    assert chi2_even_log_sf(0.0, 6) == 0.0


@pytest.mark.parametrize("m", [1, 2, 3, 5, 10, 20])
def test_z2_probability_matches_scipy_chi2(m):
    # scipy.stats.chi2.sf with 2m degrees of freedom (Buccheri et al. 1983; REFERENCES.md §1.1).
    for z in [0.1, 1.0, 4.0, 2 * m, 17.8, 40.0, 150.0, 600.0]:
        expected = scipy_stats.chi2.sf(z, 2 * m)
        assert math.exp(chi2_even_log_sf(z, 2 * m)) == pytest.approx(expected, rel=1e-10)


def test_z2_log_probability_deep_tail_against_mpmath():
    # mpmath regularised upper incomplete gamma: P(χ²_{2m} > z) = Q(m, z/2); no underflow.
    mpmath.mp.dps = 40
    for m, z in [(1, 3000.0), (2, 5000.0), (20, 20000.0)]:
        expected = float(mpmath.log(mpmath.gammainc(m, z / 2, mpmath.inf, regularized=True)))
        assert chi2_even_log_sf(z, 2 * m) == pytest.approx(expected, rel=1e-12)


def test_z2_test_uses_its_own_series(rng):
    moments = PhaseMoments().update(rng.random(300) ** 1.5)
    series = z2_series(moments)
    for m in (1, 2, 7, 20):
        result = z2_test(moments, m)
        assert result.name == f"Z2_{m}" and result.harmonics == m
        assert result.statistic == series[m - 1]
        # scipy.stats.chi2.sf with 2m dof
        assert result.p == pytest.approx(scipy_stats.chi2.sf(series[m - 1], 2 * m), rel=1e-10)
    with pytest.raises(ValueError, match="m must be"):
        z2_test(moments, 21)
    with pytest.raises(ValueError, match="m must be"):
        z2_test(moments, 0)


@pytest.mark.parametrize(
    "h, p, sigma",
    [
        # REFERENCES.md §1.3 [calc], P = exp(−0.4 H), one-sided σ
        (15.0, 2.4787521767e-3, 2.809782),
        (23.0, 1.0103940184e-4, 3.716403),
        (50.0, 2.0611536224e-9, 5.879209),
        (70.0, 6.9144001069e-13, 7.085755),
    ],
)
def test_h_probability_and_sigma(h, p, sigma):
    assert math.exp(h_log_p(h)) == pytest.approx(p, rel=1e-10)
    assert sigma_from_log_p(h_log_p(h)) == pytest.approx(sigma, abs=1e-6)


def test_h15_is_2p81_sigma_one_sided_with_2010_calibration():
    # H = 15 ↦ 2.8098σ one-sided ("a fact of the trade"; REFERENCES.md §1.3 [calc]).
    assert sigma_from_log_p(h_log_p(15.0)) == pytest.approx(2.8098, abs=1e-4)
    # not the two-sided 3.025923 (REFERENCES.md §1.3) ...
    assert abs(sigma_from_log_p(h_log_p(15.0)) - 3.025923) > 0.2
    # ... and the 2010 calibration e^{-6}, not the 1989 form 2.553412701e-3 (REFERENCES.md §1.3)
    assert math.exp(h_log_p(15.0)) == pytest.approx(math.exp(-6.0), rel=1e-14)
    assert abs(math.exp(h_log_p(15.0)) - 2.553412701e-3) > 5e-5


@pytest.mark.parametrize(
    "sigma, h, z2_2, z2_1",
    [
        # REFERENCES.md §8 [calc]: values reaching 3, 4, 5σ one-sided
        (3.0, 16.5193, 17.8006, 13.2155),
        (4.0, 25.9003, 25.9982, 20.7202),
        (5.0, 37.6625, 36.0199, 30.1300),
    ],
)
def test_significance_thresholds(sigma, h, z2_2, z2_1):
    # the table rounds to 4 decimals: 5e-5 in the statistic is < 1e-4 in σ
    assert sigma_from_log_p(h_log_p(h)) == pytest.approx(sigma, abs=1e-4)
    assert sigma_from_log_p(chi2_even_log_sf(z2_2, 4)) == pytest.approx(sigma, abs=1e-4)
    assert sigma_from_log_p(chi2_even_log_sf(z2_1, 2)) == pytest.approx(sigma, abs=1e-4)


def test_h_beyond_calibration_flag():
    # de Jager & Büsching (2010) checked exp(−0.4 H) to about H ≈ 70 (from memory)
    assert H_CALIBRATED_UP_TO == 70.0
    strong = h_test(PhaseMoments().update(np.full(3, 0.5)))  # H = 40·3 − 76 = 44 (§1.3)
    assert strong.statistic == pytest.approx(44.0, rel=1e-12)
    assert not strong.beyond_calibration
    assert h_test(PhaseMoments().update(np.full(4, 0.5))).beyond_calibration  # H = 84


# ---------------------------------------------------------------------------------------------
# σ ↔ p and trials


@pytest.mark.parametrize(
    "sigma, p",
    # REFERENCES.md §1.5 [calc], one-sided column (norm.isf convention)
    [(3, 1.349898e-3), (4, 3.167124e-5), (5, 2.866516e-7), (6, 9.865876e-10),
     (7, 1.279813e-12)],
)
def test_sigma_p_table(sigma, p):
    assert math.exp(log_p_from_sigma(sigma)) == pytest.approx(p, rel=1e-6)
    assert sigma_from_log_p(math.log(p)) == pytest.approx(sigma, abs=1e-6)


def test_sigma_convention_is_one_sided():
    # REFERENCES.md §1.5 [calc]: p = 1e-3 → 3.090232 one-sided (3.290527 two-sided);
    # p = 1e-6 → 4.753424 one-sided (4.891638 two-sided).
    assert sigma_from_log_p(math.log(1e-3)) == pytest.approx(3.090232, abs=1e-6)
    assert sigma_from_log_p(math.log(1e-6)) == pytest.approx(4.753424, abs=1e-6)
    assert sigma_from_log_p(math.log(0.5)) == pytest.approx(0.0, abs=1e-15)
    assert sigma_from_log_p(0.0) == -math.inf
    with pytest.raises(ValueError):
        sigma_from_log_p(0.1)


def test_sigma_far_into_the_tail():
    # mpmath: log of the one-sided tail at 40σ, log(erfc(40/√2)/2) ≈ −804.6 (brief, REFERENCES).
    mpmath.mp.dps = 40
    for sigma in (10.0, 20.0, 40.0, 56.0):
        exact = float(mpmath.log(mpmath.erfc(sigma / mpmath.sqrt(2)) / 2))
        assert log_p_from_sigma(sigma) == pytest.approx(exact, rel=1e-12)
        assert sigma_from_log_p(exact) == pytest.approx(sigma, abs=1e-6)
    assert log_p_from_sigma(40.0) == pytest.approx(-804.6, abs=0.01)
    grid = np.linspace(0.5, 40.0, 80)
    np.testing.assert_allclose(sigma_from_log_p(log_p_from_sigma(grid)), grid, rtol=0, atol=1e-6)


def test_trials_examples():
    # REFERENCES.md §1.5 [calc]
    assert math.exp(trials_log_p(math.log(1e-4), 100)) == pytest.approx(
        9.950661308629e-3, rel=1e-11)
    assert math.exp(trials_log_p(math.log(1e-8), 1e6)) == pytest.approx(9.950166300e-3, rel=1e-9)
    assert math.exp(trials_log_p(h_log_p(15.0), 10)) == pytest.approx(2.4512851904e-2, rel=1e-10)
    # Bonferroni n·p is an upper bound (REFERENCES.md §1.5)
    assert math.exp(trials_log_p(math.log(1e-4), 100)) < 100 * 1e-4
    assert trials_log_p(-3.0, 1) == -3.0


def test_trials_deep_tail_against_mpmath():
    # mpmath 1 − (1 − p)^n = −expm1(n log1p(−p)) at 60 digits, across every branch
    mpmath.mp.dps = 60
    for log_p, n in [(-800.0, 1e6), (-690.0, 1e6), (-710.0, 1e290), (-50.0, 1e20),
                     (-30.0, 1e3), (-2.0, 50), (-1e-3, 7)]:
        p = mpmath.exp(log_p)
        exact = float(mpmath.log(-mpmath.expm1(mpmath.mpf(n) * mpmath.log1p(-p))))
        assert trials_log_p(log_p, n) == pytest.approx(exact, rel=1e-12, abs=1e-14)
    with pytest.raises(ValueError):
        trials_log_p(-1.0, 0.5)


# ---------------------------------------------------------------------------------------------
# null distributions


def test_z2_null_distribution_is_chi2(rng):
    # scipy.stats.kstest against chi2(2m) (Buccheri et al. 1983; REFERENCES.md §1.1), seeded
    realisations = [z2_series(PhaseMoments(harmonics=5).update(rng.random(200)))
                    for _ in range(3000)]
    values = np.array(realisations)
    for m in (1, 2, 5):
        result = scipy_stats.kstest(values[:, m - 1], scipy_stats.chi2(2 * m).cdf)
        assert result.pvalue > 1e-3, (m, result)


def test_weighted_z2_null_mean(rng):
    # REFERENCES.md §1.4 [calc]: E[Z²_{m,w}] = 2m exactly for any weights (w = U², N = 500)
    values = np.array([
        z2_series(PhaseMoments(harmonics=2).update(rng.random(500), rng.random(500) ** 2))[1]
        for _ in range(2000)
    ])
    # variance ≈ 8 (REFERENCES.md §1.4 Monte Carlo: 7.857), so the mean's standard error ≈ 0.063
    assert values.mean() == pytest.approx(4.0, abs=4 * math.sqrt(8.0 / values.size))


def test_h_false_alarm_rate_matches_exp_minus_0p4h():
    # de Jager & Büsching 2010 (REFERENCES.md §1.3): P(>H) = exp(−0.4 H), checked here for
    # H ≤ 20 on seeded uniform phases. Sums for many small samples are built at once with
    # plain numpy (independent of PhaseMoments); the statistic comes from z2_from_sums.
    rng = np.random.default_rng(8124)
    realisations, events, batch = 100_000, 64, 10_000
    h_values = np.empty(realisations)
    penalty = 4.0 * np.arange(1, MAX_HARMONICS + 1) - 4.0
    for start in range(0, realisations, batch):
        unit = np.exp(2j * np.pi * rng.random((batch, events)))
        power = unit.copy()
        sums = np.empty((batch, MAX_HARMONICS), dtype=complex)
        for k in range(MAX_HARMONICS):
            sums[:, k] = power.sum(axis=1)
            power *= unit
        z2 = z2_from_sums(sums.real, sums.imag, np.full(batch, float(events)))
        h_values[start:start + batch] = (z2 - penalty).max(axis=1)
    for threshold in (2.0, 4.0, 8.0, 12.0, 16.0, 20.0):
        expected = math.exp(h_log_p(threshold))
        spread = math.sqrt(realisations * expected * (1 - expected))  # binomial
        observed = int((h_values > threshold).sum())
        assert abs(observed - realisations * expected) < 4 * spread, (threshold, observed)


def test_z2_from_sums_agrees_with_h_test(rng):
    moments = PhaseMoments().update(rng.random(100), rng.random(100))
    np.testing.assert_array_equal(
        z2_from_sums(moments.cos_sums, moments.sin_sums, moments.sum_w2), z2_series(moments))
    assert np.all(z2_from_sums(np.zeros(3), np.zeros(3), 0.0) == 0.0)


# ---------------------------------------------------------------------------------------------
# PhaseMoments mechanics


def test_update_matches_direct_computation_across_chunks(rng):
    # more events than one internal chunk, phases near the awkward ends, weights
    phases = np.concatenate([rng.random(30_000), rng.random(100) * 1e-12,
                             1.0 - rng.random(100) * 1e-12])
    weights = rng.random(phases.size)
    assert_moments_match(PhaseMoments().update(phases, weights), phases, weights)
    assert_moments_match(PhaseMoments(harmonics=3, bins=7).update(phases), phases)


def test_histogram_bin_edges_and_phase_reduction():
    bins = 8
    edges = np.arange(bins) / bins
    moments = PhaseMoments(bins=bins).update(edges)
    np.testing.assert_array_equal(moments.hist_w, np.ones(bins))  # b/bins lands in bin b
    top = PhaseMoments(bins=3).update([np.nextafter(1.0, 0.0)])
    np.testing.assert_array_equal(top.hist_w, [0, 0, 1])
    # phases outside [0, 1) are reduced modulo 1 (trigonometric sums are periodic anyway)
    shifted = PhaseMoments().update([-0.75, 1.5, 3.125, -1e-300])
    reduced = PhaseMoments().update([0.25, 0.5, 0.125, 0.0])
    assert_same_moments(shifted, reduced, rel=1e-12)


def test_update_is_atomic_and_refuses_bad_input(rng):
    moments = PhaseMoments().update(rng.random(10))
    before = moments.to_state()
    bad_phases = rng.random(20_000)
    bad_phases[15_000] = np.nan  # in the second chunk
    with pytest.raises(ValueError, match="finite"):
        moments.update(bad_phases)
    with pytest.raises(ValueError, match=">= 0"):
        moments.update([0.1, 0.2], [1.0, -0.5])
    with pytest.raises(ValueError, match="finite"):
        moments.update([0.1, 0.2], [1.0, np.inf])
    with pytest.raises(ValueError, match="weights has 1 values"):
        moments.update([0.1, 0.2], [1.0])
    assert moments.to_state() == before
    with pytest.raises(ValueError, match="positive integer"):
        PhaseMoments(harmonics=0)


def test_empty_and_unit_weights():
    moments = PhaseMoments()
    assert moments.is_empty and not moments.weighted
    assert moments.update([]) is moments and moments.is_empty
    moments.update([], [])  # an empty batch changes nothing, not even `weighted`
    assert not moments.weighted
    result = h_test(moments)
    assert (result.statistic, result.log_p, result.count) == (0.0, 0.0, 0)
    moments.update([0.2, 0.4])
    assert not moments.is_empty and not moments.weighted
    np.testing.assert_array_equal(moments.hist_w, moments.hist_w2)
    assert moments.sum_w == moments.sum_w2 == 2.0


def test_merge_refuses_mismatched_shapes():
    with pytest.raises(ValueError, match="harmonics=20, bins=32 versus harmonics=10, bins=32"):
        PhaseMoments() + PhaseMoments(harmonics=10)
    with pytest.raises(ValueError, match="different shapes"):
        moments = PhaseMoments()
        moments += PhaseMoments(bins=16)
    with pytest.raises(TypeError):
        PhaseMoments().merge("not moments")


def test_sum_of_moments_and_copy_independence(rng):
    parts = [PhaseMoments().update(rng.random(50)) for _ in range(4)]
    total = sum(parts)
    assert total.count == 200
    clone = total.copy()
    clone.update([0.5])
    assert total.count == 200 and clone.count == 201
    merged = parts[0].merge(parts[1])
    assert parts[0].count == 50 and merged.count == 100  # merge returns a new object


@pytest.mark.parametrize(
    "change, field",
    [
        (lambda s: s.pop("hist_w"), "state"),
        (lambda s: s.update(extra=1), "state"),
        (lambda s: s.update(kind="Other"), "state.kind"),
        (lambda s: s.update(version=99), "state.version"),
        (lambda s: s.update(count=-1), "state.count"),
        (lambda s: s.update(count=2.5), "state.count"),
        (lambda s: s.update(weighted="yes"), "state.weighted"),
        (lambda s: s.update(harmonics=True), "state.harmonics"),
        (lambda s: s.update(sum_w=float("nan")), "state.sum_w"),
        (lambda s: s.update(cos_sums=[0.0] * 3), "state.cos_sums"),
        (lambda s: s.update(sin_sums="0,0"), "state.sin_sums"),
        (lambda s: s.update(hist_w2=[-1.0] + [0.0] * 31), "state.hist_w2"),
        (lambda s: s["cos_sums"].__setitem__(0, None), "state.cos_sums"),
    ],
)
def test_from_state_refuses_bad_state(change, field):
    state = PhaseMoments().update([0.1, 0.2, 0.3]).to_state()
    change(state)
    with pytest.raises(InputError) as caught:
        PhaseMoments.from_state(state)
    assert caught.value.field == field
    with pytest.raises(InputError):
        PhaseMoments.from_state([1, 2, 3])


# ---------------------------------------------------------------------------------------------
# properties (hypothesis)

phase_values = st.floats(0.0, 1.0, exclude_max=True, allow_nan=False)
weight_values = st.one_of(st.just(0.0), st.floats(1e-3, 100.0))


@st.composite
def event_sets(draw, max_size=150):
    phases = draw(st.lists(phase_values, max_size=max_size))
    if draw(st.booleans()):
        weights = draw(st.lists(weight_values, min_size=len(phases), max_size=len(phases)))
    else:
        weights = None
    cuts = sorted(draw(st.lists(st.integers(0, len(phases)), max_size=5)))
    return np.array(phases, dtype=float), None if weights is None else np.array(weights), cuts


def pieces(array, cuts):
    return None if array is None else np.split(array, cuts)


@given(event_sets())
def test_property_split_merge_equals_whole(events):
    phases, weights, cuts = events
    whole = PhaseMoments().update(phases, weights)
    assert_moments_match(whole, phases, weights)
    split_phases = pieces(phases, cuts)
    split_weights = pieces(weights, cuts) or [None] * len(split_phases)
    # one accumulator fed piece by piece
    streamed = PhaseMoments()
    for part_phases, part_weights in zip(split_phases, split_weights, strict=True):
        streamed.update(part_phases, part_weights)
    # separate accumulators merged
    merged = PhaseMoments()
    for part_phases, part_weights in zip(split_phases, split_weights, strict=True):
        merged = merged + PhaseMoments().update(part_phases, part_weights)
    for other in (streamed, merged):
        assert_same_moments(whole, other)


@given(event_sets())
def test_property_statistics_equal_direct_numpy(events):
    phases, weights, _ = events
    moments = PhaseMoments().update(phases, weights)
    expected = direct_z2(phases, weights)
    sum_w2 = moments.sum_w2
    # |ΔZ²_m| ≲ m · 8 (Σw)² · 1e-9 / Σw² from the 1e-9 Σw accuracy of the sums
    ratio = moments.sum_w**2 / sum_w2 if sum_w2 > 0 else 0.0
    tolerance = 1e-9 * (1.0 + ratio) * np.arange(1, MAX_HARMONICS + 1)
    assert np.all(np.abs(z2_series(moments) - expected) <= tolerance + 1e-9 * expected)
    penalised = expected - 4.0 * np.arange(1, MAX_HARMONICS + 1) + 4.0
    result = h_test(moments)
    assert result.statistic == pytest.approx(penalised.max(), rel=1e-9, abs=tolerance[-1])
    ordered = np.sort(penalised)
    if ordered[-1] - ordered[-2] > 1e-6:
        assert result.harmonics == int(np.argmax(penalised)) + 1
    assert result.name == ("weighted H" if weights is not None and phases.size else "H")
    rayleigh = rayleigh_test(moments)
    assert rayleigh.log_p == pytest.approx(-expected[0] / 2, rel=1e-9, abs=tolerance[0])
    z2 = z2_test(moments, 3)
    assert z2.log_p == pytest.approx(
        scipy_stats.chi2.logsf(expected[2], 6), rel=1e-8, abs=tolerance[2])
    assert isinstance(result, TestResult) and math.isfinite(result.log_p)


@given(event_sets())
def test_property_state_round_trip_is_exact(events):
    phases, weights, _ = events
    moments = PhaseMoments(harmonics=7, bins=5).update(phases, weights)
    state = moments.to_state()
    restored = PhaseMoments.from_state(json.loads(json.dumps(state)))
    assert restored.to_state() == state
    for name in ("cos_sums", "sin_sums", "hist_w", "hist_w2"):
        np.testing.assert_array_equal(getattr(restored, name), getattr(moments, name))
    assert (restored.sum_w, restored.sum_w2, restored.count, restored.weighted) == (
        moments.sum_w, moments.sum_w2, moments.count, moments.weighted)


INTERVAL = 1_000_000_000  # 1 s in ns


@st.composite
def timed_event_sets(draw):
    size = draw(st.integers(0, 120))
    times = draw(st.lists(st.integers(-5 * INTERVAL, 20 * INTERVAL), min_size=size,
                          max_size=size))
    phases = draw(st.lists(phase_values, min_size=size, max_size=size))
    weights = None
    if draw(st.booleans()):
        weights = np.array(draw(st.lists(weight_values, min_size=size, max_size=size)))
    if draw(st.booleans()):
        times = sorted(times)  # the usual, nearly sorted, case
    cuts = sorted(draw(st.lists(st.integers(0, size), max_size=4)))
    return np.array(times, dtype=np.int64), np.array(phases, dtype=float), weights, cuts


def interval_index(times):
    return np.floor_divide(times, INTERVAL)


@given(timed_event_sets())
def test_property_time_binned_split_merge_and_state(events):
    times, phases, weights, cuts = events
    whole = TimeBinnedMoments(INTERVAL).update(times, phases, weights)
    # intervals hold exactly the events of their interval (direct numpy grouping)
    starts = [start for start, _ in whole.intervals()]
    assert starts == sorted(set((interval_index(times) * INTERVAL).tolist()))
    for start, moments in whole.intervals():
        mask = interval_index(times) == start // INTERVAL
        assert_moments_match(moments, phases[mask], None if weights is None else weights[mask])
    assert whole.latest_ns == (int(times.max()) if times.size else None)
    assert_same_moments(whole.total(), PhaseMoments().update(phases, weights))
    # splitting the stream, or merging separately filled objects, changes nothing
    split_weights = pieces(weights, cuts) or [None] * (len(cuts) + 1)
    streamed = TimeBinnedMoments(INTERVAL)
    merged = TimeBinnedMoments(INTERVAL)
    for t, p, w in zip(np.split(times, cuts), np.split(phases, cuts), split_weights,
                       strict=True):
        streamed.update(t, p, w)
        merged = merged + TimeBinnedMoments(INTERVAL).update(t, p, w)
    for other in (streamed, merged):
        assert other.latest_ns == whole.latest_ns
        assert [s for s, _ in other.intervals()] == starts
        for (_, a), (_, b) in zip(whole.intervals(), other.intervals(), strict=True):
            assert a.count == b.count
            if a.count:
                assert_same_moments(a, b)
    # state round trip is exact
    state = whole.to_state()
    restored = TimeBinnedMoments.from_state(json.loads(json.dumps(state)))
    assert restored.to_state() == state


# ---------------------------------------------------------------------------------------------
# TimeBinnedMoments windows and retention


def test_window_sums_equal_direct_sums(rng):
    times = rng.integers(0, 60 * INTERVAL, 20_000)  # unsorted on purpose
    phases = rng.random(times.size)
    weights = rng.random(times.size)
    binned = TimeBinnedMoments(INTERVAL, harmonics=8, bins=16)
    for part in np.array_split(np.arange(times.size), 7):
        binned.update(times[part], phases[part], weights[part])
    starts = interval_index(times) * INTERVAL
    for length in (INTERVAL, 5 * INTERVAL, 60 * INTERVAL):
        for end in (None, 30 * INTERVAL, 30 * INTERVAL - 1, 7 * INTERVAL + 12345):
            window = binned.window(length, end)
            end_ns = binned.latest_ns if end is None else end
            # every interval overlapping (end − length, end], events counted whole
            mask = (starts <= end_ns) & (starts + INTERVAL > end_ns - length + 1)
            assert_moments_match(window, phases[mask], weights[mask])
    # windows over every interval equal the total
    assert_same_moments(binned.window(61 * INTERVAL), binned.total())
    with pytest.raises(ValueError, match="positive multiple"):
        binned.window(INTERVAL + 1)
    with pytest.raises(ValueError, match="positive multiple"):
        binned.window(0)
    assert TimeBinnedMoments(INTERVAL).window(INTERVAL).is_empty


def test_retention_bounds_memory_and_keeps_total_exact(rng):
    retain = 10 * INTERVAL
    binned = TimeBinnedMoments(INTERVAL, retain_ns=retain)
    times = np.sort(rng.integers(0, 200 * INTERVAL, 40_000))
    phases = rng.random(times.size)
    for part in np.array_split(np.arange(times.size), 400):  # ~1 interval per batch
        binned.update(times[part], phases[part])
        assert len(binned) <= retain // INTERVAL + 2
    assert_moments_match(binned.total(), phases)
    # the longest window the retention allows is exact ...
    latest = binned.latest_ns
    starts = interval_index(times) * INTERVAL
    mask = starts + INTERVAL > latest - retain + 1
    assert_moments_match(binned.window(retain), phases[mask])
    # ... and a longer one is refused, not silently short
    with pytest.raises(ValueError, match="retained"):
        binned.window(retain + 5 * INTERVAL)
    # a late event for an expired interval goes into the total only
    before = len(binned)
    binned.update(np.array([3 * INTERVAL]), np.array([0.25]))
    assert len(binned) == before
    assert_moments_match(binned.total(), np.append(phases, 0.25))
    assert binned.expired.count + sum(m.count for _, m in binned.intervals()) == times.size + 1
    restored = TimeBinnedMoments.from_state(json.loads(json.dumps(binned.to_state())))
    assert restored.to_state() == binned.to_state()


def test_merge_with_retention_expires_consistently(rng):
    retain = 5 * INTERVAL
    early = TimeBinnedMoments(INTERVAL, retain_ns=retain)
    late = TimeBinnedMoments(INTERVAL, retain_ns=retain)
    t1 = np.sort(rng.integers(0, 20 * INTERVAL, 2000))
    t2 = np.sort(rng.integers(0, 40 * INTERVAL, 2000))
    p1, p2 = rng.random(t1.size), rng.random(t2.size)
    early.update(t1, p1)
    late.update(t2, p2)
    merged = early + late
    assert merged.latest_ns == late.latest_ns
    assert_moments_match(merged.total(), np.concatenate([p1, p2]))
    times, phases = np.concatenate([t1, t2]), np.concatenate([p1, p2])
    starts = interval_index(times) * INTERVAL
    mask = starts + INTERVAL > merged.latest_ns - retain + 1
    assert_moments_match(merged.window(retain), phases[mask])
    with pytest.raises(ValueError, match="different shapes"):
        early + TimeBinnedMoments(2 * INTERVAL)


def test_time_binned_refuses_bad_input():
    binned = TimeBinnedMoments(INTERVAL)
    with pytest.raises(TypeError, match="integer nanoseconds"):
        binned.update(np.array([1.5]), np.array([0.1]))
    with pytest.raises(ValueError, match="phases has"):
        binned.update(np.array([1, 2]), np.array([0.1]))
    with pytest.raises(ValueError, match="finite"):
        binned.update(np.array([1, 2 * INTERVAL]), np.array([0.1, np.nan]))
    assert binned.is_empty and binned.latest_ns is None
    with pytest.raises(ValueError):
        TimeBinnedMoments(0)
    with pytest.raises(ValueError):
        TimeBinnedMoments(INTERVAL, retain_ns=-1)
    state = TimeBinnedMoments(INTERVAL).update(np.array([5, INTERVAL + 5]),
                                               np.array([0.1, 0.2])).to_state()
    state["intervals"][1][0] = INTERVAL + 1
    with pytest.raises(InputError, match="multiple of interval_ns"):
        TimeBinnedMoments.from_state(state)
    state["intervals"][1][0] = 0
    with pytest.raises(InputError, match="appears twice"):
        TimeBinnedMoments.from_state(state)
    state["intervals"][1] = [INTERVAL, PhaseMoments(harmonics=3).to_state()]
    with pytest.raises(InputError, match="harmonics, bins"):
        TimeBinnedMoments.from_state(state)


def test_module_has_no_io_or_transport_imports():
    # core rule (DEVELOPERS.md): the core imports neither zmq nor pyarrow
    code = ("import sys, turnstamp.core.stats; "
            "print(any(m.split('.')[0] in ('zmq', 'pyarrow') for m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
