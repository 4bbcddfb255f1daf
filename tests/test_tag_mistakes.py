"""A new user's mistakes with ``turnstamp tag``: each ends in a non-zero exit or a
visible warning naming the field, value or file, never in a traceback.

The mistakes are the ordinary ones of a first night: no site, times in another
convention (Unix time, seconds, milliseconds, MJD), the wrong file in the wrong
place, an output that exists, events the model does not cover.
"""

import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from turnstamp.commands.main import main
from turnstamp.core.timebase import NS_PER_S, parse_instant
from turnstamp.demo import data_file

MODEL = data_file("lantern.toml")
NIGHT = parse_instant("2026-12-02T02:00:00")  # ns since 2000-01-01T12:00:00 (UTC labels)
UNIX_EPOCH = parse_instant("1970-01-01T00:00:00")


def events_file(folder, times, name="events.arrow", column="time_ns"):
    times = np.asarray(times)
    table = pa.table({"event_id": np.arange(times.size, dtype=np.uint64), column: times})
    path = folder / name
    if name.endswith(".parquet"):
        pq.write_table(table, path)
    else:
        with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_file(sink, table.schema) as w:
            w.write_table(table)
    return path


def night_times(n=500):
    return NIGHT + np.arange(n, dtype=np.int64) * (NS_PER_S // 10)


def run_tag(capsys, *args):
    """``turnstamp tag`` in-process: (exit status, stdout, stderr); any exception that
    escapes ``main`` fails the test, as a traceback would on the command line."""
    try:
        status = main(["tag", *map(str, args), "--quiet"])
    except SystemExit as exc:  # argparse's own refusals
        status = exc.code
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    return status, out, err


@pytest.fixture
def folder(tmp_path):
    return tmp_path


def refused(capsys, *args, naming):
    status, _, err = run_tag(capsys, *args)
    assert status == 2, err
    for word in naming:
        assert word in err, f"{word!r} not in: {err}"
    return err


def test_no_site(capsys, folder):
    events = events_file(folder, night_times())
    refused(capsys, events, "--model", MODEL, "--out", folder / "t.arrow", naming=["--site"])


def test_files_given_to_the_wrong_option(capsys, folder, demo_site_file):
    events = events_file(folder, night_times())
    out = ["--out", folder / "t.arrow"]
    # a missing file is named by the option that asked for it
    refused(capsys, events, "--model", folder / "nope.toml", "--site", demo_site_file, *out,
            naming=["--model", "nope.toml", "cannot read"])
    refused(capsys, events, "--model", MODEL, "--site", folder / "nope.toml", *out,
            naming=["--site", "nope.toml", "cannot read"])
    # a file of the other kind is said to be one, not listed as missing fields
    said = refused(capsys, events, "--model", demo_site_file, "--site", demo_site_file, *out,
                   naming=["site file", "not a spin model"])
    assert "required field missing" not in said
    refused(capsys, events, "--model", data_file("lantern-template.toml"), "--site",
            demo_site_file, *out, naming=["pulse template", "not a spin model"])
    refused(capsys, events, "--model", MODEL, "--site", MODEL, *out,
            naming=["no [site] table", "looks like a spin model"])


@pytest.mark.parametrize("values, naming", [
    # Unix-epoch nanoseconds: the most common mistake (read as ours they fall in 2056)
    (lambda: night_times() - UNIX_EPOCH, ["time_ns", "--time-origin unix",
                                          "nanoseconds since 1970-01-01"]),
    # whole seconds since 2000-01-01T12:00:00, read as ns: all within seconds of the origin
    (lambda: night_times() // NS_PER_S, ["time_ns", "--time-unit s", "within 40 days"]),
    # Unix seconds as integers
    (lambda: (night_times() - UNIX_EPOCH) // NS_PER_S, ["--time-unit s --time-origin unix"]),
    # Unix milliseconds
    (lambda: (night_times() - UNIX_EPOCH) // 1_000_000, ["--time-unit ms --time-origin unix"]),
    # Unix microseconds: 20 days after 2000-01-01 if read as ns
    (lambda: (night_times() - UNIX_EPOCH) // 1_000, ["--time-unit us --time-origin unix"]),
    # floating-point Unix seconds
    (lambda: (night_times() - UNIX_EPOCH) / NS_PER_S, ["double", "--time-unit s"]),
    # floating-point MJD
    (lambda: 61376.0833 + np.arange(500) / 864000.0, ["double", "MJD"]),
    # our own nanoseconds, but as floating point: the column must change, no option helps
    (lambda: night_times().astype(float), ["double", "write time_ns as int64",
                                           "since 2000-01-01T12:00:00 they give 2026-"]),
])
def test_times_in_another_convention(capsys, folder, demo_site_file, values, naming):
    events = events_file(folder, values())
    out = folder / "t.arrow"
    said = refused(capsys, events, "--model", MODEL, "--site", demo_site_file, "--out", out,
                   naming=naming)
    assert not out.exists()
    if "write time_ns as int64" in naming:
        assert "--time-unit ns" not in said  # floats are refused whatever the unit


def test_the_suggested_convention_then_works(capsys, folder, demo_site_file):
    events = events_file(folder, (night_times() - UNIX_EPOCH) // 1_000_000)
    status, out, _ = run_tag(capsys, events, "--model", MODEL, "--site", demo_site_file,
                             "--out", folder / "t.arrow", "--time-unit", "ms",
                             "--time-origin", "unix")
    assert status == 0 and "500 tagged" in out


def test_times_really_near_the_origin_are_accepted_when_said_so(capsys, folder,
                                                               demo_site_file):
    events = events_file(folder, np.arange(500) * NS_PER_S)  # 2000-01-01T12:00:00 on
    refused(capsys, events, "--model", MODEL, "--site", demo_site_file, "--out",
            folder / "t.arrow", naming=["--time-unit ns"])
    status, out, _ = run_tag(capsys, events, "--model", MODEL, "--site", demo_site_file,
                             "--out", folder / "t.arrow", "--time-unit", "ns")
    assert status == 0 and "500 tagged" in out
    assert "outside the spin model's validity window" in out  # and that is said


def test_unknown_time_origin_unit_and_scale(capsys, folder, demo_site_file):
    events = events_file(folder, night_times())
    common = [events, "--model", MODEL, "--site", demo_site_file, "--out", folder / "t.arrow"]
    refused(capsys, *common, "--time-origin", "noon", naming=["time origin", "noon", "unix"])
    refused(capsys, *common, "--time-unit", "minutes", naming=["--time-unit", "minutes"])
    refused(capsys, *common, "--time-scale", "local", naming=["--time-scale", "local"])


def test_a_timestamp_column_says_its_own_convention(capsys, folder, demo_site_file):
    stamps = pa.array(night_times() - UNIX_EPOCH, pa.timestamp("ns"))
    path = folder / "stamps.parquet"
    pq.write_table(pa.table({"event_id": np.arange(500, dtype=np.uint64), "time_ns": stamps}),
                   path)
    status, out, _ = run_tag(capsys, path, "--model", MODEL, "--site", demo_site_file, "--out",
                             folder / "t.arrow")
    assert status == 0 and "500 tagged" in out
    refused(capsys, path, "--model", MODEL, "--site", demo_site_file, "--out",
            folder / "u.arrow", "--time-unit", "s", naming=["timestamp", "time_ns"])


def test_outputs(capsys, folder, demo_site_file):
    events = events_file(folder, night_times())
    common = ["--model", MODEL, "--site", demo_site_file]
    existing = folder / "t.arrow"
    existing.write_bytes(b"keep me")
    refused(capsys, events, *common, "--out", existing, naming=[str(existing), "--force"])
    refused(capsys, events, *common, "--out", events, "--force", naming=["input"])
    (folder / "a-file").write_text("x")
    refused(capsys, events, *common, "--out", folder / "a-file" / "t.arrow",
            naming=["a-file", "not a folder"])
    refused(capsys, events, *common, "--out", folder, naming=["folder", str(folder)])
    assert existing.read_bytes() == b"keep me"


def test_wrong_input_files(capsys, folder, demo_site_file):
    common = ["--model", MODEL, "--site", demo_site_file, "--out", folder / "t.arrow"]
    refused(capsys, folder / "nothing.arrow", *common, naming=["nothing.arrow"])
    refused(capsys, MODEL, *common, naming=["lantern.toml"])  # the model given as events
    garbage = folder / "garbage.parquet"
    garbage.write_bytes(b"PAR1 not really")
    refused(capsys, garbage, *common, naming=["garbage.parquet"])
    refused(capsys, events_file(folder, night_times(), column="time"), *common,
            naming=["time_ns", "'time'"])
    refused(capsys, folder, *common, naming=["folder"])


def test_wrong_model_and_site_files(capsys, folder, demo_site_file):
    events = events_file(folder, night_times())
    refused(capsys, events, "--model", folder / "nomodel.toml", "--site", demo_site_file,
            "--out", folder / "t.arrow", naming=["nomodel.toml"])
    refused(capsys, events, "--model", MODEL, "--site", folder / "nosite.toml",
            "--out", folder / "t.arrow", naming=["nosite.toml"])
    not_a_site = folder / "model-as-site.toml"
    not_a_site.write_text('model_id = "x"\n')
    refused(capsys, events, "--model", MODEL, "--site", not_a_site, "--out",
            folder / "t.arrow", naming=["site"])


def test_events_the_model_does_not_cover_are_said_so(capsys, folder, demo_site_file):
    late = parse_instant("2028-10-05T01:00:00") + np.arange(500) * NS_PER_S
    status, out, _ = run_tag(capsys, events_file(folder, late), "--model", MODEL, "--site",
                             demo_site_file, "--out", folder / "t.arrow")
    assert status == 0
    assert "500 events of Lantern tagged outside the spin model's validity window" in out
    assert "no events in the statistics" in out and "inf" not in out


def test_an_empty_file_is_said_so(capsys, folder, demo_site_file):
    empty = events_file(folder, np.zeros(0, np.int64))
    status, out, _ = run_tag(capsys, empty, "--model", MODEL, "--site", demo_site_file,
                             "--out", folder / "t.arrow")
    assert status == 0 and "warning: no event was tagged" in out


def test_on_the_real_command_line_no_traceback(folder, demo_site_file):
    events = events_file(folder, night_times() - UNIX_EPOCH)
    for extra in ([], ["--site", str(demo_site_file)]):
        done = subprocess.run([sys.executable, "-m", "turnstamp", "tag", str(events),
                               "--model", MODEL, "--out", str(folder / "t.arrow"), *extra],
                              capture_output=True, text=True, timeout=120)
        assert done.returncode == 2 and "Traceback" not in done.stderr
        assert ("--site" if not extra else "--time-origin unix") in done.stderr


def test_an_output_that_cannot_be_written_is_said_so(capsys, folder, demo_site_file,
                                                    monkeypatch):
    # a full disk (simulated): the run stops with the file named, and leaves nothing
    class FullDisk:
        def write_table(self, table):
            raise OSError(28, "No space left on device")

        def close(self):
            pass

    events = events_file(folder, night_times())
    monkeypatch.setattr(pa.ipc, "new_file", lambda sink, schema: FullDisk())
    refused(capsys, events, "--model", MODEL, "--site", demo_site_file, "--out",
            folder / "t.arrow", naming=["t.arrow", "No space left"])
    assert not list(folder.glob("*t.arrow*"))


def test_a_disk_that_fills_under_direct_writes_is_said_so(capsys, folder, demo_site_file,
                                                          monkeypatch):
    # the same through the direct writes themselves, with the statistics helper
    # process running: said, nothing left behind, no helper left over
    import multiprocessing

    from turnstamp.tagging.directfile import DirectFile

    def full(self, data):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(DirectFile, "_write_all", full)
    events = events_file(folder, night_times(300_000))  # 84 bytes a row: 25 MB, 3 chunks
    refused(capsys, events, "--model", MODEL, "--site", demo_site_file, "--out",
            folder / "t.arrow", naming=["t.arrow", "No space left"])
    assert not list(folder.glob("*t.arrow*"))
    assert not multiprocessing.active_children()
