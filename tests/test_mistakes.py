"""Each traceback an observer met (issue 10) is now one clear line and a non-zero exit.

Every test runs the command as a user would (``main([...])``) and checks: exit status
2 (or 1), one line on stderr that names the option, the value or the file, and no
traceback anywhere.
"""

import subprocess
import sys
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from turnstamp.commands.main import main
from turnstamp.demo import data_file

SITE = data_file("corvid-ridge.toml")
LANTERN = data_file("lantern.toml")


def refused(capsys, argv: list[str], *names: str, status: int = 2) -> str:
    """Run ``argv``; assert ``status``, one stderr line naming every one of ``names``."""
    assert main(argv) == status
    captured = capsys.readouterr()
    err = captured.err.strip()
    assert "Traceback" not in captured.err + captured.out
    assert err and len(err.splitlines()) == 1, err
    for name in names:
        assert name in err, (name, err)
    return err


def test_simulate_with_an_unknown_fault_names_the_known_ones(capsys):
    err = refused(capsys, ["simulate", "--fault", "bogus"], "--fault", "bogus")
    assert "step" in err and "wobble" in err


def test_simulate_with_a_start_that_is_not_a_time(capsys):
    refused(capsys, ["simulate", "--start", "tonight"], "--start", "tonight", "2026-12-01T")


def test_table_with_a_stop_that_is_not_a_time(capsys, tmp_path):
    refused(capsys, ["table", "--model", LANTERN, "--site", SITE, "--start",
                     "2026-12-01T18:00:00", "--stop", "yesterday", "--table-cache",
                     str(tmp_path)], "--stop", "yesterday")


def test_table_with_stop_before_start(capsys, tmp_path):
    refused(capsys, ["table", "--model", LANTERN, "--site", SITE, "--start",
                     "2026-12-02T18:00:00", "--stop", "2026-12-01T18:00:00", "--table-cache",
                     str(tmp_path)], "--stop", "2026-12-01T18:00:00", "after --start")


def test_table_beyond_the_ephemeris_says_its_range(capsys, tmp_path):
    # DE421 (skyfield-data) covers 1899-07-29 to 2053-10-09 (jplephem's segment range)
    refused(capsys, ["table", "--model", LANTERN, "--site", SITE, "--start",
                     "2060-12-01T18:00:00", "--stop", "2060-12-02T06:00:00", "--table-cache",
                     str(tmp_path)], "2060-12-01T18:00:00", "ephemeris", "2053-10-09")


def test_inspect_on_a_toml_file(capsys):
    refused(capsys, ["inspect", SITE], "corvid-ridge.toml", "not an output file")


def test_inspect_reads_the_parquet_output_of_tag(capsys, tmp_path):
    events = tmp_path / "events.parquet"
    pq.write_table(pa.table({"event_id": np.arange(20, dtype=np.uint64),
                             "time_ns": np.int64(849_474_000_000_000_000)
                             + np.arange(20) * 10**9}), events)
    out = tmp_path / "tagged.parquet"
    assert main(["tag", str(events), "--model", LANTERN, "--site", SITE, "--out", str(out),
                 "--quiet"]) == 0
    capsys.readouterr()
    assert main(["inspect", str(out), "--rows", "1"]) == 0
    text = capsys.readouterr().out
    assert "20 rows" in text and "phase" in text
    assert "2026-12-02T" in text  # instants shown as calendar labels, not integers


def test_demo_with_an_unknown_fault_fails_before_starting(capsys, tmp_path):
    refused(capsys, ["demo", "--fault", "bogus", "--out-dir", str(tmp_path / "demo")],
            "--fault", "bogus")
    assert not (tmp_path / "demo").exists()  # nothing started, nothing written


@pytest.mark.parametrize("seconds", ["-5", "0", "nan"])
def test_demo_refuses_a_length_that_is_not_positive(capsys, tmp_path, seconds):
    refused(capsys, ["demo", "--seconds", seconds, "--out-dir", str(tmp_path / "demo")],
            "--seconds", seconds)


def test_watch_once_without_a_service_gives_up_in_bounded_time(capsys):
    started = time.monotonic()
    refused(capsys, ["watch", "--endpoint", "tcp://127.0.0.1:9", "--once", "--wait", "0.5"],
            "tcp://127.0.0.1:9", "no status", status=1)
    assert time.monotonic() - started < 10


def test_watch_with_a_malformed_endpoint(capsys):
    refused(capsys, ["watch", "--endpoint", "localhost:5556", "--once"], "--endpoint",
            "localhost:5556")


def test_report_on_a_folder_that_is_not_an_output_folder(capsys, tmp_path):
    (tmp_path / "notes.txt").write_text("not turnstamp output\n")
    table = pa.table({"event_id": np.arange(3, dtype=np.uint64), "x": [1.0, 2.0, 3.0]})
    with pa.OSFile(str(tmp_path / "other.arrow"), "wb") as sink, \
            pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table)
    refused(capsys, ["report", str(tmp_path)], str(tmp_path), "not a turnstamp output folder")
    assert not (tmp_path / "report").exists()


def test_report_on_a_file_names_its_folder(capsys, tmp_path):
    file = tmp_path / "tagged.arrow"
    file.write_bytes(b"")
    refused(capsys, ["report", str(file)], "tagged.arrow", "is a file")


def test_the_command_line_itself_never_shows_a_traceback():
    """A real process: argparse errors and ours alike end in a line, not a traceback."""
    run = subprocess.run([sys.executable, "-m", "turnstamp", "table", "--model", LANTERN,
                          "--site", SITE, "--start", "soon", "--stop", "later"],
                         capture_output=True, text=True, timeout=120)
    assert run.returncode == 2 and "Traceback" not in run.stderr
    assert "--start = 'soon'" in run.stderr
