"""Offline tagging (``turnstamp tag``): an events file in, the archive's phase columns out."""

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from turnstamp.commands.main import main
from turnstamp.core.simulate import NightPlan, simulate_night
from turnstamp.demo import data_file

MODEL = data_file("lantern.toml")


def write_events(path, batches, parquet=False, chunk=5000):
    columns = {name: np.concatenate([b.columns()[name] for b in batches])
               for name in ("event_id", "time_ns", "energy_kev", "weight")}
    table = pa.table(columns)
    write_table(path, table, parquet, chunk)
    return table


def write_table(path, table, parquet=False, chunk=5000):
    if parquet:
        pq.write_table(table, path, row_group_size=chunk)
    else:
        with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_file(sink, table.schema) as w:
            w.write_table(table, max_chunksize=chunk)


def tag(*args, site=None):
    return main(["tag", *map(str, args), "--model", MODEL, "--quiet",
                 *(["--site", str(site)] if site else [])])


@pytest.fixture
def events(demo_env, lantern, night_start_tt):
    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=120, pulsed_rate_hz=40,
                     background_rate_hz=200, template=lantern.template, seed=3)
    return list(simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps))


@pytest.mark.parametrize("parquet", [False, True])
def test_tag_a_file_and_read_the_archive(tmp_path, events, parquet, capsys, demo_site_file):
    source = tmp_path / ("events.parquet" if parquet else "events.arrow")
    table = write_events(source, events, parquet)
    out = tmp_path / "tagged.arrow"
    assert tag(source, "--time-scale", "UTC", "--out", out, "--target", "lantern",
               site=demo_site_file) == 0
    printed = capsys.readouterr().out
    assert f"{table.num_rows:,} events" in printed and "0 rejected" in printed
    archive = pa.ipc.open_file(str(out)).read_all()
    assert archive.num_rows == table.num_rows
    np.testing.assert_array_equal(archive["event_id"].to_numpy(), table["event_id"].to_numpy())
    phase = archive["phase"].to_numpy()
    assert np.all((phase >= 0) & (phase < 1))
    meta = archive.schema.metadata
    assert b"lantern-2026a" in meta[b"models"] and b"JPL kernel" in meta[b"ephemeris"]
    assert b"segment_ns" in meta[b"table"]  # the report reads the tables' accuracy here
    assert "sigma" in printed  # the file's H-test is reported
    # `sequence` numbers the batches as read: the file's own (Arrow), 2**20 rows (Parquet)
    batches = 1 if parquet else -(-table.num_rows // 5000)
    assert archive["sequence"].to_numpy().max() == batches - 1


def test_archive_columns_equal_the_kernel_bit_for_bit(tmp_path, demo_env, demo_site_file):
    # A file spanning a TT day boundary and a day three days later, read in batches of
    # several sizes and both formats: every archive column equals the kernel's result
    # for the same instants, computed directly (time base, one table per TT day, tagger).
    from turnstamp.assemble import TableCache
    from turnstamp.config import BarycentreConfig
    from turnstamp.core.correctiontable import TableSet
    from turnstamp.core.timebase import NS_PER_DAY, NS_PER_S, Scale, parse_instant, to_tt
    from turnstamp.files.inputs import load_spin_model
    from turnstamp.tagging.run import offline_target

    rng = np.random.default_rng(5)
    boundary = parse_instant("2026-12-02T11:58:50.816")  # about 12:00 TT
    times = np.sort(np.concatenate([
        boundary + rng.integers(-60 * NS_PER_S, 60 * NS_PER_S, 6000),
        boundary + 3 * NS_PER_DAY + rng.integers(0, 600 * NS_PER_S, 4000)]))
    table = pa.table({"event_id": np.arange(times.size, dtype=np.uint64), "time_ns": times})
    setup = offline_target([load_spin_model(MODEL)])
    tt, time_flags = to_tt(times, Scale.UTC, demo_env.leaps)
    cache = TableCache(None, demo_env, BarycentreConfig())
    setup.tagger.table = TableSet(cache.table(setup.position, day * NS_PER_DAY,
                                              (day + 1) * NS_PER_DAY)
                                  for day in np.unique(tt // NS_PER_DAY))
    expected = setup.tagger.tag(tt)
    assert len(setup.tagger.table.tables) == 3
    for name, chunk, parquet in [("a.arrow", 1000, False), ("b.arrow", 7777, False),
                                 ("c.parquet", 4096, True)]:
        write_table(tmp_path / name, table, parquet, chunk)
        out = tmp_path / f"tagged-{name}.arrow"
        assert tag(tmp_path / name, "--out", out, site=demo_site_file) == 0
        archive = pa.ipc.open_file(str(out)).read_all()
        np.testing.assert_array_equal(archive["site_tt_ns"].to_numpy(), tt)
        for column, kernel in [("phase", "phase"), ("pulse_number", "pulse_number"),
                               ("barycentric_tdb_ns", "barycentric_tdb_ns"),
                               ("barycentric_correction_s", "correction_s")]:
            np.testing.assert_array_equal(archive[column].to_numpy(),
                                          getattr(expected, kernel), err_msg=column)
        np.testing.assert_array_equal(archive["quality_flags"].to_numpy(),
                                      time_flags | expected.flags)


def test_archive_phase_agrees_with_the_astropy_route_to_its_accuracy(tmp_path, events,
                                                                     demo_env, demo_site_file):
    # astropy (Time with a location, .tdb + light_travel_time with the same kernel) is good
    # to ~2 µs here (see test_barycentre): at 311 Hz that is 6e-4 cycles. Its route has no
    # Shapiro delay and no parallax term, so ours are added to it (the delays as decomposed
    # by Backer & Hellings 1986, ARA&A 24, 537; from memory).
    from astropy.coordinates import EarthLocation, SkyCoord
    from astropy.time import Time

    from turnstamp.core.barycentre import BarycentreCalculator, SkyPosition
    from turnstamp.core.phase import PhaseCalculator
    from turnstamp.core.timebase import NS_PER_S, format_instant
    from turnstamp.files.bundled import default_kernel_path
    from turnstamp.files.inputs import load_spin_model

    source = tmp_path / "events.arrow"
    write_events(source, events)
    out = tmp_path / "tagged.arrow"
    assert tag(source, "--out", out, site=demo_site_file) == 0
    archive = pa.ipc.open_file(str(out)).read_all().slice(0, 30)
    site = demo_env.observer
    location = EarthLocation.from_geodetic(site.longitude_deg, site.latitude_deg, site.height_m)
    t = Time([format_instant(x) for x in archive["site_tt_ns"].to_numpy()], scale="tt",
             location=location, precision=9)
    model = load_spin_model(MODEL)
    sky = SkyCoord(model.target.right_ascension_deg, model.target.declination_deg, unit="deg")
    tdb = t.tdb + t.light_travel_time(sky, ephemeris=str(default_kernel_path()))
    terms = BarycentreCalculator(site, SkyPosition(**model.sky_position_args()),
                                 demo_env.ephemeris, demo_env.orientation).terms(
        archive["site_tt_ns"].to_numpy())
    seconds = ((tdb.jd1 - 2_451_545.0) + tdb.jd2) * 86_400 - terms["parallax"] - \
        terms["shapiro"]
    assert 1e-6 < np.max(np.abs(terms["shapiro"])) < 2e-5  # the part astropy leaves out
    whole = np.floor(seconds)
    _, theirs, _ = PhaseCalculator(model).phase((whole * NS_PER_S).astype(np.int64),
                                               seconds - whole)
    difference = (archive["phase"].to_numpy() - theirs + 0.5) % 1 - 0.5
    assert np.max(np.abs(difference)) < 1e-3


def test_bad_event_files_name_the_field_and_value(tmp_path, capsys, demo_site_file):
    missing = tmp_path / "missing.arrow"
    write_table(missing, pa.table({"event_id": np.arange(3, dtype=np.uint64), "t": np.arange(3)}))
    assert tag(missing, "--out", tmp_path / "x.arrow", site=demo_site_file) == 2
    assert "time_ns" in capsys.readouterr().err

    floats = tmp_path / "floats.parquet"
    pq.write_table(pa.table({"event_id": np.arange(3, dtype=np.uint64),
                             "time_ns": np.array([1.0, 2.0, 3.0])}), floats)
    assert tag(floats, "--out", tmp_path / "y.arrow", site=demo_site_file) == 2
    err = capsys.readouterr().err
    assert "time_ns" in err and "double" in err

    garbage = tmp_path / "garbage.arrow"
    garbage.write_bytes(b"not arrow at all")
    assert tag(garbage, "--out", tmp_path / "z.arrow", site=demo_site_file) == 2
    assert "garbage.arrow" in capsys.readouterr().err
    assert not list(tmp_path.glob("*.arrow.*")) and not (tmp_path / "z.arrow").exists()


def test_bad_rows_go_to_the_rejects_file(tmp_path, events, demo_site_file, capsys):
    source = tmp_path / "events.arrow"
    table = write_events(source, events[:2])
    times = table["time_ns"].to_numpy().copy()
    times[3] = 0  # 2000-01-01: years from the rest, tagged with a table of its own day
    times[4] = 200 * 365 * 86_400 * 10**9  # 2200: beyond the plausible range
    ids = table["event_id"].to_numpy().copy()
    ids[5] = ids[6]
    table = table.set_column(1, "time_ns", pa.array(times)).set_column(0, "event_id",
                                                                       pa.array(ids))
    write_table(source, table)
    out = tmp_path / "tagged.arrow"
    assert tag(source, "--out", out, site=demo_site_file) == 0
    archive = pa.ipc.open_file(str(out)).read_all()
    rejects = pa.ipc.open_file(str(tmp_path / "tagged.rejects.arrow")).read_all()
    assert archive.num_rows + rejects.num_rows == table.num_rows
    assert sorted(rejects["reason"].to_pylist()) == ["bad_time", "duplicate_event_id"]
    # in 2000 TT - UTC = 64.184 s: TAI - UTC = 32 s (IERS Bulletin C; erfa.dat) plus
    # TT - TAI = 32.184 s (erfa.TTMTAI)
    assert 0 in archive["site_tt_ns"].to_numpy() - 64_184_000_000
    # the summary breaks the rejections down by reason
    printed = capsys.readouterr().out
    assert "rejected (bad_time), time_ns outside the plausible range: 1" in printed
    assert "rejected (duplicate_event_id), event_id repeated within the message: 1" in printed


def test_tag_refuses_without_a_site(tmp_path, events, capsys):
    # issue 10: without --site the demo's invented site was used silently (phases up to
    # half a cycle off); now a site must be named
    source = tmp_path / "events.arrow"
    write_events(source, events[:1])
    with pytest.raises(SystemExit) as refused:  # argparse: a required option
        tag(source, "--out", tmp_path / "tagged.arrow")
    assert refused.value.code == 2
    err = capsys.readouterr().err
    assert "--site" in err and "Traceback" not in err
    assert not (tmp_path / "tagged.arrow").exists()


def test_target_name_comes_from_the_model(tmp_path, events, demo_site_file):
    source = tmp_path / "events.arrow"
    write_events(source, events[:1])
    out = tmp_path / "tagged.arrow"
    assert tag(source, "--out", out, site=demo_site_file) == 0
    archive = pa.ipc.open_file(str(out)).read_all()
    assert set(archive["target"].to_pylist()) == {"Lantern"}  # [target] name of the model
    assert archive.schema.metadata[b"target"] == b"Lantern"


def test_tag_refuses_to_overwrite_without_force(tmp_path, events, demo_site_file, capsys):
    source = tmp_path / "events.arrow"
    write_events(source, events[:1])
    out = tmp_path / "tagged.arrow"
    out.write_bytes(b"yesterday's archive")
    assert tag(source, "--out", out, site=demo_site_file) == 2
    err = capsys.readouterr().err
    assert str(out) in err and "--force" in err
    assert out.read_bytes() == b"yesterday's archive"
    assert tag(source, "--out", out, "--force", site=demo_site_file) == 0
    assert pa.ipc.open_file(str(out)).read_all().num_rows > 0
    assert tag(source, "--out", source, "--force", site=demo_site_file) == 2  # the input
    assert "is the input" in capsys.readouterr().err


def test_a_failed_run_leaves_no_output_behind(tmp_path, events, demo_site_file, capsys):
    # the second batch of the stream holds Unix-epoch times: the run stops there, after
    # the first batch was written; neither the archive nor a partial file may remain,
    # and an existing archive (replaced only with --force) is left as it was
    from turnstamp.core.timebase import parse_instant

    table = write_events(tmp_path / "all.arrow", events)
    first, second = table.slice(0, 5000), table.slice(5000)
    unix = second["time_ns"].to_numpy() - parse_instant("1970-01-01T00:00:00")
    second = second.set_column(1, "time_ns", pa.array(unix))
    source = tmp_path / "events.arrows"
    with pa.OSFile(str(source), "wb") as sink, pa.ipc.new_stream(sink, table.schema) as w:
        w.write_table(first)
        w.write_table(second)
    out = tmp_path / "new" / "tagged.arrow"
    assert tag(source, "--out", out, site=demo_site_file) == 2
    assert "batch 1" in capsys.readouterr().err
    assert not (tmp_path / "new").exists()  # not even the folder made for it
    out = tmp_path / "tagged.arrow"
    out.write_bytes(b"last week's archive")
    assert tag(source, "--out", out, "--force", site=demo_site_file) == 2
    assert out.read_bytes() == b"last week's archive"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["all.arrow", "events.arrows",
                                                         "tagged.arrow"]


def test_nan_in_an_optional_column_rejects_only_when_a_recipe_uses_it(tmp_path, events,
                                                                      demo_env):
    from turnstamp.assemble import phase_calculators_for, target_setup
    from turnstamp.config import RecipeConfig
    from turnstamp.core.timebase import Scale
    from turnstamp.files.inputs import load_spin_model
    from turnstamp.tagging.run import offline_target, tag_table

    table = write_events(tmp_path / "events.arrow", events[:1])
    energy = table["energy_kev"].to_numpy().copy()
    weight = table["weight"].to_numpy().copy()
    energy[[1, 2]] = np.nan
    weight[3] = np.nan
    table = table.set_column(2, "energy_kev", pa.array(energy)).set_column(
        3, "weight", pa.array(weight))
    models = [load_spin_model(MODEL)]
    plain = tag_table(table, offline_target(models), demo_env, Scale.UTC)
    assert plain.num_rows == table.num_rows  # no recipe reads energy or weight
    assert np.isnan(plain["weight"].to_numpy()[3])  # carried as it came
    by_energy = target_setup("lantern", phase_calculators_for(models),
                             [RecipeConfig(name="hard", energy_min="1 TeV")])
    cut = tag_table(table, by_energy, demo_env, Scale.UTC)
    assert cut.num_rows == table.num_rows - 2  # the two NaN energies
    weighted = target_setup("lantern", phase_calculators_for(models),
                            [RecipeConfig(name="w", use_weights=True)])
    assert tag_table(table, weighted, demo_env, Scale.UTC).num_rows == table.num_rows - 1


def test_summary_counts_quality_problems_and_never_prints_minus_inf(tmp_path, demo_site_file,
                                                                   capsys):
    # every event after the model's validity window (MJD 62000 = 2028-09-28): tagged with
    # the OUTSIDE_MODEL_VALIDITY flag, left out of the statistics, and the summary says so
    from turnstamp.core.timebase import NS_PER_S, parse_instant

    times = parse_instant("2028-10-05T01:00:00") + np.arange(2000) * NS_PER_S // 7
    source = tmp_path / "late.arrow"
    write_table(source, pa.table({"event_id": np.arange(2000, dtype=np.uint64),
                                  "time_ns": times}))
    assert tag(source, "--out", tmp_path / "late-tagged.arrow", site=demo_site_file) == 0
    printed = capsys.readouterr().out
    assert "2,000 events of Lantern tagged outside the spin model's validity window" in printed
    assert "no events in the statistics" in printed
    assert "inf" not in printed and "H = 0.0" not in printed
    assert tag(source, "--out", tmp_path / "late.json.arrow", "--json",
               site=demo_site_file) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["tagged_with_quality_flag"]["OUTSIDE_MODEL_VALIDITY"] == 2000
    assert summary["statistics"]["all"]["events"] == 0


def test_summary_statistics_equal_a_direct_computation(tmp_path, events, demo_site_file,
                                                       capsys):
    from turnstamp.core.moments import PhaseMoments
    from turnstamp.core.periodicity import h_test

    source = tmp_path / "events.arrow"
    write_events(source, events)
    out = tmp_path / "tagged.arrow"
    assert tag(source, "--out", out, "--json", site=demo_site_file) == 0
    summary = json.loads(capsys.readouterr().out)
    phases = pa.ipc.open_file(str(out)).read_all()["phase"].to_numpy()
    direct = h_test(PhaseMoments().update(phases))
    assert summary["statistics"]["all"]["events"] == phases.size
    assert summary["statistics"]["all"]["h_statistic"] == pytest.approx(direct.statistic,
                                                                         rel=1e-9)
    assert summary["statistics"]["all"]["h_sigma"] > 5  # the simulated pulsar is there


def test_per_batch_partials_merge_by_addition_into_the_run_totals(tmp_path, events, demo_env):
    # what a re-tagging job does: tag_record on each batch with fresh partials, summed in
    # any grouping, gives the statistics of one run over the whole input (to rounding)
    from functools import reduce

    from turnstamp.core.timebase import Scale
    from turnstamp.files.inputs import load_spin_model
    from turnstamp.tagging.batchtag import tag_record
    from turnstamp.tagging.run import offline_target, tag_job
    from turnstamp.tagging.times import TimeConvention

    table = write_events(tmp_path / "events.arrow", events)
    records = table.to_batches(max_chunksize=3000)
    job = tag_job(offline_target([load_spin_model(MODEL)]), demo_env, Scale.UTC, None,
                  "events", "events", TimeConvention())
    partials = [tag_record(record, job, i).moments[0] for i, record in enumerate(records)]
    totals = [job.statistics.moments()]
    for i, record in enumerate(records):
        tag_record(record, job, i, into=totals)
    half = len(partials) // 2
    merged = reduce(lambda a, b: a + b, partials[half:]) + reduce(lambda a, b: a + b,
                                                                  partials[:half])
    assert [start for start, _ in merged.intervals()] == [
        start for start, _ in totals[0].intervals()]
    one, other = merged.total(), totals[0].total()
    assert one.count == other.count == table.num_rows
    for name in ("cos_sums", "sin_sums", "hist_w", "hist_w2"):
        np.testing.assert_allclose(getattr(one, name), getattr(other, name), rtol=0,
                                   atol=1e-9 * one.sum_w, err_msg=name)


def test_a_file_written_in_one_piece_is_tagged_in_bounded_slices(tmp_path, events,
                                                                 demo_site_file, monkeypatch):
    # a table written whole is one record batch; it is tagged SLICE_ROWS rows at a time
    # (here 4000), each slice numbered as the batch, with the same rows as a file in
    # small batches
    import turnstamp.tagging.inputs as inputs

    table = write_events(tmp_path / "small-batches.arrow", events)
    write_table(tmp_path / "one-piece.arrow", table, chunk=None)
    assert pa.ipc.open_file(str(tmp_path / "one-piece.arrow")).num_record_batches == 1
    monkeypatch.setattr(inputs, "SLICE_ROWS", 4000)
    seen = []
    original = inputs.EventReader.__iter__

    def spy(self):
        for sequence, record in original(self):
            seen.append((sequence, record.num_rows))
            yield sequence, record

    monkeypatch.setattr(inputs.EventReader, "__iter__", spy)
    assert tag(tmp_path / "one-piece.arrow", "--out", tmp_path / "a.arrow",
               site=demo_site_file) == 0
    assert max(rows for _, rows in seen) == 4000 and {s for s, _ in seen} == {0}
    assert tag(tmp_path / "small-batches.arrow", "--out", tmp_path / "b.arrow",
               site=demo_site_file) == 0
    one = pa.ipc.open_file(str(tmp_path / "a.arrow")).read_all()
    other = pa.ipc.open_file(str(tmp_path / "b.arrow")).read_all()
    for column in ("event_id", "phase", "pulse_number", "barycentric_tdb_ns"):
        assert one[column].equals(other[column])
