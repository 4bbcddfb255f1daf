"""Periodicity tests (Z²ₘ, Rayleigh, H-test, their weighted forms) against published
definitions and calibrations, scipy, astropy and mpmath.

Sources, named beside each check: Buccheri et al. 1983 (A&A 128, 245) for Z²ₘ; de Jager,
Raubenheimer & Swanepoel 1989 (A&A 221, 180) for the H-test and de Jager & Büsching 2010
(A&A 517, L9) for its exp(−0.4 H) calibration; Kerr 2011 (ApJ 732, 38) for the weighted
forms; scipy.stats / scipy.special, astropy.stats.circstats and mpmath as references.
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest
from hypothesis import given
from moment_oracle import direct_z2, event_sets
from scipy import stats as scipy_stats

from turnstamp.core.moments import MAX_HARMONICS, PhaseMoments
from turnstamp.core.periodicity import (
    H_CALIBRATED_UP_TO,
    TestResult,
    chi2_even_log_sf,
    h_log_p,
    h_test,
    rayleigh_test,
    z2_from_sums,
    z2_series,
    z2_test,
)
from turnstamp.core.significance import sigma_from_log_p

SIX_PHASES = [0.0, 0.1, 0.2, 0.25, 0.3, 0.9]  # an invented small set
SIX_WEIGHTS = [1.0, 0.5, 0.5, 1.0, 0.2, 0.1]  # invented weights for it


# ---------------------------------------------------------------------------------------------
# Z²ₘ, H and Rayleigh check values


@pytest.mark.parametrize("phase", [0.0, 0.37])
def test_identical_phases_give_2mN(phase):
    # Z²_m definition (Buccheri et al. 1983, A&A 128, 245): N identical phases give
    # Z²_m = 2mN exactly (N = 100, m = 2 → 400).
    moments = PhaseMoments().update(np.full(100, phase))
    m = np.arange(1, MAX_HARMONICS + 1)
    np.testing.assert_allclose(z2_series(moments), 2 * m * 100, rtol=1e-12)
    assert z2_test(moments, 2).statistic == pytest.approx(400.0, rel=1e-12)
    # H = max_m (Z²_m − 4m + 4) (de Jager, Raubenheimer & Swanepoel 1989, A&A 221, 180) of
    # Z²_m = 2mN is 40N − 76 at m = 20 for N ≥ 3; N = 100 → 3924.
    result = h_test(moments)
    assert result.statistic == pytest.approx(3924.0, rel=1e-12)
    assert result.harmonics == 20
    # far beyond the H ≈ 70 calibration range (de Jager & Büsching 2010, from memory)
    assert result.beyond_calibration
    assert result.log_p == pytest.approx(-0.4 * 3924.0, rel=1e-12)  # finite, no underflow
    assert result.p == 0.0


def test_h_for_one_and_two_events():
    # same definitions (de Jager et al. 1989): N = 2 → H = 4; N = 1 → H = 2 at m = 1.
    assert h_test(PhaseMoments().update([0.3, 0.3])).statistic == pytest.approx(4.0, rel=1e-12)
    single = h_test(PhaseMoments().update([0.3]))
    assert single.statistic == pytest.approx(2.0, rel=1e-12)
    assert single.harmonics == 1


def test_evenly_spaced_phases():
    # Z²_m definition (Buccheri et al. 1983): Σ_i e^{2πik i/N} vanishes unless N divides k,
    # so phases i/N give Z²_m = 0 for m < N and Z²_N = 2N (N = 10).
    series = z2_series(PhaseMoments().update(np.arange(10) / 10))
    np.testing.assert_allclose(series[:9], 0.0, atol=1e-12)
    assert series[9] == pytest.approx(20.0, rel=1e-12)
    # hence H = 0 for evenly spaced phases with N > 20 (de Jager et al. 1989 definition).
    assert h_test(PhaseMoments().update(np.arange(25) / 25)).statistic == pytest.approx(
        0.0, abs=1e-12)


def test_six_phase_set_unweighted():
    # Z²_1..3 of the definition (Buccheri et al. 1983) evaluated with mpmath to 15 digits;
    # the H-test (de Jager et al. 1989) then takes m = 1, H = Z²_1.
    moments = PhaseMoments().update(SIX_PHASES)
    np.testing.assert_allclose(
        z2_series(moments)[:3], [5.0921206733934, 5.42545400672673, 7.0517890247835], rtol=1e-12)
    result = h_test(moments)
    assert result.name == "H"
    assert result.statistic == pytest.approx(5.0921206733934, rel=1e-12)
    assert result.harmonics == 1
    assert (result.count, result.sum_w) == (6, 6.0)


def test_six_phase_set_weighted():
    # weighted Z² with the 1/Σw² normalisation of Kerr (2011, ApJ 732, 38; journal details
    # from memory), evaluated with mpmath to 15 digits.
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
    # Kerr (2011) normalisation: w ≡ 1 reproduces the classic values; w → c·w changes nothing.
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
    # asymptotic Rayleigh p = exp(−Z²_1/2) = 0.07838988822258776 (Mardia & Jupp 2000,
    # Directional Statistics, from memory); astropy.stats.circstats.rayleightest applies the
    # small-sample correction of Wilkie (1983) for n < 50 and gives 0.07323199778294642 for
    # this n = 6 set, which we deliberately do not use.
    result = rayleigh_test(PhaseMoments().update(SIX_PHASES))
    assert result.name == "Rayleigh" and result.harmonics == 1
    assert result.statistic == pytest.approx(5.0921206733934, rel=1e-12)
    assert result.p == pytest.approx(0.07838988822258776, rel=1e-12)
    assert abs(result.p - 0.07323199778294642) > 1e-3


@pytest.mark.parametrize("n", [50, 200, 5000])
def test_rayleigh_matches_astropy_for_n_at_least_50(rng, n):
    # astropy.stats.circstats.rayleightest: p = exp(−n R̄²) for n ≥ 50 (no correction there).
    from astropy.stats.circstats import rayleightest

    phases = (rng.normal(0.3, 0.35, n)) % 1.0
    ours = rayleigh_test(PhaseMoments().update(phases))
    theirs = float(rayleightest(2.0 * np.pi * phases))
    assert ours.p == pytest.approx(theirs, rel=1e-9)


# ---------------------------------------------------------------------------------------------
# chance probabilities


def test_z2_probability_check_values():
    # χ² tail in closed form for even dof (Buccheri et al. 1983: Z²_m ~ χ²_2m):
    # P(χ²_4 > 20) = 11 e^{-10}; P(χ²_2 > 20) = e^{-10}.
    assert math.exp(chi2_even_log_sf(20.0, 4)) == pytest.approx(4.993992273873e-4, rel=1e-12)
    assert math.exp(chi2_even_log_sf(20.0, 2)) == pytest.approx(4.539992976248e-5, rel=1e-12)
    # one-sided σ = 3.290865 for the first (scipy.stats.norm.isf(11 e^{-10}))
    assert sigma_from_log_p(chi2_even_log_sf(20.0, 4)) == pytest.approx(3.290865, abs=1e-6)
    assert chi2_even_log_sf(0.0, 6) == 0.0


@pytest.mark.parametrize("m", [1, 2, 3, 5, 10, 20])
def test_z2_probability_matches_scipy_chi2(m):
    # scipy.stats.chi2.sf with 2m degrees of freedom (Buccheri et al. 1983, A&A 128, 245).
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
        # P = exp(−0.4 H) (de Jager & Büsching 2010, A&A 517, L9); σ = scipy.stats.norm.isf(P)
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
    # H = 15 ↦ 2.8098σ one-sided: scipy.stats.norm.isf(e^{-6}) (de Jager & Büsching 2010).
    assert sigma_from_log_p(h_log_p(15.0)) == pytest.approx(2.8098, abs=1e-4)
    # not the two-sided 3.025923 (scipy.stats.norm.isf(e^{-6}/2)) ...
    assert abs(sigma_from_log_p(h_log_p(15.0)) - 3.025923) > 0.2
    # ... and the 2010 calibration e^{-6}, not the 1989 form 0.9999755·exp(−0.39802 H) =
    # 2.553412701e-3 (de Jager, Raubenheimer & Swanepoel 1989; their fit, from memory)
    assert math.exp(h_log_p(15.0)) == pytest.approx(math.exp(-6.0), rel=1e-14)
    assert abs(math.exp(h_log_p(15.0)) - 2.553412701e-3) > 5e-5


@pytest.mark.parametrize(
    "sigma, h, z2_2, z2_1",
    [
        # values reaching 3, 4, 5σ one-sided: H from exp(−0.4 H) (de Jager & Büsching 2010),
        # Z² from scipy.stats.chi2.isf(scipy.stats.norm.sf(σ), 2m); rounded to 4 decimals
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
    strong = h_test(PhaseMoments().update(np.full(3, 0.5)))  # H = 40·3 − 76 = 44 (see above)
    assert strong.statistic == pytest.approx(44.0, rel=1e-12)
    assert not strong.beyond_calibration
    assert h_test(PhaseMoments().update(np.full(4, 0.5))).beyond_calibration  # H = 84


# ---------------------------------------------------------------------------------------------
# null distributions


def test_z2_null_distribution_is_chi2(rng):
    # scipy.stats.kstest against chi2(2m) (Buccheri et al. 1983, A&A 128, 245), seeded
    realisations = [z2_series(PhaseMoments(harmonics=5).update(rng.random(200)))
                    for _ in range(3000)]
    values = np.array(realisations)
    for m in (1, 2, 5):
        result = scipy_stats.kstest(values[:, m - 1], scipy_stats.chi2(2 * m).cdf)
        assert result.pvalue > 1e-3, (m, result)


def test_weighted_z2_null_mean(rng):
    # E[Z²_{m,w}] = 2m exactly for any weights under the null: E[C_k² + S_k²] = Σw² for
    # uniform phases (Kerr 2011 normalisation); here w = U², N = 500
    values = np.array([
        z2_series(PhaseMoments(harmonics=2).update(rng.random(500), rng.random(500) ** 2))[1]
        for _ in range(2000)
    ])
    # variance ≈ 4m = 8 when no weight dominates (our Monte Carlo: 7.857), so the mean's
    # standard error ≈ 0.063
    assert values.mean() == pytest.approx(4.0, abs=4 * math.sqrt(8.0 / values.size))


def test_h_false_alarm_rate_matches_exp_minus_0p4h():
    # de Jager & Büsching 2010 (A&A 517, L9): P(>H) = exp(−0.4 H), checked here for
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
