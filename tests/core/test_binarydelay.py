"""Binary-orbit delays against worked examples, mpmath and the formulas' own identities.

Formulas: Blandford & Teukolsky 1976 (ApJ 205, 580) for the Keplerian kind, Lange et al.
2001 (MNRAS 326, 274) for the low-eccentricity kind, Damour & Deruelle 1985/1986 (AIHP 43,
107; 44, 263) for the relativistic kind, quoted from memory. Reference values are
evaluated independently from those formulas with mpmath (or scipy.optimize.brentq), and
each test names its source. Every orbit here is invented.
"""

from __future__ import annotations

import math
import subprocess
import sys
from decimal import Decimal

import mpmath
import numpy as np
from orbit_fixtures import DAY_S, EPOCH, damour_deruelle_oracle, keplerian, relativistic

from turnstamp.core.binarydelay import BinaryDelay, delay, delay_components
from turnstamp.core.orbit import (
    SOLAR_MASS_TIME_S,
    KeplerianOrbit,
    LowEccentricityOrbit,
    RelativisticOrbit,
)

# ------------------------------------------------------------------------------------
# Worked examples
# ------------------------------------------------------------------------------------


def test_keplerian_worked_example():
    # Blandford & Teukolsky (1976) delay of the invented orbit at t = 10000 s, evaluated
    # with mpmath (Kepler's equation by findroot; scipy.optimize.brentq agrees to 1e-16).
    parts = delay_components(keplerian(), 10000.0)
    assert abs(float(parts.eccentric_anomaly_rad) - 0.7988779087604044978720467) < 1e-15
    assert abs(float(parts.true_anomaly_rad) - 0.8732836575161979) < 1e-15
    assert abs(float(parts.roemer_s) - 1.832432257338100725) < 1e-12
    assert float(parts.einstein_s) == 0.0 and float(parts.shapiro_s) == 0.0
    assert abs(float(delay(keplerian(), 10000.0)) - 1.832432257338100725) < 1e-12


# ------------------------------------------------------------------------------------
# Low eccentricity (Lange et al. 2001)
# ------------------------------------------------------------------------------------


def test_low_eccentricity_against_keplerian():
    # Lange et al. (2001, MNRAS 326, 274; formulas from memory): expanding the Keplerian
    # delay to first order in e gives the low-eccentricity form plus the constant
    # −(3/2) x ε₁, which is dropped (our derivation). x = 10 s, e = 1e-4, ω = 60°,
    # P_b = 1 d: mean of (keplerian − low-ecc) = −1.5 x ε₁ = −1.299038e-3 s; the
    # residual about the mean is of order x e² (≤ 7.85e-8 s here).
    x, e, omega_deg = 10.0, 1e-4, 60.0
    omega = math.radians(omega_deg)
    periastron = KeplerianOrbit(
        orbital_period_days=1.0,
        projected_semi_major_axis_lt_s=x,
        eccentricity=e,
        periastron_longitude_deg=omega_deg,
        periastron_epoch_mjd_tdb="55000",
    )
    # T_asc = T₀ − ω P_b / (2π) = T₀ − 1/6 day (Lange et al. 2001).
    node = LowEccentricityOrbit(
        orbital_period_days=1.0,
        projected_semi_major_axis_lt_s=x,
        eccentricity_sine=e * math.sin(omega),
        eccentricity_cosine=e * math.cos(omega),
        ascending_node_epoch_mjd_tdb=Decimal("55000") - Decimal(1) / Decimal(6),
    )
    t = np.linspace(0.0, DAY_S, 4000, endpoint=False)  # absolute: seconds since T₀
    shift = float(periastron.epoch_tdb_seconds - node.epoch_tdb_seconds)
    assert abs(shift - DAY_S / 6) < 1e-9
    difference = delay(periastron, t) - delay(node, t + shift)
    eccentricity_sine = e * math.sin(omega)
    assert abs(difference.mean() - (-1.5 * x * eccentricity_sine)) < 1e-9
    assert abs(difference.mean() - (-1.299038e-3)) < 1e-9
    assert np.abs(difference - difference.mean()).max() <= x * e**2


def test_binary_shapiro_example():
    # Δ_S = −2r ln(1 − s sin Φ), r = T⊙ m₂ (Lange et al. 2001; T⊙ from IAU 2015
    # Resolution B3): m₂ = 0.2 M⊙, s = 0.99 → r = 9.850981895e-7 s, maximum at Φ = π/2 of
    # −2r ln(1 − s) = 9.073089625e-6 s.
    orbit = LowEccentricityOrbit(
        orbital_period_days=1.0,
        projected_semi_major_axis_lt_s=0.0,
        eccentricity_sine=0.0,
        eccentricity_cosine=0.0,
        companion_mass_msun=0.2,
        sin_inclination=0.99,
        ascending_node_epoch_mjd_tdb=EPOCH,
    )
    assert abs(0.2 * SOLAR_MASS_TIME_S - 9.850981895e-7) < 1e-16
    t = np.linspace(0.0, DAY_S, 20001)
    shapiro = delay(orbit, t)
    peak = np.argmax(shapiro)
    assert t[peak] == DAY_S / 4
    assert abs(shapiro[peak] - 9.073089625e-6) < 1e-15


# ------------------------------------------------------------------------------------
# Damour–Deruelle
# ------------------------------------------------------------------------------------


def test_damour_deruelle_anchor():
    # The invented orbit 41000 s after periastron against ``damour_deruelle_oracle``
    # (mpmath, 40 digits, from the formulas of Damour & Deruelle 1986). For the record it
    # gives u = 1.88599064204163, A_e = 2.13554606664856, Δ_R = −5.08200269535328 s,
    # Δ_E = 1.04580977479011e-3 s, Δ_S = −5.1496993721513e-6 s, r = 4.2851771244479e-6 s.
    orbit = relativistic()
    u, true_anomaly, roemer, einstein, shapiro, r = damour_deruelle_oracle(orbit, 41000.0)
    assert abs(u - 1.88599064204163) < 1e-13 and abs(roemer - (-5.08200269535328)) < 1e-12
    parts = delay_components(orbit, 41000.0)
    assert abs(float(parts.eccentric_anomaly_rad) - u) < 1e-14
    assert abs(float(parts.true_anomaly_rad) - true_anomaly) < 1e-14
    assert abs(float(parts.roemer_s) - roemer) < 1e-12
    assert abs(float(parts.einstein_s) - einstein) < 1e-12
    assert abs(float(parts.shapiro_s) - shapiro) < 1e-12
    assert abs(0.87 * SOLAR_MASS_TIME_S - r) < 1e-18
    assert abs(float(delay(orbit, 41000.0)) - (roemer + einstein + shapiro)) < 1e-12


def test_damour_deruelle_reduces_to_keplerian(rng):
    # With δ_r = δ_θ = k = 0 and m₂ = 0 the formulas of Damour & Deruelle (1986) are those
    # of Blandford & Teukolsky (1976): an identity of the two sets of formulas.
    common = dict(
        orbital_period_days=2.5,
        orbital_period_derivative=-3e-12,
        projected_semi_major_axis_lt_s=17.0,
        eccentricity=0.45,
        periastron_longitude_deg=250.0,
        einstein_delay_s=2e-3,
        periastron_epoch_mjd_tdb="56000.25",
    )
    t = rng.uniform(-3e8, 3e8, 5000)
    dd = delay(RelativisticOrbit(**common), t)
    bt = delay(KeplerianOrbit(**common), t)
    assert np.abs(dd - bt).max() < 1e-12


def test_damour_deruelle_periastron_advance(rng):
    # the definitions of Damour & Deruelle (1986) and Blandford & Teukolsky (1976): DD
    # advances ω by k A_e(u) with k = ω̇ P_b/(2π), so at
    # each periastron (A_e = 2πn) ω = ω₀ + ω̇ n P_b, the same as the linear ω of
    # Blandford–Teukolsky; and the accumulated A_e makes the delay continuous.
    common = dict(
        orbital_period_days=1.83,
        projected_semi_major_axis_lt_s=5.7,
        eccentricity=0.27,
        periastron_longitude_deg=10.0,
        periastron_advance_deg_per_yr=0.9,
        periastron_epoch_mjd_tdb=EPOCH,
    )
    dd, bt = RelativisticOrbit(**common), KeplerianOrbit(**common)
    orbits = np.array([-3000, -1, 0, 1, 17, 9131], dtype=float)
    t = orbits * 1.83 * DAY_S
    np.testing.assert_allclose(delay(dd, t), delay(bt, t), rtol=0, atol=1e-12)
    # ω(t) moved by ω̇ · 1000 P_b ≈ 4.5°: the delay at periastron shows it (≈ 0.32 s).
    assert abs(float(delay(dd, 1000 * 1.83 * DAY_S) - delay(dd, 0.0))) > 0.05
    # Continuity across a periastron passage (u wraps from −π.. to ..π at apastron and
    # A_e accumulates 2π per orbit): steps of 1 ms change the delay by < |dΔ/dt|·1 ms.
    for centre in (7.0, 7.5, -2.0):  # periastron, apastron, periastron before the epoch
        around = centre * 1.83 * DAY_S + np.arange(-5, 6) * 1e-3
        steps = np.abs(np.diff(delay(dd, around)))
        assert steps.max() < 2e-6  # |dΔ/dt| ≤ v/c ≈ 3e-4 here


def test_relativistic_deformations_enter_as_written():
    # Damour & Deruelle (1986): δ_r multiplies e in the cos ω term, δ_θ enters
    # √(1 − e²(1+δ_θ)²).
    base = relativistic(
        companion_mass_msun=0.0, einstein_delay_s=0.0, periastron_longitude_deg=37.0
    )
    deformed = relativistic(
        companion_mass_msun=0.0,
        einstein_delay_s=0.0,
        periastron_longitude_deg=37.0,
        radial_deformation=1e-3,
        angular_deformation=2e-3,
    )
    t = 3600.0
    u = float(delay_components(base, t).eccentric_anomaly_rad)
    x, e, w = 5.7, 0.27, math.radians(37.0)
    expected = x * math.sin(w) * (math.cos(u) - e * (1 + 1e-3)) + x * math.sqrt(
        1 - e**2 * (1 + 2e-3) ** 2
    ) * math.cos(w) * math.sin(u)
    assert abs(float(delay(deformed, t)) - expected) < 1e-13


# ------------------------------------------------------------------------------------
# Long spans, Ṗ_b and ω̇: against an independent 40-digit evaluation
# ------------------------------------------------------------------------------------


def test_keplerian_long_span_against_mpmath():
    # Blandford & Teukolsky (1976) formulas evaluated independently with mpmath at 40
    # digits (findroot for Kepler's equation), ten years from the epoch with Ṗ_b and ω̇,
    # for an invented orbit.
    mpmath.mp.dps = 40
    orbit = keplerian(
        orbital_period_days=2.61,
        orbital_period_derivative=-7.3e-13,
        projected_semi_major_axis_lt_s=8.05,
        eccentricity=0.38,
        periastron_advance_deg_per_yr=1.7,
        einstein_delay_s=6.0e-4,
    )
    times = [3.15e8 + 0.123, -1.7e8 + 9.5, 12345.678]
    got = delay(orbit, np.array(times))
    p = mpmath.mpf(2.61) * 86400
    e = mpmath.mpf(0.38)
    for t, value in zip(times, got, strict=True):
        tt = mpmath.mpf(t)
        mean = 2 * mpmath.pi * (tt / p - mpmath.mpf(-7.3e-13) / 2 * (tt / p) ** 2)
        mean -= 2 * mpmath.pi * mpmath.floor(mean / (2 * mpmath.pi))
        ecc_anomaly = mpmath.findroot(lambda x, m=mean: x - e * mpmath.sin(x) - m, mean)
        omega = (
            mpmath.radians(30) + mpmath.radians(mpmath.mpf(1.7)) / (mpmath.mpf(365.25) * 86400) * tt
        )
        x = mpmath.mpf(8.05)
        exact = x * mpmath.sin(omega) * (mpmath.cos(ecc_anomaly) - e) + (
            x * mpmath.cos(omega) * mpmath.sqrt(1 - e**2) + mpmath.mpf(6.0e-4)
        ) * mpmath.sin(ecc_anomaly)
        assert abs(value - float(exact)) < 1e-10, t


def test_scalar_and_compiled_forms_agree(rng):
    # Our API: a BinaryDelay built once gives the same numbers as the functions.
    orbit = relativistic(periastron_advance_deg_per_yr=0.9)
    compiled = BinaryDelay(orbit)
    t = rng.uniform(-1e6, 1e6, (3, 7))
    assert compiled(t).shape == (3, 7)
    np.testing.assert_array_equal(compiled.delay(t), delay(orbit, t))
    np.testing.assert_array_equal(delay(compiled, t), delay(orbit, t))
    assert np.ndim(delay(orbit, 12.5)) == 0
    assert float(delay(orbit, 12.5)) == delay(orbit, np.array([12.5]))[0]
    parts = delay_components(orbit, t)
    assert all(np.shape(p) == (3, 7) for p in parts)
    np.testing.assert_allclose(parts.total_s, delay(orbit, t), rtol=0, atol=1e-15)


def test_module_needs_no_messaging_or_columnar_libraries():
    # DEVELOPERS.md: the core imports neither zmq nor pyarrow.
    code = "import sys, turnstamp.core.orbit; sys.exit(bool({'zmq', 'pyarrow'} & set(sys.modules)))"
    assert subprocess.run([sys.executable, "-c", code]).returncode == 0
