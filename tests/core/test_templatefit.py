"""The Fourier-domain offset fit of data against a template (Taylor 1992).

Sources, named beside each check: Taylor 1992 (Phil. Trans. R. Soc. Lond. A 341, 117) for
the fit and its error formulas; seeded Monte Carlo for coverage; scipy.stats for
binomial limits.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats as scipy_stats

from turnstamp.core.cycles import wrap_cycles
from turnstamp.core.moments import PhaseMoments
from turnstamp.core.peaks import PeakComponent
from turnstamp.core.template import PulseTemplate
from turnstamp.core.templatefit import OffsetFit, fit_offset
from turnstamp.core.templatenoise import in_phase_covariance


def peak(shape="von_mises", position=0.25, width=0.03, amplitude=1.0) -> PeakComponent:
    return PeakComponent(shape=shape, position_cycles=position, width_cycles=width,
                         amplitude=amplitude)


def single(width=0.03, unpulsed=0.5, position=0.25, shape="von_mises") -> PulseTemplate:
    return PulseTemplate(name="test single", components=[peak(shape, position, width)],
                         unpulsed_fraction=unpulsed)


def moments_of(phases, weights=None, harmonics=20) -> PhaseMoments:
    return PhaseMoments(harmonics=harmonics).update(np.remainder(phases, 1.0), weights)


# ---------------------------------------------------------------------------------------
# The offset fit


def test_sign_convention_positive_shift_means_data_later():
    # definition: data ≈ template(φ − shift); P_k = Σ e^{+2πikφ}, S_k = ∫ s e^{+2πikφ}
    template = single(0.02, 0.0, position=0.1)
    rng = np.random.default_rng(3)
    phases = template.sample(5000, rng) + 0.2
    fit = fit_offset(moments_of(phases), template)
    assert fit.shift_cycles == pytest.approx(0.2, abs=5 * fit.sigma_cycles)
    fit_back = fit_offset(moments_of(phases - 0.45), template)
    assert fit_back.shift_cycles == pytest.approx(-0.25, abs=5 * fit.sigma_cycles)
    assert -0.5 < fit_back.shift_cycles <= 0.5
    assert np.angle(template.fourier(1)[0]) == pytest.approx(2 * math.pi * 0.1)


def test_fit_of_noise_free_moments_is_exact():
    # P_k = b·S_k·e^{2πik·shift} exactly (definition), so the maximum of C sits at shift
    template = PulseTemplate(name="asym", components=[peak("von_mises", 0.3, 0.02, 1.0),
                                                      peak("gaussian", 0.45, 0.06, 0.6)])
    for shift in (-0.4999, -0.123456, 0.0, 0.031, 0.5):
        moments = PhaseMoments()
        k = np.arange(1, 21)
        p = 1000.0 * template.fourier(20) * np.exp(2j * np.pi * k * shift)
        moments.cos_sums, moments.sin_sums = p.real.copy(), p.imag.copy()
        moments.sum_w = moments.sum_w2 = 4000.0
        moments.count = 4000
        fit = fit_offset(moments, template)
        assert wrap_cycles(fit.shift_cycles - shift) == pytest.approx(0.0, abs=1e-11)
        assert fit.amplitude == pytest.approx(1000.0, rel=1e-10)


@pytest.mark.slow
@pytest.mark.parametrize("unpulsed, events", [(0.85, 4000), (0.3, 1500)])
def test_offset_coverage_matches_stated_uncertainty(unpulsed, events):
    # coverage (common practice): over 400 seeded trials the injected shift lies within 1σ
    # in a fraction inside the binomial 99.8% interval around 68.27%, within 2σ in ≥ 90%;
    # the amplitude (pulsed events, for unit weights) likewise within 1σ.
    template = PulseTemplate(name="cov", unpulsed_fraction=unpulsed,
                             components=[peak("von_mises", 0.3, 0.03, 1.0),
                                         peak("gaussian", 0.65, 0.05, 0.5)])
    rng = np.random.default_rng(20261201)
    trials = 400
    z_shift, z_amp = [], []
    for _ in range(trials):
        shift = rng.uniform(-0.5, 0.5)
        fit = fit_offset(moments_of(template.sample(events, rng) + shift), template)
        assert fit.detected
        z_shift.append(wrap_cycles(fit.shift_cycles - shift) / fit.sigma_cycles)
        z_amp.append((fit.amplitude - events * (1 - unpulsed)) / fit.amplitude_sigma)
    z_shift, z_amp = np.abs(z_shift), np.abs(z_amp)
    lo, hi = scipy_stats.binom.interval(0.998, trials, 0.6827)
    assert lo <= np.sum(z_shift < 1) <= hi
    assert np.mean(z_shift < 2) >= 0.90
    assert lo <= np.sum(z_amp < 1) <= hi


def test_null_noise_understates_errors_of_a_strong_pulse():
    # photon noise follows the signal: events on the pulse flanks add variance, so the
    # Poisson-model error of the cross-correlation exceeds Taylor's additive-noise error
    # for a strong pulse
    template = single(0.03, 0.0)
    rng = np.random.default_rng(5)
    moments = moments_of(template.sample(5000, rng))
    poisson = fit_offset(moments, template, method="correlation")
    null = fit_offset(moments, template, noise_model="null")
    assert poisson.shift_cycles == null.shift_cycles
    assert poisson.sigma_cycles > 1.5 * null.sigma_cycles


def test_in_phase_covariance_reduces_to_taylor_under_the_null():
    # Taylor (1992, Phil. Trans. R. Soc. Lond. A 341, 117; appendix, from memory): Re P_k
    # and Im P_k each have variance σ_f² = Σw²/2 for uniform phases
    template = single(0.05)
    cov = in_phase_covariance(template, 6, 0.0)
    assert np.allclose(cov, np.diag(np.abs(template.fourier(6)) ** 2 / 2), atol=1e-15)
    # and matches a direct Monte Carlo for a strongly pulsed source (statistical, 10%)
    rng = np.random.default_rng(8)
    x = single(0.05, 0.4, position=0.25).sample(400_000, rng)
    s = template.fourier(6)
    h = np.real(np.conj(s)[:, None] * np.exp(2j * np.pi * np.outer(np.arange(1, 7), x)))
    assert np.allclose(np.cov(h), in_phase_covariance(template, 6, 0.6), atol=0.01 * np.abs(
        s[0]) ** 2)


@pytest.mark.slow
def test_taylor_normalisation_monte_carlo_reference():
    # the error formulas of Taylor (1992, appendix; σ_τ² = σ²/(2b Σ k²|P_k||S_k|cos…),
    # σ_b² = σ²/(2Σ|S_k|²), from memory) against a seeded Monte Carlo: 256 bins, Gaussian
    # template of width 0.03 cycles, b = 2, shift 0.0123 cycles, white noise σ_t = 0.5 per
    # bin, 1000 trials; empirical scatter / predicted error must be 1 within the sampling
    # error of a standard deviation. The binned profile enters as moments:
    # P_k = Σ_j p_j e^{2πik j/n}, and σ_f² = σ_t² n/2 is expressed as Σw² = σ_t² n.
    n, b, shift, sigma_t, width = 256, 2.0, 0.0123, 0.5, 0.03
    template = single(width, shape="gaussian", position=0.0)
    x = np.arange(n) / n
    peak_shape = np.exp(-0.5 * (wrap_cycles(x - shift) / width) ** 2)  # peak 1 per bin
    k = np.arange(1, 33)
    basis = np.exp(2j * np.pi * np.outer(x, k))
    rng = np.random.default_rng(1992)
    trials = 1000
    shifts, sigmas, amps, amp_sigmas = [], [], [], []
    for _ in range(trials):
        profile = 1.0 + b * peak_shape + rng.normal(0, sigma_t, n)
        p = profile @ basis
        moments = PhaseMoments(harmonics=32)
        moments.cos_sums, moments.sin_sums = p.real, p.imag
        moments.sum_w, moments.sum_w2, moments.count = float(profile.sum()), sigma_t**2 * n, n
        fit = fit_offset(moments, template, noise_model="null")
        shifts.append(fit.shift_cycles)
        sigmas.append(fit.sigma_cycles)
        amps.append(fit.amplitude)
        amp_sigmas.append(fit.amplitude_sigma)
    shifts = np.array(shifts)
    tol = 3.5 / math.sqrt(2 * trials)  # relative error of a standard deviation
    assert np.std(shifts) / np.mean(sigmas) == pytest.approx(1.0, abs=tol)
    assert np.std(amps) / np.mean(amp_sigmas) == pytest.approx(1.0, abs=tol)
    assert np.mean(shifts) == pytest.approx(shift, abs=4 * np.std(shifts) / math.sqrt(trials))


@pytest.mark.slow
def test_false_detection_rate_on_uniform_phases():
    # the search over shifts is accounted for (Rice upcrossing bound, conservative): at
    # 3σ one-sided (p = scipy.stats.norm.sf(3) = 1.35e-3) 1000 noise trials give at most a few
    template = single(0.03)
    rng = np.random.default_rng(44)
    detected = sum(fit_offset(moments_of(rng.random(300)), template).detected
                   for _ in range(1000))
    # scipy.stats.binom.sf(6, 1000, 1.35e-3) = P(≥ 7) = 5.0e-4, even at the nominal rate
    assert detected <= 6


def test_weighted_and_binned_template_fits_recover_the_shift():
    # consistency (common practice): weighted events and a binned copy of the template
    # both recover an injected shift within 4σ
    rng = np.random.default_rng(9)
    template = single(0.04, 0.0, position=0.6)
    pulsed = template.sample(3000, rng) + 0.17
    background = rng.random(20000)
    phases = np.concatenate([pulsed, background])
    weights = np.concatenate([rng.uniform(0.4, 1.0, pulsed.size),
                              rng.uniform(0.0, 0.3, background.size)])
    fit = fit_offset(moments_of(phases, weights), template)
    assert fit.detected
    assert wrap_cycles(fit.shift_cycles - 0.17) == pytest.approx(0, abs=4 * fit.sigma_cycles)
    centres = (np.arange(64) + 0.5) / 64
    binned = PulseTemplate(name="from bins", binned_profile=list(
        template.pulsed_density(centres)))
    fit_b = fit_offset(moments_of(phases, weights), binned)
    assert wrap_cycles(fit_b.shift_cycles - 0.17) == pytest.approx(0, abs=4 * fit_b.sigma_cycles)


def test_empty_moments_give_an_undetected_nan_fit():
    # behaviour: no events, no offset (NaN), never "detected"
    fit = fit_offset(PhaseMoments(), single())
    assert not fit.detected and math.isnan(fit.shift_cycles)
    json.dumps(fit.to_dict())


def test_bad_arguments_are_refused():
    moments = moments_of(np.linspace(0, 1, 50, endpoint=False))
    with pytest.raises(ValueError, match="harmonics = 21"):
        fit_offset(moments, single(), harmonics=21)
    with pytest.raises(ValueError, match="noise_model = 'white'"):
        fit_offset(moments, single(), noise_model="white")  # type: ignore[arg-type]


def test_fit_to_dict_is_json():
    rng = np.random.default_rng(2)
    fit = fit_offset(moments_of(single().sample(2000, rng)), single())
    data = json.loads(json.dumps(fit.to_dict()))
    assert data["harmonics_used"] == fit.harmonics_used == len(data["data_coefficients"])
    assert isinstance(fit, OffsetFit)
    assert fit.shift_us(311.37) == pytest.approx(fit.shift_cycles / 311.37 * 1e6)
