"""Binary-orbit parameter models: parsing, exact epochs, validation, constants."""

from __future__ import annotations

import json
from decimal import Decimal
from fractions import Fraction

import pytest
from orbit_fixtures import EPOCH, keplerian, relativistic
from pydantic import TypeAdapter, ValidationError

from turnstamp.core.orbit import (
    SOLAR_MASS_TIME_S,
    BinaryParameters,
    KeplerianOrbit,
    LowEccentricityOrbit,
    RelativisticOrbit,
)

PARAMETERS = TypeAdapter(BinaryParameters)


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
    # Our contract: parameter models are immutable; √(1 − e²(1+δ_θ)²) must be real
    # (Damour & Deruelle 1986).
    orbit = keplerian()
    with pytest.raises(ValidationError):
        orbit.eccentricity = 0.2
    with pytest.raises(ValidationError, match="angular_deformation"):
        relativistic(eccentricity=0.9, angular_deformation=0.2)
