"""Emission time of pulses known by their arrival time, t_e + Δ(t_e) = t_a: worked
example, scipy's root finder, a property over random plausible orbits, and flags.

The orbits are invented; the Keplerian delay is that of Blandford & Teukolsky 1976
(ApJ 205, 580), the others as in ``test_binarydelay``.
"""

from __future__ import annotations

import math

import numpy as np
from hypothesis import given
from hypothesis import strategies as st
from orbit_fixtures import DAY_S, keplerian

from turnstamp.core.binarydelay import delay, emission_delay
from turnstamp.core.orbit import KeplerianOrbit, LowEccentricityOrbit, RelativisticOrbit


def test_keplerian_emission_time_example():
    # the root of t_e + Δ(t_e) = t_a for the invented Keplerian orbit (P_b = 1 d, x = 2 s,
    # e = 0.1, ω = 30°), by scipy.optimize.brentq (mpmath agrees): t_a = 10000 s →
    # t_e = 9998.167637307459 s, delay 1.83236269254121 s.
    d, converged = emission_delay(keplerian(), np.array([10000.0]))
    assert converged.all()
    assert abs(d[0] - 1.83236269254121) < 1e-11
    assert abs((10000.0 - d[0]) - 9998.167637307459) < 1e-11
    # the emission delay differs from Δ_R(t_a) by 7.0e-5 s (same computation).
    assert abs(float(delay(keplerian(), 10000.0)) - d[0] - 7.0e-5) < 0.05e-5


def test_emission_delay_matches_brentq_root():
    # scipy.optimize.brentq on t + Δ(t) = t_a: the same root.
    from scipy.optimize import brentq

    orbit = keplerian(eccentricity=0.7, projected_semi_major_axis_lt_s=40.0)
    arrivals = np.array([-5.0e5, 123.0, 3.3e4, 7.7e5])
    d, converged = emission_delay(orbit, arrivals)
    assert converged.all()
    for t_a, d_i in zip(arrivals, d, strict=True):
        root = brentq(
            lambda t, t_a=t_a: t + float(delay(orbit, t)) - t_a,
            t_a - 50,
            t_a + 50,
            xtol=1e-13,
            rtol=1e-15,
        )
        assert abs((t_a - d_i) - root) < 1e-9  # 1 ns (common practice for timing)


# ------------------------------------------------------------------------------------
# Emission time: property test
# ------------------------------------------------------------------------------------


@st.composite
def orbits(draw):
    """Physically plausible orbits: orbital speed v/c ≤ 3e-3 (common practice bound)."""
    kind = draw(st.sampled_from(["keplerian", "low_eccentricity", "relativistic"]))
    period_days = draw(st.floats(0.05, 1000.0))
    e = draw(st.floats(0.0, 0.1 if kind == "low_eccentricity" else 0.9))
    # Largest orbital speed ≈ 2π x (1 + e) / (P_b √(1 − e²)); keep it ≤ 3e-3 c.
    x_max = 3e-3 * period_days * DAY_S / (2 * math.pi) * math.sqrt(1 - e * e) / (1 + e)
    x = draw(st.floats(0.0, 1.0)) * min(x_max, 500.0)
    omega = draw(st.floats(0.0, 360.0))
    period_derivative = draw(st.floats(-1e-11, 1e-11))
    epoch = draw(st.decimals("50000", "60000", places=9))
    mass = draw(st.floats(0.0, 1.5))
    sin_i = draw(st.floats(0.0, 0.999))
    if kind == "low_eccentricity":
        return LowEccentricityOrbit(
            orbital_period_days=period_days,
            orbital_period_derivative=period_derivative,
            projected_semi_major_axis_lt_s=x,
            ascending_node_epoch_mjd_tdb=epoch,
            eccentricity_sine=e * math.sin(math.radians(omega)),
            eccentricity_cosine=e * math.cos(math.radians(omega)),
            companion_mass_msun=mass,
            sin_inclination=sin_i,
        )
    fields = dict(
        orbital_period_days=period_days,
        orbital_period_derivative=period_derivative,
        projected_semi_major_axis_lt_s=x,
        eccentricity=e,
        periastron_longitude_deg=omega,
        periastron_advance_deg_per_yr=draw(st.floats(0.0, 10.0)),
        periastron_epoch_mjd_tdb=epoch,
        einstein_delay_s=draw(st.floats(0.0, 5e-3)),
    )
    if kind == "keplerian":
        return KeplerianOrbit(**fields)
    return RelativisticOrbit(
        **fields,
        companion_mass_msun=mass,
        sin_inclination=sin_i,
        radial_deformation=draw(st.floats(-1e-5, 1e-5)),
        angular_deformation=draw(st.floats(-1e-5, 1e-5)),
    )


@given(orbit=orbits(), times=st.lists(st.floats(-1e6, 1e6), min_size=1, max_size=40))
def test_emission_delay_solves_the_light_time_equation(orbit, times):
    # Definition of the emission time: t_e + Δ(t_e) = t_a; checked
    # as d = Δ(t_a − d), which avoids rounding t_e + Δ at large t. |t| ≤ 1e6 s keeps
    # the rounding of t_a − d (≤ 6e-11 s, times dΔ/dt ≤ 3e-3) well below 1e-12 s.
    t_a = np.array(times)
    d, converged = emission_delay(orbit, t_a)
    assert converged.all()
    residual = d - delay(orbit, t_a - d)
    assert np.abs(residual).max() < 1e-12


def test_emission_delay_flags_what_does_not_converge():
    # Our contract: an element that has not settled in 12 steps is flagged, not raised.
    # Here v/c ≈ 0.4, so the fixed point contracts by ~0.4 per step (far too slowly).
    fast = keplerian(
        orbital_period_days=0.01, projected_semi_major_axis_lt_s=60.0, eccentricity=0.0
    )
    t_a = np.array([[0.0, 100.0], [np.nan, np.inf]])
    d, converged = emission_delay(fast, t_a)
    assert d.shape == converged.shape == (2, 2)
    assert not converged.any()
    assert np.isfinite(d[0]).all() and np.isnan(d[1]).all()
    # A slow orbit converges everywhere except at the non-finite times.
    d, converged = emission_delay(keplerian(), np.array([0.0, np.nan, 5.0]))
    assert converged.tolist() == [True, False, True]
