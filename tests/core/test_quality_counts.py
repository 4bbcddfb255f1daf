"""Events tagged with a quality problem are counted per target and reason (issue 10, item 2),
and a frequency stated with too few digits is warned about (item 4)."""

from decimal import Decimal

import numpy as np
import pytest

from turnstamp.core.accounting import QualityCounts
from turnstamp.core.flags import Quality
from turnstamp.core.pipeline import Pipeline, PipelineSettings
from turnstamp.core.simulate import NightPlan, simulate_night
from turnstamp.core.spin import SpinModel, digit_warnings, stated_half_unit


def expired_lantern(tmp_path, lantern_table, start="60000", end="60500"):
    """The invented pulsar with a model whose validity window ended before the night."""
    from turnstamp.assemble import build_target
    from turnstamp.config import TargetConfig
    from turnstamp.demo import data_file

    text = open(data_file("lantern.toml")).read()
    text = text.replace('start_mjd_tdb = "61000"', f'start_mjd_tdb = "{start}"')
    text = text.replace('end_mjd_tdb = "62000"', f'end_mjd_tdb = "{end}"')
    model = tmp_path / "expired.toml"
    model.write_text(text)
    setup = build_target(TargetConfig(name="lantern", models=[model],
                                      template=data_file("lantern-template.toml")))
    setup.tagger.table = lantern_table
    return setup


def test_events_outside_validity_are_counted_and_left_out_of_the_statistics(
        tmp_path, demo_env, lantern, lantern_table, night_start_tt):
    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=60, pulsed_rate_hz=50,
                     background_rate_hz=500, template=lantern.template, batch_seconds=10)
    batches = list(simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps))
    target = expired_lantern(tmp_path, lantern_table)
    pipeline = Pipeline(PipelineSettings(leaps=demo_env.leaps), [target])
    tagged = sum(pipeline.feed(batch).tagged for batch in batches)
    assert tagged == sum(len(b) for b in batches) > 0  # tagged, with the flag
    assert pipeline.quality.excluded("lantern") == tagged
    assert pipeline.quality.of("lantern")["OUTSIDE_MODEL_VALIDITY"] == tagged
    assert pipeline.moments["lantern"][0].total().count == 0  # not in the statistics
    assert pipeline.quality.lines("lantern")[0].startswith(
        f"{tagged:,} events of lantern tagged outside the spin model's validity window")
    # the clock check says why it sees nothing, first
    (_, _, verdict, _), = pipeline.clock_check()
    assert verdict.lines[0] == (f"{tagged:,} events of lantern fell outside its spin model's "
                                "validity window: not in this check.")
    # a checkpoint keeps the counts; a pipeline state without them starts at zero
    restored = Pipeline(PipelineSettings(leaps=demo_env.leaps), [target])
    restored.restore(pipeline.to_state())
    assert restored.quality.excluded("lantern") == tagged
    old = pipeline.to_state()
    del old["quality"]
    restored.restore(old)
    assert restored.quality.excluded("lantern") == 0


def test_replaying_archive_rows_counts_them_again(demo_env, lantern):
    pipeline = Pipeline(PipelineSettings(leaps=demo_env.leaps), [lantern])
    quality = np.array([0, Quality.OUTSIDE_MODEL_VALIDITY,
                        Quality.OUTSIDE_MODEL_VALIDITY | Quality.EARTH_ORIENTATION_PREDICTED],
                       np.uint32)
    pipeline.accumulate("lantern", np.array([1, 2, 3], np.int64) * 10**9,
                        np.array([0.1, 0.2, 0.3]), np.ones(3), np.ones(3, np.uint32), quality,
                        np.zeros(3))
    assert pipeline.quality.of("lantern") == {"OUTSIDE_MODEL_VALIDITY": 2,
                                              "EARTH_ORIENTATION_PREDICTED": 1}
    assert pipeline.moments["lantern"][0].total().count == 1


def test_quality_counts_add_and_round_trip():
    counts = QualityCounts()
    counts.add("a", np.array([0, 0], np.uint32))
    assert counts.of("a") == {} and counts.totals() == {}
    counts.add("a", np.array([Quality.LEAP_TABLE_EXPIRED] * 3, np.uint32))
    counts.add("b", np.array([Quality.LEAP_TABLE_EXPIRED], np.uint32))
    assert counts.totals() == {"LEAP_TABLE_EXPIRED": 4}
    assert QualityCounts.from_state(counts.to_state()) == counts
    assert QualityCounts.from_state(None) == QualityCounts()


def model(frequency="311.370158241234", derivatives=("-1.2345e-15",), days="100"):
    return SpinModel(model_id="digits", target={"name": "Test", "right_ascension_deg": 1.0,
                                                "declination_deg": 2.0},
                     reference_epoch_mjd_tdb="61375", frequency_hz=frequency,
                     frequency_derivatives=list(derivatives),
                     validity={"start_mjd_tdb": "61300",
                               "end_mjd_tdb": str(61300 + Decimal(days))})


def test_half_a_unit_in_the_last_stated_digit():
    assert stated_half_unit(Decimal("87.65")) == Decimal("0.005")
    assert stated_half_unit(Decimal("-1.9037e-12")) == Decimal("5e-17")
    assert stated_half_unit(Decimal("-1.903700e-12")) == Decimal("5e-19")
    assert stated_half_unit(Decimal("100")) == Decimal("0.5")


def test_a_frequency_with_too_few_digits_is_warned_about():
    warnings = digit_warnings(model(frequency="87.65"))
    # 0.005 Hz over 100 days (8.64e6 s) = 43 200 cycles of phase
    assert len(warnings) == 1
    assert "frequency_hz = 87.65" in warnings[0] and "4.32e+04 cycles" in warnings[0]
    assert "100-day validity window" in warnings[0]
    assert digit_warnings(model()) == []  # 5e-13 Hz x 8.64e6 s = 4e-6 cycles


@pytest.mark.parametrize("derivative, warns", [("-1.2e-14", True), ("-1.2345e-14", False)])
def test_a_derivative_is_held_to_half_ulp_times_t_squared_over_two(derivative, warns):
    # half-ulp 5e-16 Hz/s x (8.64e6 s)^2 / 2 = 0.0187 cycles > 0.01: warned;
    # 5e-19 Hz/s gives 1.9e-5 cycles: not
    warnings = digit_warnings(model(derivatives=(derivative,)))
    assert bool(warnings) is warns
    if warns:
        assert "frequency_derivatives[0]" in warnings[0] and "0.0187 cycles" in warnings[0]


def test_a_derivative_written_as_zero_is_absent_not_imprecise():
    assert digit_warnings(model(derivatives=("-1.2345e-15", "0"))) == []
