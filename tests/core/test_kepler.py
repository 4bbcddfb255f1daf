"""Kepler's equation E − e sin E = M, against mpmath and its own identities."""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest

from turnstamp.core.kepler import solve_kepler


def test_kepler_solver_against_mpmath(rng):
    # Oracle: mpmath findroot at 50 digits (general-purpose library), e up to 0.95.
    mpmath.mp.dps = 50
    mean = rng.uniform(-10.0, 10.0, 200)
    ecc = rng.uniform(0.0, 0.95, 200)
    mean[:4] = [0.0, 1e-9, math.pi, -math.pi]
    ecc[:4] = 0.95
    for m, e in zip(mean, ecc, strict=True):
        got = float(solve_kepler(m, e))
        exact = mpmath.findroot(
            lambda x, m=m, e=e: x - mpmath.mpf(e) * mpmath.sin(x) - mpmath.mpf(m),
            mpmath.mpf(got),
        )
        assert abs(got - float(exact)) < 1e-13, (m, e)


@pytest.mark.parametrize("e", [0.0, 1e-6, 0.3, 0.9, 0.99])
def test_kepler_solver_residual_up_to_high_eccentricity(rng, e):
    # Kepler's equation itself: E − e sin E = M, vectorised, to rounding level. The
    # mean-anomaly grid includes periastron, where e = 0.99 is worst conditioned.
    mean = np.concatenate([rng.uniform(-np.pi, np.pi, 20000), np.linspace(-1e-3, 1e-3, 201)])
    ecc_anomaly = solve_kepler(mean, e)
    assert np.abs(ecc_anomaly - e * np.sin(ecc_anomaly) - mean).max() < 2e-15
    assert np.all(np.abs(ecc_anomaly) <= np.pi)


def test_kepler_solver_keeps_whole_turns_and_shape():
    # Kepler's equation is E ↦ M periodic: E(M + 2πn) = E(M) + 2πn (definition).
    mean = np.array([[0.5, 0.5 + 2 * np.pi], [0.5 - 4 * np.pi, 0.5 + 20 * np.pi]])
    ecc_anomaly = solve_kepler(mean, 0.5)
    assert ecc_anomaly.shape == (2, 2)
    turns = (mean - 0.5) / (2 * np.pi)
    np.testing.assert_allclose(ecc_anomaly - 2 * np.pi * turns, ecc_anomaly[0, 0], atol=1e-13)
    with pytest.raises(ValueError, match="eccentricity"):
        solve_kepler(0.5, 1.0)
