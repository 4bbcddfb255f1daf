"""The command line: every subcommand has help, bad input ends in one clear line."""

import json
import re

import pytest

from turnstamp.commands.main import build_parser, main
from turnstamp.demo import data_file


def test_every_subcommand_has_help(capsys):
    parser = build_parser()
    commands = parser._subparsers._group_actions[0].choices  # noqa: SLF001
    for name in commands:
        with pytest.raises(SystemExit) as done:
            main([name, "--help"])
        assert done.value.code == 0
        assert "usage:" in capsys.readouterr().out


def test_model_summary_prints_the_spin_down_summary(capsys):
    assert main(["model", "summary", data_file("ember.toml")]) == 0
    text = capsys.readouterr().out
    # Ember (invented): f = 13.71963518472915 Hz, fdot = -1.9037e-12 Hz/s, so
    # P = 1/f = 0.07288823548 s and tau_c = -f/(2 fdot) = 3.60341e12 s / 31557600 s per
    # Julian year = 114185.272 yr (Lorimer & Kramer 2005 ch. 3, from memory; recomputed in
    # plain Python floats and printed by the command to 10 significant digits)
    assert "0.07288823548" in text and "114185.272" in text
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
                 "--site", data_file("corvid-ridge.toml"), "--table-cache", str(tmp_path)]
    assert main(arguments) == 0
    out = capsys.readouterr().out
    assert "segments of 60 min" in out
    # calendar times, not ns; whole TT hours (TT - UTC = 69.184 s since 2017, IERS)
    assert "2026-12-01T23:58:50Z to 2026-12-02T03:58:50Z (UTC)" in out
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
    assert main(["tag", str(events), "--model", data_file("lantern.toml"),
                 "--site", data_file("corvid-ridge.toml"), "--out", str(out),
                 "--quiet"]) == 0
    capsys.readouterr()
    assert main(["inspect", str(out), "--json", "--rows", "2"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["rows"] == 5 and len(summary["first_rows"]) == 2
    assert "phase" in summary["columns"]


def test_stack_and_template_commands(tmp_path, capsys, demo_env, lantern, night_start_tt):
    from turnstamp.core.pipeline import Pipeline, PipelineSettings
    from turnstamp.core.simulate import NightPlan, simulate_night
    from turnstamp.files import schemas
    from turnstamp.files.outputs import rows_table
    from turnstamp.files.writer import RotatingArrowWriter
    from turnstamp.service.checkpoint import write_checkpoint

    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=30, pulsed_rate_hz=80,
                     background_rate_hz=400, template=lantern.template, seed=4)
    folders = []
    for night in ("first", "second"):
        pipeline = Pipeline(PipelineSettings(leaps=demo_env.leaps), [lantern])
        for batch in simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps):
            pipeline.feed(batch)
        folder = tmp_path / night
        folder.mkdir()
        write_checkpoint(folder, {"pipeline": pipeline.to_state()})
        with RotatingArrowWriter(folder, "profiles", schemas.PROFILES) as writer:
            writer.write(rows_table(pipeline.profiles(), schemas.PROFILES, computed_at_utc_ns=0))
        folders.append(str(folder))
    assert main(["stack", *folders, "--out", str(tmp_path / "stacked.json")]) == 0
    text = capsys.readouterr().out
    assert "lantern: 2 run(s)" in text and "sigma" in text
    assert json.loads((tmp_path / "stacked.json").read_text())["stacked_from"] == folders
    out = tmp_path / "tonight.toml"
    assert main(["template", folders[0], "--target", "lantern", "--out", str(out)]) == 0
    assert "binned_profile" in out.read_text()


SPIN_UP = """schema_version = 1
model_id = "spin-up"
reference_epoch_mjd_tdb = "61375.25"
phase_zero_mjd_tdb = "61375.5"
frequency_hz = "87.650000000001"
frequency_derivatives = ["2.500e-14", "-3.0e-25"]
[target]
name = "Invented"
right_ascension_deg = 10.0
declination_deg = 20.0
[validity]
start_mjd_tdb = "61300"
end_mjd_tdb = "61400"
"""


def test_model_summary_shows_inputs_as_written_units_once_and_a_spin_up_sign(tmp_path, capsys):
    path = tmp_path / "spin-up.toml"
    path.write_text(SPIN_UP)
    assert main(["model", "summary", str(path)]) == 0
    text = capsys.readouterr().out
    assert "87.650000000001 Hz" in text  # every digit as written, not 87.65
    assert "2.500E-14 Hz/s" in text and "-3.0E-25 Hz/s^2" in text  # trailing zeros kept
    assert "MJD 61375.25 TDB" in text and "MJD 61375.5 TDB" in text  # both epochs
    assert "MJD 61300 TDB to MJD 61400 TDB (100 days)" in text
    # spin-up: Pdot = -fdot/f^2 < 0 and the spin-down power -4 pi^2 I f fdot < 0
    # (Lorimer & Kramer 2005, ch. 3; from memory), no age or field
    assert re.search(r"period derivative\s+-3\.2541\d+e-18 s/s", text)
    assert re.search(r"spin-down power\s+-8\.65\d+e\+34 erg/s", text)
    assert not re.search(r"characteristic age\s+\d", text) and "spinning up" in text
    for line in text.splitlines():  # the unit is said once per line
        assert line.count(" Hz/s") <= 1 and line.count(" s/s") <= 1
    assert main(["model", "summary", str(path), "--json"]) == 0
    document = json.loads(capsys.readouterr().out)[0]
    assert document["inputs"]["frequency_hz"] == "87.650000000001"
    assert document["derived"]["spin_down_power_erg_per_s"] < 0


def test_model_check_warns_about_too_few_digits(tmp_path, capsys):
    path = tmp_path / "coarse.toml"
    path.write_text(SPIN_UP.replace('"87.650000000001"', '"87.65"'))
    assert main(["model", "check", str(path)]) == 0
    out = capsys.readouterr().out
    assert "ok, with 1 warning(s)" in out and "warning: spin-up: frequency_hz = 87.65" in out


def test_simulate_sends_the_users_own_pulsar_from_a_config(tmp_path, capsys):
    import shutil

    import zmq

    from turnstamp.wire.decode import decode_message

    model = tmp_path / "own.toml"
    shutil.copy(data_file("lantern.toml"), model)
    context = zmq.Context()
    with context.socket(zmq.PULL) as pull:
        pull.setsockopt(zmq.LINGER, 0)
        port = pull.bind_to_random_port("tcp://127.0.0.1")
        config = tmp_path / "config.toml"
        config.write_text(f"""[intake]
endpoints = ["tcp://127.0.0.1:{port}"]
[site]
name = "Test Ridge"
latitude_deg = -30.0
longitude_deg = 70.0
height_m = 1500.0
[[targets]]
name = "own"
models = ["{model}"]
template = "{data_file('lantern-template.toml')}"
""")
        assert main(["simulate", "--config", str(config), "--seconds", "2", "--rate", "500",
                     "--speed", "0", "--start", "2026-12-02T03:00:00Z", "--quiet"]) == 0
        assert pull.poll(10_000)
        batch = decode_message(pull.recv_multipart(), has_topic=False,
                               max_message_bytes=1 << 26, max_events=1 << 20).batch
    context.term()
    assert "sent" in capsys.readouterr().err
    assert len(batch) > 0 and batch.time_scale.value == "UTC"
