"""Offline tagging (``turnstamp tag``): an events file in, the archive's phase columns out."""

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from turnstamp.commands.main import main
from turnstamp.core.simulate import NightPlan, simulate_night
from turnstamp.demo import data_file


def write_events(path, batches, parquet=False):
    columns = {name: np.concatenate([b.columns()[name] for b in batches])
               for name in ("event_id", "time_ns", "energy_kev", "weight")}
    table = pa.table(columns)
    if parquet:
        pq.write_table(table, path)
    else:
        with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_file(sink, table.schema) as w:
            w.write_table(table, max_chunksize=5000)
    return table


@pytest.fixture
def events(demo_env, lantern, night_start_tt):
    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=120, pulsed_rate_hz=40,
                     background_rate_hz=200, template=lantern.template, seed=3)
    return list(simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps))


@pytest.mark.parametrize("parquet", [False, True])
def test_tag_a_file_and_read_the_archive(tmp_path, events, parquet, capsys):
    source = tmp_path / ("events.parquet" if parquet else "events.arrow")
    table = write_events(source, events, parquet)
    out = tmp_path / "tagged.arrow"
    assert main(["tag", str(source), "--model", data_file("lantern.toml"),
                 "--site", data_file("corvid-ridge.toml"), "--scale", "UTC",
                 "--out", str(out), "--target", "lantern", "--quiet"]) == 0
    printed = capsys.readouterr().out
    assert f"{table.num_rows} events" in printed and "0 rejected" in printed
    archive = pa.ipc.open_file(str(out)).read_all()
    assert archive.num_rows == table.num_rows
    np.testing.assert_array_equal(archive["event_id"].to_numpy(), table["event_id"].to_numpy())
    phase = archive["phase"].to_numpy()
    assert np.all((phase >= 0) & (phase < 1))
    meta = archive.schema.metadata
    assert b"lantern-2026a" in meta[b"models"] and b"JPL kernel" in meta[b"ephemeris"]
    assert "sigma" in printed  # the file's H-test is reported


def test_archive_phase_agrees_with_the_astropy_route_to_its_accuracy(tmp_path, events,
                                                                     demo_env):
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
    assert main(["tag", str(source), "--model", data_file("lantern.toml"),
                 "--site", data_file("corvid-ridge.toml"), "--out", str(out),
                 "--quiet"]) == 0
    archive = pa.ipc.open_file(str(out)).read_all().slice(0, 30)
    site = demo_env.observer
    location = EarthLocation.from_geodetic(site.longitude_deg, site.latitude_deg, site.height_m)
    t = Time([format_instant(x) for x in archive["site_tt_ns"].to_numpy()], scale="tt",
             location=location, precision=9)
    model = load_spin_model(data_file("lantern.toml"))
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


def test_bad_event_files_name_the_field_and_value(tmp_path, capsys):
    missing = tmp_path / "missing.arrow"
    table = pa.table({"event_id": np.arange(3, dtype=np.uint64), "t": np.arange(3)})
    with pa.OSFile(str(missing), "wb") as sink, pa.ipc.new_file(sink, table.schema) as w:
        w.write_table(table)
    assert main(["tag", str(missing), "--model", data_file("lantern.toml"),
                 "--site", data_file("corvid-ridge.toml"),
                 "--out", str(tmp_path / "x.arrow")]) == 2
    assert "time_ns" in capsys.readouterr().err

    floats = tmp_path / "floats.parquet"
    pq.write_table(pa.table({"event_id": np.arange(3, dtype=np.uint64),
                             "time_ns": np.array([1.0, 2.0, 3.0])}), floats)
    assert main(["tag", str(floats), "--model", data_file("lantern.toml"),
                 "--site", data_file("corvid-ridge.toml"),
                 "--out", str(tmp_path / "y.arrow")]) == 2
    err = capsys.readouterr().err
    assert "time_ns" in err and "double" in err

    garbage = tmp_path / "garbage.arrow"
    garbage.write_bytes(b"not arrow at all")
    assert main(["tag", str(garbage), "--model", data_file("lantern.toml"),
                 "--site", data_file("corvid-ridge.toml"),
                 "--out", str(tmp_path / "z.arrow")]) == 2
    assert "garbage.arrow" in capsys.readouterr().err


def test_bad_rows_go_to_the_rejects_file(tmp_path, events):
    source = tmp_path / "events.arrow"
    table = write_events(source, events[:2])
    times = table["time_ns"].to_numpy().copy()
    times[3] = 0  # 2000-01-01: years from the rest, tagged with a table of its own day
    ids = table["event_id"].to_numpy().copy()
    ids[5] = ids[6]
    table = table.set_column(1, "time_ns", pa.array(times)).set_column(0, "event_id",
                                                                       pa.array(ids))
    with pa.OSFile(str(source), "wb") as sink, pa.ipc.new_file(sink, table.schema) as w:
        w.write_table(table)
    out = tmp_path / "tagged.arrow"
    assert main(["tag", str(source), "--model", data_file("lantern.toml"),
                 "--site", data_file("corvid-ridge.toml"), "--out", str(out),
                 "--quiet"]) == 0
    archive = pa.ipc.open_file(str(out)).read_all()
    rejects = pa.ipc.open_file(str(tmp_path / "tagged.rejects.arrow")).read_all()
    assert archive.num_rows + rejects.num_rows == table.num_rows
    assert sorted(rejects["reason"].to_pylist()) == ["duplicate_event_id"]
    # in 2000 TT - UTC = 64.184 s: TAI - UTC = 32 s (IERS Bulletin C; erfa.dat) plus
    # TT - TAI = 32.184 s (erfa.TTMTAI)
    assert 0 in archive["site_tt_ns"].to_numpy() - 64_184_000_000
