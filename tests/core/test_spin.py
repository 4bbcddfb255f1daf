"""Spin models in our schema: the spin-down summary against the handbook formulas, the
phase-reference fingerprint, and validation errors that name the field and value."""

import pytest
from model_fixtures import make_model

from turnstamp.core.spin import SpinModel, spin_down_summary
from turnstamp.errors import ModelError
from turnstamp.files.inputs import validate


def test_spin_down_summary_of_the_handbook_formulas():
    # Lorimer & Kramer 2005, Handbook of Pulsar Astronomy, ch. 3 (from memory):
    # Edot = 4 pi^2 I Pdot / P^3, tau_c = P / (2 Pdot), B_s = 3.2e19 sqrt(P Pdot) G with
    # I = 1e45 g cm^2 and the Julian year: an invented P = 0.1 s, Pdot = 1e-13 gives
    # Edot = 3.947841760e36 erg/s, tau_c = 15844.0439 yr, B_s = 3.2e12 G.
    model = make_model(frequency_hz="10", frequency_derivatives=["-1e-11", "3e-23"])
    summary = spin_down_summary(model)
    assert summary["period_s"] == pytest.approx(0.1)
    assert summary["period_derivative"] == pytest.approx(1e-13)
    assert summary["spin_down_power_erg_per_s"] == pytest.approx(3.947841760e36, rel=1e-9)
    assert summary["characteristic_age_yr"] == pytest.approx(15844.0439, rel=1e-8)
    assert summary["surface_dipole_field_gauss"] == pytest.approx(3.2e12, rel=1e-12)
    # braking index n = f fddot / fdot^2 (ibid.) = 10 · 3e-23 / 1e-22 = 3
    assert summary["braking_index"] == pytest.approx(3.0, rel=1e-12)


def test_phase_reference_key_ignores_bookkeeping_but_not_physics():
    a = make_model()
    assert a.phase_reference_key() == make_model(model_id="renamed", validity={
        "start_mjd_tdb": "1", "end_mjd_tdb": "2"}).phase_reference_key()
    assert a.phase_reference_key() != make_model(frequency_hz="311.370158241234568"
                                                 ).phase_reference_key()


@pytest.mark.parametrize("change, field, value", [
    ({"frequency_hz": "-3"}, "frequency_hz", "-3"),
    ({"frequency_hz": "NaN"}, "frequency_hz", "NaN"),
    ({"model_id": "has space"}, "model_id", "has space"),
    ({"validity": {"start_mjd_tdb": "60700", "end_mjd_tdb": "60600"}}, "validity", "60600"),
    ({"target": {"name": "x", "right_ascension_deg": 10, "declination_deg": 91}},
     "target.declination_deg", "91"),
    ({"spin_frequency": 3}, "spin_frequency", "3"),
    ({"binary": {"kind": "keplerian", "orbital_period_days": 1,
                 "projected_semi_major_axis_lt_s": 1, "eccentricity": 1.2,
                 "periastron_longitude_deg": 0, "periastron_epoch_mjd_tdb": "60000"}},
     "binary.keplerian.eccentricity", "1.2"),
])
def test_bad_models_name_the_field_and_the_value(change, field, value):
    data = make_model().model_dump(mode="json")
    data.update(change)
    with pytest.raises(ModelError) as info:
        validate(SpinModel, data, "test.toml")
    message = str(info.value)
    assert field in message and value in message and "test.toml" in message
