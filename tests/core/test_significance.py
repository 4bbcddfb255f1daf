"""Chance probability ↔ one-sided Gaussian σ, and trials, against scipy and mpmath.

The convention is one-sided, σ = Φ⁻¹(1 − p) (scipy.stats.norm.isf); trials are
independent, p_post = 1 − (1 − p)^n. Reference values come from scipy.stats.norm and
from mpmath at high precision, named beside each check.
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest

from turnstamp.core.periodicity import h_log_p
from turnstamp.core.significance import log_p_from_sigma, sigma_from_log_p, trials_log_p


@pytest.mark.parametrize(
    "sigma, p",
    # one-sided tail p = scipy.stats.norm.sf(σ), rounded to 7 digits
    [(3, 1.349898e-3), (4, 3.167124e-5), (5, 2.866516e-7), (6, 9.865876e-10),
     (7, 1.279813e-12)],
)
def test_sigma_p_table(sigma, p):
    assert math.exp(log_p_from_sigma(sigma)) == pytest.approx(p, rel=1e-6)
    assert sigma_from_log_p(math.log(p)) == pytest.approx(sigma, abs=1e-6)


def test_sigma_convention_is_one_sided():
    # scipy.stats.norm.isf: p = 1e-3 → 3.090232 one-sided (isf(p/2) = 3.290527 two-sided);
    # p = 1e-6 → 4.753424 one-sided (4.891638 two-sided).
    assert sigma_from_log_p(math.log(1e-3)) == pytest.approx(3.090232, abs=1e-6)
    assert sigma_from_log_p(math.log(1e-6)) == pytest.approx(4.753424, abs=1e-6)
    assert sigma_from_log_p(math.log(0.5)) == pytest.approx(0.0, abs=1e-15)
    assert sigma_from_log_p(0.0) == -math.inf
    with pytest.raises(ValueError):
        sigma_from_log_p(0.1)


def test_sigma_far_into_the_tail():
    # mpmath: log of the one-sided tail at 40σ, log(erfc(40/√2)/2) ≈ −804.6.
    mpmath.mp.dps = 40
    for sigma in (10.0, 20.0, 40.0, 56.0):
        exact = float(mpmath.log(mpmath.erfc(sigma / mpmath.sqrt(2)) / 2))
        assert log_p_from_sigma(sigma) == pytest.approx(exact, rel=1e-12)
        assert sigma_from_log_p(exact) == pytest.approx(sigma, abs=1e-6)
    assert log_p_from_sigma(40.0) == pytest.approx(-804.6, abs=0.01)
    grid = np.linspace(0.5, 40.0, 80)
    np.testing.assert_allclose(sigma_from_log_p(log_p_from_sigma(grid)), grid, rtol=0, atol=1e-6)


def test_trials_examples():
    # independent trials, p_post = 1 − (1 − p)^n, evaluated as -expm1(n·log1p(−p)) with numpy
    # (p = 1e-4, n = 100; p = 1e-8, n = 1e6; p = e^{-6} from H = 15, n = 10)
    assert math.exp(trials_log_p(math.log(1e-4), 100)) == pytest.approx(
        9.950661308629e-3, rel=1e-11)
    assert math.exp(trials_log_p(math.log(1e-8), 1e6)) == pytest.approx(9.950166300e-3, rel=1e-9)
    assert math.exp(trials_log_p(h_log_p(15.0), 10)) == pytest.approx(2.4512851904e-2, rel=1e-10)
    # Bonferroni n·p is an upper bound (common practice)
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
