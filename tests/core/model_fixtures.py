"""A spin model in our schema for tests: an invented pulsar, fields overridable."""

from turnstamp.core.spin import SpinModel


def make_model(**fields) -> SpinModel:
    base = {
        "model_id": "test-model",
        "target": {"name": "test pulsar", "right_ascension_deg": 123.4, "declination_deg": 5.6},
        "reference_epoch_mjd_tdb": "60640.123456789012",
        "frequency_hz": "311.370158241234567",
        "validity": {"start_mjd_tdb": "49000", "end_mjd_tdb": "72000"},
    }
    base.update(fields)
    return SpinModel.model_validate(base)
