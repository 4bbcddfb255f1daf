"""The core pipeline: accounting, split invariance, statistics against direct numpy, and
the clock-chain faults of a simulated night diagnosed through the whole chain."""

import numpy as np
import pytest

from turnstamp.core.batch import EventBatch
from turnstamp.core.flags import Quality
from turnstamp.core.pipeline import Pipeline, PipelineSettings
from turnstamp.core.significance import sigma_from_log_p, trials_log_p
from turnstamp.core.simulate import Fault, NightPlan, simulate_night
from turnstamp.core.timebase import NS_PER_S, Scale, from_tt


def make_pipeline(env, *targets, **settings):
    return Pipeline(PipelineSettings(leaps=env.leaps, **settings), list(targets))


def night(env, target, start, seconds=600.0, fault="none", pulsed=60.0, background=600.0,
          batch_seconds=2.0, seed=7):
    plan = NightPlan(start_tt_ns=start, duration_s=seconds, pulsed_rate_hz=pulsed,
                     background_rate_hz=background, template=target.template,
                     fault=Fault(kind=fault), batch_seconds=batch_seconds, seed=seed)
    return list(simulate_night(plan, target.tagger, target.position, env.leaps))


def test_every_event_is_tagged_filtered_or_rejected_with_a_reason(demo_env, lantern,
                                                                  night_start_tt):
    pipeline = make_pipeline(demo_env, lantern)
    utc, _ = from_tt(night_start_tt + np.arange(8) * NS_PER_S, Scale.UTC, demo_env.leaps)
    utc[1] = np.iinfo(np.int64).min  # missing time
    utc[7] = night_start_tt + 400 * 24 * 3600 * NS_PER_S  # far beyond the table
    batch = EventBatch(
        source="test", sequence=0, time_scale=Scale.UTC,
        event_id=np.array([1, 2, 3, 4, 5, 5, 7, 8], np.uint64), time_ns=utc,
        energy_kev=np.array([1e9, 1e9, np.nan, 1e9, 1e9, 1e9, 1e9, 1e9]),
        ra_deg=np.array([123.45, 123.45, 123.45, 140.0, 123.45, 123.45, 123.45, 123.45]),
        dec_deg=np.full(8, 23.45), weight=np.array([1, 1, 1, 1, -1, 1, 1, 1.0]))
    result = pipeline.feed(batch)
    assert result.events == 8
    assert result.tagged + result.filtered + result.rejected == 8
    reasons = dict(zip(result.rejected_index.tolist(), result.rejected_reason, strict=True))
    assert reasons == {1: "bad_time", 2: "bad_value", 4: "bad_value",
                       5: "duplicate_event_id", 7: "outside_table_coverage"}
    assert result.filtered == 1  # row 3 lies 16 degrees away, outside the region
    assert sorted(result.archive["lantern"]["event_id"].tolist()) == [1, 7]
    assert pipeline.counters.reconciles()


def test_unchecked_or_all_refused_directions_are_carried_without_error(
        demo_env, lantern, night_start_tt):
    # directions nobody asked to check (a non-finite one falls outside every region),
    # and a batch whose every event is refused before the region cut
    pipeline = make_pipeline(demo_env, lantern, checked_columns=frozenset())
    utc, _ = from_tt(night_start_tt + np.arange(3) * NS_PER_S, Scale.UTC, demo_env.leaps)
    batch = EventBatch(source="test", sequence=0, time_scale=Scale.UTC,
                       event_id=np.arange(3, dtype=np.uint64), time_ns=utc,
                       ra_deg=np.array([np.nan, 123.45, np.inf]), dec_deg=np.full(3, 23.45))
    result = pipeline.feed(batch)
    assert (result.tagged, result.filtered, result.rejected) == (1, 2, 0)
    refused = EventBatch(source="test", sequence=1, time_scale=Scale.UTC,
                         event_id=np.arange(2, dtype=np.uint64),
                         time_ns=np.full(2, np.iinfo(np.int64).min),
                         ra_deg=np.full(2, 123.45), dec_deg=np.full(2, 23.45))
    assert pipeline.feed(refused).rejected == 2
    assert pipeline.counters.reconciles()


def test_feeding_whole_or_split_gives_identical_outputs(demo_env, lantern, night_start_tt, rng):
    batches = night(demo_env, lantern, night_start_tt, seconds=120, batch_seconds=10)
    merged = EventBatch(source="test", sequence=0, time_scale=batches[0].time_scale,
                        **{name: np.concatenate([b.columns()[name] for b in batches])
                           for name in batches[0].columns()})
    whole = make_pipeline(demo_env, lantern)
    archive_whole = whole.feed(merged).archive["lantern"]
    import copy

    split = make_pipeline(demo_env, copy.deepcopy(lantern))
    cuts = np.sort(rng.choice(np.arange(1, len(merged)), 7, replace=False))
    pieces = [split.feed(merged.take(part)).archive["lantern"]
              for part in np.split(np.arange(len(merged)), cuts)]
    for name in ("event_id", "phase", "pulse_number", "barycentric_tdb_ns", "recipe_flags"):
        np.testing.assert_array_equal(archive_whole[name],
                                      np.concatenate([p[name] for p in pieces]))
    # the statistics are float sums over the same events in other groupings: equal to
    # rounding (the moments' own split tests hold them to 1e-9 of the weight sum)
    for a, b in zip(whole.significance(), split.significance(), strict=True):
        assert a.keys() == b.keys()
        for key, value in a.items():
            if isinstance(value, str):
                assert b[key] == value
            else:
                assert b[key] == pytest.approx(value, rel=1e-9), key


def test_batches_fed_joined_give_each_the_result_of_its_own_feed(demo_env, lantern,
                                                                 night_start_tt):
    import copy

    batches = night(demo_env, lantern, night_start_tt, seconds=60, batch_seconds=10)
    batches[1].time_ns[:3] = np.iinfo(np.int64).min  # refused: bad time
    batches[2].event_id[1] = batches[2].event_id[0]  # repeated within its own batch
    batches[3].event_id[:] = np.arange(len(batches[3]))  # ids another batch has too: fine
    batches[2].event_id[2:] = np.arange(2, len(batches[2]))
    batches[3].time_ns[-1] = night_start_tt + 400 * 24 * 3600 * NS_PER_S  # beyond the table
    batches[4].ra_deg[:] = batches[4].ra_deg + 40.0  # all outside the region: none tagged
    joined_pipeline = make_pipeline(demo_env, lantern)
    whole, parts = joined_pipeline.feed_joined(batches)
    alone = make_pipeline(demo_env, copy.deepcopy(lantern))
    for batch, part in zip(batches, parts, strict=True):
        single = alone.feed(batch)
        assert part.archive.keys() == single.archive.keys()
        for name, columns in single.archive.items():
            assert part.archive[name].keys() == columns.keys()
            for column, values in columns.items():
                np.testing.assert_array_equal(part.archive[name][column], values, column)
        np.testing.assert_array_equal(part.rejected_index, single.rejected_index)
        assert (part.rejected_reason, part.rejected_detail) == \
            (single.rejected_reason, single.rejected_detail)
        assert (part.events, part.tagged, part.filtered, part.first_tt_ns, part.last_tt_ns) == \
            (single.events, single.tagged, single.filtered, single.first_tt_ns,
             single.last_tt_ns)
    assert "lantern" not in parts[4].archive and parts[4].filtered == len(batches[4])
    assert [p.rejected for p in parts][:4] == [0, 3, 1, 1]
    assert whole.events == sum(len(b) for b in batches)
    assert (whole.tagged, whole.rejected) == (sum(p.tagged for p in parts),
                                              sum(p.rejected for p in parts))
    assert joined_pipeline.counters.to_state() == alone.counters.to_state()
    for a, b in zip(joined_pipeline.significance(), alone.significance(), strict=True):
        for key, value in a.items():
            assert b[key] == (value if isinstance(value, str) else pytest.approx(value, rel=1e-9))


def test_statistics_equal_a_direct_computation_on_the_archive(demo_env, lantern, night_start_tt):
    pipeline = make_pipeline(demo_env, lantern)
    archive = [pipeline.feed(b).archive["lantern"]
               for b in night(demo_env, lantern, night_start_tt, seconds=120)]
    phase = np.concatenate([a["phase"] for a in archive])
    flags = np.concatenate([a["recipe_flags"] for a in archive])
    weight = np.concatenate([a["weight"] for a in archive]).astype(float)
    for bit, recipe in enumerate(lantern.recipes):
        chosen = (flags >> bit) & 1 == 1
        w = weight[chosen] if recipe.use_weights else np.ones(chosen.sum())
        k = np.arange(1, 21)[:, None]
        c = (np.cos(2 * np.pi * k * phase[chosen]) * w).sum(axis=1)
        s = (np.sin(2 * np.pi * k * phase[chosen]) * w).sum(axis=1)
        # Z^2_m, weighted normalisation (Kerr 2011); H = max(Z^2_m - 4m + 4) (de Jager 1989)
        z2 = 2 / (w @ w) * np.cumsum(c**2 + s**2)
        h = np.max(z2 - 4 * np.arange(1, 21) + 4)
        row = next(r for r in pipeline.significance()
                   if r["recipe"] == recipe.name and r["window"] == "cumulative")
        assert row["events"] == chosen.sum()
        assert row["h_statistic"] == pytest.approx(h, rel=1e-9)
        assert row["z2_statistic"] == pytest.approx(z2[1], rel=1e-9)


def test_checkpoint_state_round_trip_and_phase_reference_guard(demo_env, lantern,
                                                               night_start_tt):
    pipeline = make_pipeline(demo_env, lantern)
    for batch in night(demo_env, lantern, night_start_tt, seconds=60):
        pipeline.feed(batch)
    import json

    state = json.loads(json.dumps(pipeline.to_state()))
    resumed = make_pipeline(demo_env, lantern)
    assert resumed.restore(state) == []
    assert resumed.significance() == pipeline.significance()
    state["targets"]["lantern"]["phase_reference"] = "another"
    notes = make_pipeline(demo_env, lantern).restore(state)
    assert "phase reference changed" in notes[0]


def test_events_outside_model_validity_are_flagged_and_kept_out_of_statistics(
        demo_env, lantern, night_start_tt):
    from decimal import Decimal

    from turnstamp.core.phase import PhaseCalculator
    from turnstamp.core.tagger import TargetTagger

    model = lantern.tagger.calculators[0].model
    short = model.model_copy(update={"validity": model.validity.model_copy(update={
        "end_mjd_tdb": Decimal("61376.0")})})  # ends before the simulated night
    lantern.tagger = TargetTagger("lantern", [PhaseCalculator(short)], lantern.tagger.table)
    pipeline = make_pipeline(demo_env, lantern)
    archive = pipeline.feed(night(demo_env, lantern, night_start_tt, seconds=10)[0])
    flags = archive.archive["lantern"]["quality_flags"]
    assert np.all(flags & Quality.OUTSIDE_MODEL_VALIDITY)
    assert pipeline.significance()[0]["events"] == 0


@pytest.mark.slow
@pytest.mark.parametrize("fault, kind, status", [
    ("none", "none", "OK"),
    ("offset", "offset", "FAIL"),          # 200 µs
    ("step", "step", "FAIL"),              # 1 s at mid-night
    ("scale", "offset", "FAIL"),           # TAI given as UTC: 37 s
    ("barycentre_sign", "barycentre_sign", "FAIL"),
    ("drift", "drift", None),              # 50 µs/h over 40 min: inside tolerance
    ("wobble", "wobble", "FAIL"),          # 1 ms, 4-minute period
])
def test_each_injected_clock_fault_is_diagnosed_through_the_whole_chain(
        demo_env, lantern, night_start_tt, fault, kind, status):
    # Issue acceptance: each injected fault is diagnosed with the right kind on a
    # simulated bright millisecond pulsar, and a clean night passes.
    pipeline = make_pipeline(demo_env, lantern, clock_chunk_ns=60 * NS_PER_S)
    for batch in night(demo_env, lantern, night_start_tt, seconds=2400, fault=fault,
                       pulsed=120, background=400, batch_seconds=20, seed=11):
        pipeline.feed(batch)
    (_, _, verdict, chunks), = pipeline.clock_check()
    assert verdict.kind == kind, "\n".join(verdict.lines)
    if status:
        assert verdict.status == status, "\n".join(verdict.lines)
    if fault == "scale":
        assert any(abs(e.delta_t_s - 37) < 1e-9 for e in verdict.explanations), \
            "\n".join(verdict.lines)
    if fault == "step":
        assert any(abs(e.delta_t_s - 1) < 1e-9 for e in verdict.explanations)
    assert pipeline.counters.reconciles()


def test_trials_and_post_trials_significance(demo_env, lantern, night_start_tt):
    pipeline = make_pipeline(demo_env, lantern)
    for batch in night(demo_env, lantern, night_start_tt, seconds=60):
        pipeline.feed(batch)
    row = next(r for r in pipeline.significance() if r["window"] == "cumulative")
    assert row["trials"] == 2
    expected = sigma_from_log_p(trials_log_p(row["h_log10_p"] * np.log(10), 2))
    assert row["h_sigma_post_trials"] == pytest.approx(expected)
    assert row["h_sigma_post_trials"] < row["h_sigma"]


def test_stacking_nights_equals_one_pass_and_refuses_other_phase_references(
        demo_env, lantern, night_start_tt):
    import copy
    import json

    from turnstamp.core.stacking import stack_states
    from turnstamp.errors import InputError

    first = make_pipeline(demo_env, lantern)
    second = make_pipeline(demo_env, copy.deepcopy(lantern))
    both = make_pipeline(demo_env, copy.deepcopy(lantern))
    nights = [night(demo_env, lantern, night_start_tt, seconds=40, seed=s) for s in (1, 2)]
    day = 3 * 3600 * NS_PER_S  # the second "night" three hours later (inside the table)
    for batch in nights[0]:
        first.feed(batch)
        both.feed(batch)
    for batch in nights[1]:
        shifted = batch.take(slice(None))
        object.__setattr__(shifted, "time_ns", batch.time_ns + day)
        second.feed(shifted)
        both.feed(shifted)
    states = [json.loads(json.dumps(p.to_state())) for p in (first, second)]
    stacked = make_pipeline(demo_env, copy.deepcopy(lantern))
    assert stacked.restore(stack_states(states)) == []
    one = {(r["recipe"], r["window"]): r for r in both.significance()}
    for row in stacked.significance():
        if row["window"] == "cumulative":
            reference = one[(row["recipe"], "cumulative")]
            assert row["events"] == reference["events"]
            assert row["h_statistic"] == pytest.approx(reference["h_statistic"], rel=1e-9)
    states[1]["targets"]["lantern"]["phase_reference"] = "0123456789abcdef0123"
    with pytest.raises(InputError, match="phase_reference.*cannot be added"):
        stack_states(states, ["night 1", "night 2"])
