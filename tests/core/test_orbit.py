"""Binary-orbit delays against worked examples, mpmath and the formulas' own identities.

Reference values come from /work/shared/REFERENCES.md §5 (binary orbits), which cites
the papers and says where the formulas are quoted from memory; each test names its source.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from decimal import Decimal
from fractions import Fraction

import mpmath
import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from pydantic import TypeAdapter, ValidationError

from turnstamp.core.orbit import (
    SOLAR_MASS_TIME_S,
    BinaryDelay,
    BinaryParameters,
    KeplerianOrbit,
    LowEccentricityOrbit,
    RelativisticOrbit,
    delay,
    delay_components,
    emission_delay,
    solve_kepler,
)

DAY_S = 86400.0
EPOCH = "51544.5"  # MJD of 2000-01-01T12:00:00 TDB: the epoch is then t = 0
PARAMETERS = TypeAdapter(BinaryParameters)


def keplerian(**fields) -> KeplerianOrbit:
    base = dict(
        orbital_period_days=1.0,
        projected_semi_major_axis_lt_s=2.0,
        eccentricity=0.1,
        periastron_longitude_deg=30.0,
        periastron_epoch_mjd_tdb=EPOCH,
    )
    return KeplerianOrbit(**{**base, **fields})


def relativistic(**fields) -> RelativisticOrbit:
    base = dict(
        orbital_period_days=0.3,
        projected_semi_major_axis_lt_s=2.3,
        eccentricity=0.6,
        periastron_longitude_deg=90.0,
        einstein_delay_s=4e-3,
        companion_mass_msun=1.4,
        sin_inclination=0.7,
        periastron_epoch_mjd_tdb=EPOCH,
    )
    return RelativisticOrbit(**{**base, **fields})


# ------------------------------------------------------------------------------------
# Worked examples
# ------------------------------------------------------------------------------------


def test_keplerian_worked_example():
    # REFERENCES.md §5.1 worked example [calc; scipy brentq and mpmath agree to 1e-16];
    # formulas of Blandford & Teukolsky (1976) (from memory in REFERENCES.md).
    parts = delay_components(keplerian(), 10000.0)
    assert abs(float(parts.eccentric_anomaly_rad) - 0.7988779087604044978720467) < 1e-15
    assert abs(float(parts.true_anomaly_rad) - 0.8732836575161979) < 1e-15
    assert abs(float(parts.roemer_s) - 1.832432257338100725) < 1e-12
    assert float(parts.einstein_s) == 0.0 and float(parts.shapiro_s) == 0.0
    assert abs(float(delay(keplerian(), 10000.0)) - 1.832432257338100725) < 1e-12


def test_keplerian_emission_time_example():
    # REFERENCES.md §5.1 "Emission time" [calc; brentq gives the same root]:
    # t_a = 10000 s → t_e = 9998.167637307459 s, delay 1.83236269254121 s.
    d, converged = emission_delay(keplerian(), np.array([10000.0]))
    assert converged.all()
    assert abs(d[0] - 1.83236269254121) < 1e-11
    assert abs((10000.0 - d[0]) - 9998.167637307459) < 1e-11
    # ibid.: the emission delay differs from Δ_R(t_a) by 7.0e-5 s.
    assert abs(float(delay(keplerian(), 10000.0)) - d[0] - 7.0e-5) < 0.05e-5


def test_emission_delay_matches_brentq_root():
    # REFERENCES.md §5.1: "brentq gives the same root"; scipy.optimize.brentq here.
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
        assert abs((t_a - d_i) - root) < 1e-9  # 1 ns, the §5.3 tolerance


# ------------------------------------------------------------------------------------
# Kepler's equation
# ------------------------------------------------------------------------------------


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


# ------------------------------------------------------------------------------------
# Low eccentricity (Lange et al. 2001)
# ------------------------------------------------------------------------------------


def test_low_eccentricity_against_keplerian():
    # REFERENCES.md §5.2 check [calc] (formulas from memory, re-derived there):
    # x = 10 s, e = 1e-4, ω = 60°, P_b = 1 d; mean of (keplerian − low-ecc) = −1.5 x ε₁
    # = −1.299038e-3 s, residual about the mean ≤ 7.85e-8 s ≈ x e².
    x, e, omega_deg = 10.0, 1e-4, 60.0
    omega = math.radians(omega_deg)
    periastron = KeplerianOrbit(
        orbital_period_days=1.0,
        projected_semi_major_axis_lt_s=x,
        eccentricity=e,
        periastron_longitude_deg=omega_deg,
        periastron_epoch_mjd_tdb="55000",
    )
    # T_asc = T₀ − ω P_b / (2π) = T₀ − 1/6 day (§5.2).
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
    # REFERENCES.md §5.2 binary Shapiro example [calc]: m₂ = 0.2 M⊙, s = 0.99 →
    # r = 9.850981895e-7 s, maximum at Φ = π/2 of 9.073089625e-6 s.
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


def test_solar_mass_time_constant():
    # IAU 2015 Resolution B3: GM⊙ = 1.3271244e20 m³/s²; c = 299792458 m/s (SI).
    assert abs(SOLAR_MASS_TIME_S - 4.925490947e-6) < 1e-15


def test_low_eccentricity_refuses_large_eccentricity():
    # Lange et al. (2001): the expansion is first order in e; our limit is e ≤ 0.1.
    with pytest.raises(ValidationError) as info:
        LowEccentricityOrbit(
            orbital_period_days=1.0,
            projected_semi_major_axis_lt_s=1.0,
            eccentricity_sine=0.09,
            eccentricity_cosine=0.09,
            ascending_node_epoch_mjd_tdb=EPOCH,
        )
    text = str(info.value)
    assert "eccentricity_sine" in text and "0.09" in text and "keplerian" in text


# ------------------------------------------------------------------------------------
# Damour–Deruelle
# ------------------------------------------------------------------------------------


def test_damour_deruelle_anchor():
    # REFERENCES.md §5.3 anchor [calc, mpmath, δ_r = δ_θ = k = 0]; formulas of Damour &
    # Deruelle (1986) quoted from memory there.
    parts = delay_components(relativistic(), 3600.0)
    assert abs(float(parts.eccentric_anomaly_rad) - 1.4695947177438263003) < 1e-14
    assert abs(float(parts.true_anomaly_rad) - 2.130776176286696634) < 1e-14
    assert abs(float(parts.roemer_s) - (-1.1476334143168576525)) < 1e-12
    assert abs(float(parts.einstein_s) - 3.9795339449777434e-3) < 1e-12
    assert abs(float(parts.shapiro_s) - (-3.4975581726731671e-6)) < 1e-12
    assert abs(1.4 * SOLAR_MASS_TIME_S - 6.89568732669777e-6) < 1e-18
    total = -1.1476334143168576525 + 3.9795339449777434e-3 - 3.4975581726731671e-6
    assert abs(float(delay(relativistic(), 3600.0)) - total) < 1e-12


def test_damour_deruelle_reduces_to_keplerian(rng):
    # With δ_r = δ_θ = k = 0 and m₂ = 0 the formulas of §5.3 are those of §5.1
    # (REFERENCES.md; identity of the formulas).
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
    # §5.1 and §5.3 definitions: DD advances ω by k A_e(u) with k = ω̇ P_b/(2π), so at
    # each periastron (A_e = 2πn) ω = ω₀ + ω̇ n P_b, the same as the linear ω of
    # Blandford–Teukolsky; and the accumulated A_e makes the delay continuous.
    common = dict(
        orbital_period_days=0.4,
        projected_semi_major_axis_lt_s=3.0,
        eccentricity=0.6,
        periastron_longitude_deg=10.0,
        periastron_advance_deg_per_yr=4.0,
        periastron_epoch_mjd_tdb=EPOCH,
    )
    dd, bt = RelativisticOrbit(**common), KeplerianOrbit(**common)
    orbits = np.array([-3000, -1, 0, 1, 17, 9131], dtype=float)
    t = orbits * 0.4 * DAY_S
    np.testing.assert_allclose(delay(dd, t), delay(bt, t), rtol=0, atol=1e-12)
    # ω(t) moved by ω̇ · 1000 P_b ≈ 4.4°: the delay at periastron shows it.
    assert abs(float(delay(dd, 1000 * 0.4 * DAY_S) - delay(dd, 0.0))) > 0.05
    # Continuity across a periastron passage (u wraps from −π.. to ..π at apastron and
    # A_e accumulates 2π per orbit): steps of 1 ms change the delay by < |dΔ/dt|·1 ms.
    for centre in (7.0, 7.5, -2.0):  # periastron, apastron, periastron before the epoch
        around = centre * 0.4 * DAY_S + np.arange(-5, 6) * 1e-3
        steps = np.abs(np.diff(delay(dd, around)))
        assert steps.max() < 2e-6  # |dΔ/dt| ≤ v/c ≈ 1e-3 here


def test_relativistic_deformations_enter_as_written():
    # §5.3: δ_r multiplies e in the cos ω term, δ_θ enters √(1 − e²(1+δ_θ)²).
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
    x, e, w = 2.3, 0.6, math.radians(37.0)
    expected = x * math.sin(w) * (math.cos(u) - e * (1 + 1e-3)) + x * math.sqrt(
        1 - e**2 * (1 + 2e-3) ** 2
    ) * math.cos(w) * math.sin(u)
    assert abs(float(delay(deformed, t)) - expected) < 1e-13


# ------------------------------------------------------------------------------------
# Long spans, Ṗ_b and ω̇: against an independent 40-digit evaluation
# ------------------------------------------------------------------------------------


def test_keplerian_long_span_against_mpmath():
    # Formulas of REFERENCES.md §5.1 evaluated independently with mpmath at 40 digits
    # (findroot for Kepler's equation), ten years from the epoch with Ṗ_b and ω̇.
    mpmath.mp.dps = 40
    orbit = keplerian(
        orbital_period_days=0.37,
        orbital_period_derivative=-2.4e-12,
        projected_semi_major_axis_lt_s=2.4,
        eccentricity=0.62,
        periastron_advance_deg_per_yr=4.2,
        einstein_delay_s=4.3e-3,
    )
    times = [3.15e8 + 0.123, -1.7e8 + 9.5, 12345.678]
    got = delay(orbit, np.array(times))
    p = mpmath.mpf(0.37) * 86400
    e = mpmath.mpf(0.62)
    for t, value in zip(times, got, strict=True):
        tt = mpmath.mpf(t)
        mean = 2 * mpmath.pi * (tt / p - mpmath.mpf(-2.4e-12) / 2 * (tt / p) ** 2)
        mean -= 2 * mpmath.pi * mpmath.floor(mean / (2 * mpmath.pi))
        ecc_anomaly = mpmath.findroot(lambda x, m=mean: x - e * mpmath.sin(x) - m, mean)
        omega = (
            mpmath.radians(30) + mpmath.radians(mpmath.mpf(4.2)) / (mpmath.mpf(365.25) * 86400) * tt
        )
        x = mpmath.mpf(2.4)
        exact = x * mpmath.sin(omega) * (mpmath.cos(ecc_anomaly) - e) + (
            x * mpmath.cos(omega) * mpmath.sqrt(1 - e**2) + mpmath.mpf(4.3e-3)
        ) * mpmath.sin(ecc_anomaly)
        assert abs(value - float(exact)) < 1e-10, t


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
    # Definition of the emission time (REFERENCES.md §5.1): t_e + Δ(t_e) = t_a; checked
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


def test_scalar_and_compiled_forms_agree(rng):
    # Our API: a BinaryDelay built once gives the same numbers as the functions.
    orbit = relativistic(periastron_advance_deg_per_yr=4.0)
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


# ------------------------------------------------------------------------------------
# Parameter models
# ------------------------------------------------------------------------------------


def test_models_parse_decimal_json_and_give_exact_epochs():
    # Model files are read with json.loads(parse_float=Decimal) (our file convention).
    text = """{"kind": "low_eccentricity", "orbital_period_days": 1.533449474590,
               "projected_semi_major_axis_lt_s": 1.89799, "eccentricity_sine": 1.2e-5,
               "eccentricity_cosine": -3.1e-6, "companion_mass_msun": 0.25,
               "sin_inclination": 0.97,
               "ascending_node_epoch_mjd_tdb": 58000.123456789012345}"""
    orbit = PARAMETERS.validate_python(json.loads(text, parse_float=Decimal))
    assert isinstance(orbit, LowEccentricityOrbit)
    assert orbit.ascending_node_epoch_mjd_tdb == Decimal("58000.123456789012345")
    # Exact rational arithmetic (Python fractions) as the independent reference.
    exact = (Fraction("58000.123456789012345") - Fraction("51544.5")) * 86400
    assert Fraction(orbit.epoch_tdb_seconds) == exact
    kepler = PARAMETERS.validate_python(
        {
            "kind": "keplerian",
            "orbital_period_days": "2",
            "projected_semi_major_axis_lt_s": 3,
            "eccentricity": Decimal("0.5"),
            "periastron_longitude_deg": 0,
            "periastron_epoch_mjd_tdb": Decimal("51545.25"),
        }
    )
    assert isinstance(kepler, KeplerianOrbit) and kepler.epoch_tdb_seconds == Decimal(64800)
    assert isinstance(PARAMETERS.validate_python(relativistic().model_dump()), RelativisticOrbit)


@pytest.mark.parametrize(
    ("change", "field", "value"),
    [
        ({"eccentricity": 1.2}, "eccentricity", "1.2"),
        ({"orbital_period_days": -3.0}, "orbital_period_days", "-3.0"),
        ({"periastron_epoch_mjd_tdb": "NaN"}, "periastron_epoch_mjd_tdb", "NaN"),
        ({"periastron_epoch_mjd_tdb": Decimal("Infinity")}, "periastron_epoch_mjd_tdb", "Infinity"),
        ({"projected_semi_major_axis_lt_s": float("nan")}, "projected_semi_major_axis_lt_s", "nan"),
        ({"kind": "hyperbolic"}, "kind", "hyperbolic"),
        ({"orbital_period_seconds": 86400.0}, "orbital_period_seconds", "86400.0"),
        ({"sin_inclination": 1.5}, "sin_inclination", "1.5"),
    ],
)
def test_bad_parameters_name_the_field_and_value(change, field, value):
    # Our contract (DEVELOPERS.md): validation errors name the field and the value.
    data = {**relativistic().model_dump(), **change}
    with pytest.raises(ValidationError) as info:
        PARAMETERS.validate_python(data)
    text = str(info.value)
    assert field in text and value in text, text


def test_models_are_frozen_and_relativistic_deformation_bounded():
    # Our contract: parameter models are immutable; √(1 − e²(1+δ_θ)²) must be real (§5.3).
    orbit = keplerian()
    with pytest.raises(ValidationError):
        orbit.eccentricity = 0.2
    with pytest.raises(ValidationError, match="angular_deformation"):
        relativistic(eccentricity=0.9, angular_deformation=0.2)


def test_module_needs_no_messaging_or_columnar_libraries():
    # DEVELOPERS.md: the core imports neither zmq nor pyarrow.
    code = "import sys, turnstamp.core.orbit; sys.exit(bool({'zmq', 'pyarrow'} & set(sys.modules)))"
    assert subprocess.run([sys.executable, "-c", code]).returncode == 0
