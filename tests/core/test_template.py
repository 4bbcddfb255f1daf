"""Pulse templates in our format: Fourier coefficients, densities, sampling, validation.

Sources, named beside each check: scipy.integrate.quad for Fourier coefficients and
areas, the analytic transforms of the von Mises and wrapped Gaussian peaks, and
scipy.stats for goodness-of-fit limits.
"""

from __future__ import annotations

import math
import tomllib

import numpy as np
import pytest
from pydantic import ValidationError
from scipy import integrate
from scipy import stats as scipy_stats

from turnstamp.core.cycles import cycles_to_us, us_to_cycles, wrap_cycles
from turnstamp.core.peaks import PeakComponent
from turnstamp.core.template import PulseTemplate


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


def test_cycle_time_conversions():
    # the 20-milliperiod tolerance (common practice) is 0.02/ν; at an invented 311.37 Hz
    # that is 0.02/311.37·1e6 = 64.2322638661 µs
    assert cycles_to_us(0.02, 311.37) == pytest.approx(64.2322638661, rel=1e-10)
    assert us_to_cycles(cycles_to_us(0.137, 29.7), 29.7) == pytest.approx(0.137, rel=1e-14)
    assert wrap_cycles(0.5) == 0.5 and wrap_cycles(-0.5) == 0.5 and wrap_cycles(1.25) == 0.25
