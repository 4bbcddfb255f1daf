"""The command line: every subcommand has help, bad input ends in one clear line."""

import json

import pytest

from phasetag.cli import build_parser, main
from phasetag.demo import data_file


def test_every_subcommand_has_help(capsys):
    parser = build_parser()
    commands = parser._subparsers._group_actions[0].choices  # noqa: SLF001
    for name in commands:
        with pytest.raises(SystemExit) as done:
            main([name, "--help"])
        assert done.value.code == 0
        assert "usage:" in capsys.readouterr().out


def test_model_show_prints_derived_quantities(capsys):
    assert main(["model", "show", data_file("ember.toml")]) == 0
    text = capsys.readouterr().out
    # Ember: f = 29.94692212345678 Hz, fdot = -3.7712e-10 -> P = 0.0333924 s (1/f) and
    # tau_c = -f/(2 fdot) = 1258.2 yr (Lorimer & Kramer 2005 ch. 3, from memory)
    assert "0.03339241328" in text and "1258.16" in text
    assert "binary orbit (keplerian)" in text and "1 glitch" in text


def test_bad_model_file_is_one_line_naming_field_and_value(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text('model_id = "x"\nfrequency_hz = "-5"\n')
    assert main(["model", "check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert "frequency_hz = '-5'" in err and "validity: required field missing" in err
    assert "Traceback" not in err


def test_table_command_builds_and_caches(tmp_path, capsys):
    arguments = ["table", "--model", data_file("lantern.toml"), "--start",
                 "2026-12-02T00:00:00", "--stop", "2026-12-02T03:00:00",
                 "--cache", str(tmp_path)]
    assert main(arguments) == 0
    assert "segments of 60 min" in capsys.readouterr().out
    cached = list(tmp_path.glob("barycentre-*.arrow"))
    assert len(cached) == 1
    stamp = cached[0].stat().st_mtime_ns
    assert main(arguments) == 0  # the second run reuses the cached file
    assert cached[0].stat().st_mtime_ns == stamp


def test_schemas_check_and_inspect(tmp_path, capsys):
    assert main(["schemas", str(tmp_path)]) == 0
    assert main(["schemas", "--check", str(tmp_path)]) == 0
    (tmp_path / "archive.arrow.json").write_text("{}")
    assert main(["schemas", "--check", str(tmp_path)]) == 1
    capsys.readouterr()
    assert main(["inspect", str(tmp_path / "nothing-here")]) == 2


def test_inspect_an_archive_file(tmp_path, capsys):
    import numpy as np
    import pyarrow as pa

    events = tmp_path / "events.arrow"
    table = pa.table({"event_id": np.arange(5, dtype=np.uint64),
                      "time_ns": np.int64(849_474_000_000_000_000) + np.arange(5) * 10**9})
    with pa.OSFile(str(events), "wb") as sink, pa.ipc.new_file(sink, table.schema) as w:
        w.write_table(table)
    out = tmp_path / "tagged.arrow"
    assert main(["tag", str(events), "--model", data_file("lantern.toml"), "--out", str(out),
                 "--quiet"]) == 0
    capsys.readouterr()
    assert main(["inspect", str(out), "--json", "--rows", "2"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["rows"] == 5 and len(summary["first_rows"]) == 2
    assert "phase" in summary["columns"]
