"""Pulse templates and the Fourier-domain offset fit.

Sources: REFERENCES.md §2.3 (Taylor 1992 template matching; its normalisation verified
there by Monte Carlo), scipy.integrate.quad for Fourier coefficients, scipy.stats for
binomial coverage limits. Each check names its source beside it.
"""

from __future__ import annotations

import json
import math
import tomllib

import numpy as np
import pytest
from pydantic import ValidationError
from scipy import integrate
from scipy import stats as scipy_stats

from turnstamp.core.stats import PhaseMoments
from turnstamp.core.template import (
    OffsetFit,
    PeakComponent,
    PulseTemplate,
    cycles_to_us,
    fit_offset,
    in_phase_covariance,
    us_to_cycles,
    wrap_cycles,
)


def peak(shape="von_mises", position=0.25, width=0.03, amplitude=1.0) -> PeakComponent:
    return PeakComponent(shape=shape, position_cycles=position, width_cycles=width,
                         amplitude=amplitude)


def single(width=0.03, unpulsed=0.5, position=0.25, shape="von_mises") -> PulseTemplate:
    return PulseTemplate(name="test single", components=[peak(shape, position, width)],
                         unpulsed_fraction=unpulsed)


def quad_fourier(density, k: int, edges=None) -> complex:
    """∫₀¹ density(φ) e^{+2πikφ} dφ by adaptive quadrature (scipy.integrate.quad)."""
    points = None if edges is None else list(edges)
    opts = dict(limit=400, epsabs=1e-13, epsrel=1e-12, points=points)
    re = integrate.quad(lambda x: density(x) * math.cos(2 * math.pi * k * x), 0, 1, **opts)[0]
    im = integrate.quad(lambda x: density(x) * math.sin(2 * math.pi * k * x), 0, 1, **opts)[0]
    return complex(re, im)


def moments_of(phases, weights=None, harmonics=20) -> PhaseMoments:
    return PhaseMoments(harmonics=harmonics).update(np.remainder(phases, 1.0), weights)


# ---------------------------------------------------------------------------------------
# Fourier coefficients and densities


@pytest.mark.parametrize("width, position", [(0.01, 0.0), (0.03, 0.37), (0.12, 0.9)])
def test_von_mises_fourier_matches_numerical_integration(width, position):
    # scipy.integrate.quad of the density; analytic I_k(κ)/I_0(κ)·e^{2πikμ}, κ = 1/(2πw)²
    component = peak("von_mises", position, width)
    s = PulseTemplate(name="t", components=[component]).fourier(12)
    for k in range(1, 13):
        expected = quad_fourier(lambda x: float(component.density(x)), k,
                                edges=[position])
        assert abs(s[k - 1] - expected) < 1e-10, k


@pytest.mark.parametrize("width, position", [(0.02, 0.5), (0.3, 0.1)])
def test_wrapped_gaussian_fourier_matches_numerical_integration(width, position):
    # scipy.integrate.quad; analytic exp(−2π²k²σ²)·e^{2πikμ} of the wrapped Gaussian
    component = peak("gaussian", position, width)
    s = PulseTemplate(name="t", components=[component]).fourier(10)
    for k in range(1, 11):
        expected = quad_fourier(lambda x: float(component.density(x)), k, edges=[position])
        assert abs(s[k - 1] - expected) < 1e-10, k


def test_binned_fourier_is_that_of_the_step_function():
    # quad over the piecewise-constant profile (bin i centred at (i + 0.5)/n); the DFT times
    # sinc(k/n) is exact for a step function, also beyond n/2
    values = [1.0, 1.0, 2.0, 6.0, 9.0, 4.0, 1.5, 1.0, 1.0, 1.2]
    template = PulseTemplate(name="binned", binned_profile=values)
    n = len(values)
    s = template.fourier(14)
    for k in range(1, 15):
        expected = quad_fourier(lambda x: float(template.pulsed_density(x)), k,
                                edges=np.arange(1, n) / n)
        assert abs(s[k - 1] - expected) < 1e-10, k


def test_mixture_fourier_is_the_amplitude_weighted_sum():
    # linearity of the Fourier transform (definition)
    a, b = peak("von_mises", 0.2, 0.02, 3.0), peak("gaussian", 0.7, 0.05, 1.0)
    mixed = PulseTemplate(name="two", components=[a, b]).fourier(8)
    k = np.arange(1, 9)
    assert np.allclose(mixed, (3 * a.fourier(k) + b.fourier(k)) / 4, atol=1e-14)


@pytest.mark.parametrize(
    "template",
    [
        single(0.03, 0.5),
        PulseTemplate(name="two", unpulsed_fraction=0.2,
                      components=[peak("von_mises", 0.1, 0.02, 2.0), peak("gaussian", 0.6, 0.3)]),
        PulseTemplate(name="binned", binned_profile=[0, 1, 3, 8, 3, 1, 0, 0, 0.5],
                      unpulsed_fraction=0.7),
    ],
)
def test_density_has_mean_one_and_pulsed_part_unit_area(template):
    # definition: density = u + (1 − u)·s with ∫s = 1 (scipy.integrate.quad)
    points = [0.1, 0.25, 0.6]
    if template.binned_profile is not None:  # the discontinuities of the step function
        points = list(np.arange(1, len(template.binned_profile)) / len(template.binned_profile))
    full = integrate.quad(lambda x: float(template.density(x)), 0, 1, limit=400,
                          points=points)[0]
    pulsed = integrate.quad(lambda x: float(template.pulsed_density(x)), 0, 1, limit=400,
                            points=points)[0]
    assert full == pytest.approx(1.0, abs=1e-9)
    assert pulsed == pytest.approx(1.0, abs=1e-9)
    grid = np.linspace(0, 1, 7)
    assert np.all(template.density(grid) >= template.unpulsed_fraction - 1e-12)


@pytest.mark.parametrize(
    "template",
    [
        single(0.03, 0.4),
        PulseTemplate(name="mix", unpulsed_fraction=0.3,
                      components=[peak("von_mises", 0.1, 0.05, 1.0), peak("gaussian", 0.6, 0.04)]),
        PulseTemplate(name="binned", binned_profile=[0, 1, 3, 8, 3, 1, 0, 0],
                      unpulsed_fraction=0.2),
    ],
)
def test_sample_follows_the_density(template):
    # statistical check (common practice): mean of e^{2πikφ} over a sample equals
    # (1 − u)·S_k within 5σ, σ² ≈ 1/(2N); histogram χ² against the binned density
    rng = np.random.default_rng(11)
    n = 200_000
    phases = template.sample(n, rng)
    assert phases.shape == (n,) and phases.min() >= 0 and phases.max() < 1
    k = np.arange(1, 7)
    empirical = np.exp(2j * np.pi * np.outer(k, phases)).mean(axis=1)
    expected = (1 - template.unpulsed_fraction) * template.fourier(6)
    assert np.all(np.abs(empirical - expected) < 5 / math.sqrt(2 * n))
    bins = 40
    counts = np.bincount((phases * bins).astype(int), minlength=bins)
    edges = np.linspace(0, 1, bins + 1)
    expect = np.array([integrate.quad(lambda x: float(template.density(x)), a, b)[0]
                       for a, b in zip(edges[:-1], edges[1:], strict=True)]) * n
    chi2 = float(np.sum((counts - expect) ** 2 / expect))
    assert scipy_stats.chi2.sf(chi2, bins - 1) > 1e-4


def test_useful_harmonics_follow_template_power():
    # |S_k| = exp(−2π²k²σ²) for a Gaussian: > 1e-3 while k < sqrt(ln 1000/(2π²σ²))
    sigma = 0.05
    kmax = math.sqrt(math.log(1000) / (2 * math.pi**2 * sigma**2))  # 8.37
    assert single(sigma, shape="gaussian").useful_harmonics(20) == math.floor(kmax)
    assert single(0.001).useful_harmonics(20) == 20
    binned = PulseTemplate(name="b", binned_profile=[0, 0, 1, 5, 1, 0, 0, 0, 0, 0])
    assert binned.useful_harmonics(20) <= 5  # at most n_bins // 2


# ---------------------------------------------------------------------------------------
# The model: round trip and validation


def test_round_trip_through_dump_validate_json_and_toml():
    # our own format (no outside source): dump → validate is the identity; a TOML text
    # parsed by the standard library validates to the same template
    template = PulseTemplate(
        name="two peaks", description="invented test shape",
        components=[peak("von_mises", 0.1, 0.02, 2.0), peak("gaussian", 0.55, 0.05, 0.5)],
        unpulsed_fraction=0.35,
    )
    assert PulseTemplate.model_validate(template.model_dump()) == template
    assert PulseTemplate.model_validate_json(template.model_dump_json()) == template
    text = """
name = "two peaks"
description = "invented test shape"
unpulsed_fraction = 0.35

[[components]]
shape = "von_mises"
position_cycles = 0.1
width_cycles = 0.02
amplitude = 2.0

[[components]]
shape = "gaussian"
position_cycles = 0.55
width_cycles = 0.05
amplitude = 0.5
"""
    assert PulseTemplate.model_validate(tomllib.loads(text)) == template
    binned = PulseTemplate(name="b", binned_profile=[float(i % 5) for i in range(16)])
    assert PulseTemplate.model_validate(binned.model_dump(exclude_none=True)) == binned
    with pytest.raises(ValidationError):
        template.name = "changed"  # frozen


@pytest.mark.parametrize(
    "data, field, value",
    [
        (dict(components=[dict(shape="von_mises", position_cycles=1.2, width_cycles=0.03)]),
         "position_cycles", "1.2"),
        (dict(components=[dict(shape="von_mises", position_cycles=0.2, width_cycles=0.0)]),
         "width_cycles", "0.0"),
        (dict(components=[dict(shape="gaussian", position_cycles=0.2, width_cycles=0.1,
                               amplitude=-1.0)]), "amplitude", "-1.0"),
        (dict(components=[dict(shape="lorentzian", position_cycles=0.2, width_cycles=0.1)]),
         "shape", "lorentzian"),
        (dict(binned_profile=[1.0, 2.0, 3.0]), "binned_profile", "3 values"),
        (dict(binned_profile=[1.0, 2.0, -3.0, 1, 1, 1, 1, 1]), "binned_profile[2]", "-3.0"),
        (dict(binned_profile=[2.0] * 8), "binned_profile", "2.0"),
        (dict(components=[]), "components", "[]"),
        (dict(), "components / binned_profile", "neither"),
        (dict(components=[dict(shape="gaussian", position_cycles=0.2, width_cycles=0.1)],
              binned_profile=[1.0] * 7 + [2.0]), "components / binned_profile", "both"),
        (dict(binned_profile=[0, 1, 2, 3, 4, 5, 6, 7], unpulsed_fraction=1.5),
         "unpulsed_fraction", "1.5"),
        (dict(binned_profile=[0, 1, 2, 3, 4, 5, 6, 7], colour="blue"), "colour", "blue"),
    ],
)
def test_bad_templates_name_the_field_and_value(data, field, value):
    # project rule (errors name the field and the value)
    with pytest.raises(ValidationError) as info:
        PulseTemplate.model_validate({"name": "bad", **data})
    text = str(info.value)
    assert field in text and value in text


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
    # Poisson-model error exceeds Taylor's additive-noise error for a strong pulse
    template = single(0.03, 0.0)
    rng = np.random.default_rng(5)
    moments = moments_of(template.sample(5000, rng))
    poisson = fit_offset(moments, template)
    null = fit_offset(moments, template, noise_model="null")
    assert poisson.shift_cycles == null.shift_cycles
    assert poisson.sigma_cycles > 1.5 * null.sigma_cycles


def test_in_phase_covariance_reduces_to_taylor_under_the_null():
    # REFERENCES §2.3: Re P_k and Im P_k each have variance σ_f² = Σw²/2 for uniform phases
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
    # REFERENCES §2.3 [calc]: 256 bins, Gaussian template of width 0.03 cycles, b = 2,
    # shift 0.0123 cycles, white noise σ_t = 0.5 per bin: empirical σ_τ/predicted = 0.998,
    # σ_b ratio 0.991, mean τ̂ = 0.012296 (3000 trials there; 1000 here). The binned
    # profile enters as moments: P_k = Σ_j p_j e^{2πik j/n}, and σ_f² = σ_t² n/2 is
    # expressed as Σw² = σ_t² n.
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
    # 3σ one-sided (p = 1.35e-3, REFERENCES §1.5) 1000 noise trials give at most a few
    template = single(0.03)
    rng = np.random.default_rng(44)
    detected = sum(fit_offset(moments_of(rng.random(300)), template).detected
                   for _ in range(1000))
    assert detected <= 6  # binomial(1000, 1.35e-3): P(≥ 7) ≈ 3e-3 even at the nominal rate


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


def test_cycle_time_conversions():
    # REFERENCES §8: the 20-milliperiod tolerance is 0.02/ν; at an invented 311.37 Hz that
    # is 64.2322638661 µs [calc: 0.02/311.37·1e6]
    assert cycles_to_us(0.02, 311.37) == pytest.approx(64.2322638661, rel=1e-10)
    assert us_to_cycles(cycles_to_us(0.137, 29.7), 29.7) == pytest.approx(0.137, rel=1e-14)
    assert wrap_cycles(0.5) == 0.5 and wrap_cycles(-0.5) == 0.5 and wrap_cycles(1.25) == 0.25
