"""The bounds ``turnstamp bench --clock`` judges the offset estimator against."""

import math

import pytest

from turnstamp.bench.clockfit import fisher_information, moments_information, shape


def test_sinusoid_bounds_match_circular_statistics():
    sinusoid = shape("sinusoid")
    # f = 1 + cos 2πx: I = ∫ f'²/f dx = 4π² ∫ (1 − cos 2πx) dx = 4π² cycles⁻² (by hand)
    assert fisher_information("sinusoid", sinusoid, 0.0) == pytest.approx(4 * math.pi**2,
                                                                           rel=1e-6)
    # one harmonic: the sample mean direction, whose large-sample variance is
    # (1 − ρ₂)/(2Nρ₁²) rad² (Mardia & Jupp 2000, Directional Statistics, §4.8; from
    # memory); the cardioid has ρ₁ = 1/2, ρ₂ = 0, so 2/N rad² and J = 2π² cycles⁻²,
    # sqrt(I/J) = √2 (the cross-correlation column of the bench: 1.41–1.45)
    assert moments_information("sinusoid", sinusoid, 0.0, 1) == pytest.approx(
        2 * math.pi**2, rel=1e-6)


def test_more_harmonics_approach_the_bound_from_below():
    narrow = shape("narrow peak")
    full = fisher_information("narrow peak", narrow, 0.9)
    floors = [math.sqrt(full / moments_information("narrow peak", narrow, 0.9, m))
              for m in (10, 20, 40)]
    assert floors[0] > floors[1] > floors[2] >= 1.0 - 1e-6
    assert floors[2] == pytest.approx(1.0, abs=0.005)
