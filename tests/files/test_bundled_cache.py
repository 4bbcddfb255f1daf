"""The parsed leap-second and Earth-orientation tables, cached in binary form keyed by
the source files' contents, and a quick start for ``tag`` that follows from it."""

import subprocess
import sys

import astropy_iers_data
import numpy as np
import pyarrow as pa
import pytest

from turnstamp.files import bundled


@pytest.fixture
def cache(tmp_path, monkeypatch):
    folder = tmp_path / "cache"
    monkeypatch.setenv("TURNSTAMP_CACHE_DIR", str(folder))
    return folder


def test_tables_read_from_the_cache_equal_the_parsed_ones(cache, tmp_path):
    leaps = bundled.bundled_leap_seconds()
    orientation = bundled.load_earth_orientation(leaps=leaps)
    assert sorted(p.name.split("-")[0] for p in cache.iterdir()) == ["earth", "leap"]
    again = bundled.load_earth_orientation(leaps=bundled.bundled_leap_seconds())
    for field in ("mjd", "ut1_minus_tai_s", "polar_x_arcsec", "polar_y_arcsec", "pole_dx_mas",
                  "pole_dy_mas"):
        np.testing.assert_array_equal(getattr(again, field), getattr(orientation, field))
    assert (again.predicted_from_mjd, again.source) == (orientation.predicted_from_mjd,
                                                        orientation.source)
    # another file's contents get another key: a changed table is parsed afresh
    copy = tmp_path / "finals2000A.all"
    text = open(astropy_iers_data.IERS_A_FILE).read().splitlines(keepends=True)
    copy.write_text("".join(text[:-200]))  # the same table, its last 200 days cut
    shorter = bundled.load_earth_orientation(copy, leaps)
    assert shorter.mjd[-1] < orientation.mjd[-1]
    assert len(list(cache.glob("earth-orientation-*.npz"))) == 2


def test_a_cache_that_cannot_be_written_only_costs_the_parse(tmp_path, monkeypatch):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    monkeypatch.setenv("TURNSTAMP_CACHE_DIR", str(blocker / "cache"))
    leaps = bundled.bundled_leap_seconds()
    assert leaps.tai_minus_utc_s[-1] == 37  # TAI - UTC since 2017 (IERS Bulletin C 52)


@pytest.mark.parametrize("ids", [np.uint64, np.int64])
def test_tag_starts_without_astropy_scipy_or_zmq(cache, tmp_path, demo_site_file, ids):
    # nor pandas, which pyarrow imports on its first array built from numpy or a
    # list (0.5 s), nor pyarrow.compute: tag builds and reads its columns from buffers
    # (signed ids too, whose sign is checked on the buffer)
    from turnstamp.core.timebase import NS_PER_S, parse_instant
    from turnstamp.demo import data_file

    times = parse_instant("2026-12-02T02:00:00") + np.arange(100) * NS_PER_S
    events = tmp_path / "events.arrow"
    table = pa.table({"event_id": np.arange(100, dtype=ids), "time_ns": times})
    with pa.OSFile(str(events), "wb") as sink, pa.ipc.new_file(sink, table.schema) as w:
        w.write_table(table)
    code = ("import sys\n"
            "from turnstamp.commands.main import main\n"
            f"assert main(['tag', {str(events)!r}, '--model', {data_file('lantern.toml')!r}, "
            f"'--site', {str(demo_site_file)!r}, '--out', sys.argv[1], '--quiet']) == 0\n"
            "print('loaded:' + ','.join(m for m in ('astropy', 'scipy', 'zmq', 'pandas',\n"
            "                                              'pyarrow.compute')\n"
            "                           if m in sys.modules))\n")
    first = subprocess.run([sys.executable, "-c", code, str(tmp_path / "a.arrow")],
                           capture_output=True, text=True, timeout=300, check=True)
    assert "zmq" not in first.stdout and "scipy" not in first.stdout, first.stdout
    second = subprocess.run([sys.executable, "-c", code, str(tmp_path / "b.arrow")],
                            capture_output=True, text=True, timeout=300, check=True)
    assert second.stdout.splitlines()[-1] == "loaded:"  # tables from the cache: none of them
