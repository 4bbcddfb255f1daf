"""A new user's ordinary mistakes: each ends in a non-zero exit or a
visible warning that names the field, the value or the file, and never in a traceback.

Each case is (name, argv, texts that must appear, expected exit status or None for
"any non-zero"); ``{tmp}`` in argv stands for a scratch folder prepared by ``scratch``.
The offline tagging path (``tag``: times in another convention, NaN columns, an output
that exists) has its own file of mistakes, tests/test_tag_mistakes.py.
"""

import time
from pathlib import Path

import pytest

from turnstamp.commands.main import main
from turnstamp.demo import data_file
from turnstamp.demo.live import demo_config

SITE = data_file("corvid-ridge.toml")
LANTERN = data_file("lantern.toml")
NIGHT = ["--start", "2026-12-01T18:00:00", "--stop", "2026-12-02T06:00:00"]

COARSE_MODEL = Path(LANTERN).read_text().replace('"311.370158241234"', '"311.37"')
EXPIRED_MODEL = Path(LANTERN).read_text().replace('start_mjd_tdb = "61000"',
                                                  'start_mjd_tdb = "60000"').replace(
    'end_mjd_tdb = "62000"', 'end_mjd_tdb = "60500"')
UNITLESS_CONFIG = demo_config(Path("out"), 5555, 5556).replace('energy_min = "1 TeV"',
                                                               "energy_min = 500")
TYPO_CONFIG = demo_config(Path("out"), 5555, 5556).replace("windows_minutes", "window_minutes")


@pytest.fixture
def scratch(tmp_path):
    """Files a careless user might have lying around."""
    (tmp_path / "coarse.toml").write_text(COARSE_MODEL)
    (tmp_path / "expired.toml").write_text(EXPIRED_MODEL)
    (tmp_path / "unitless.toml").write_text(UNITLESS_CONFIG)
    (tmp_path / "typo.toml").write_text(TYPO_CONFIG)
    expired = demo_config(tmp_path / "out", 5555, 5556).replace(
        data_file("lantern.toml"), str(tmp_path / "expired.toml"))
    (tmp_path / "expired-config.toml").write_text(expired)
    moved = demo_config(tmp_path / "out", 5555, 5556).replace(
        data_file("lantern.toml"), str(tmp_path / "moved.toml"))
    (tmp_path / "moved-model.toml").write_text(moved)
    (tmp_path / "not-output").mkdir()
    (tmp_path / "not-output" / "notes.txt").write_text("hello\n")
    return tmp_path


MISTAKES = [
    # (name, argv, texts that must appear in the output, exit status or None: any non-zero)
    ("table without a site", ["table", "--model", LANTERN, *NIGHT], ["--site"], 2),
    ("tag without a site", ["tag", "events.arrow", "--model", LANTERN, "--out", "x.arrow"],
     ["--site"], 2),
    ("simulate an unknown fault", ["simulate", "--fault", "bogus"], ["--fault", "bogus"], 2),
    ("simulate starting 'tonight'", ["simulate", "--start", "tonight"], ["--start", "tonight"],
     2),
    ("simulate to a host without tcp://", ["simulate", "--endpoint", "localhost:5555"],
     ["--endpoint", "localhost:5555"], 2),
    ("table until 'yesterday'", ["table", "--model", LANTERN, "--site", SITE, "--start",
                                 "2026-12-01T18:00:00", "--stop", "yesterday"],
     ["--stop", "yesterday"], 2),
    ("table stopping before it starts", ["table", "--model", LANTERN, "--site", SITE,
                                         "--start", "2026-12-02T06:00:00", "--stop",
                                         "2026-12-01T18:00:00", "--table-cache", "{tmp}/t"],
     ["--stop", "after --start"], 2),
    ("table for 2060", ["table", "--model", LANTERN, "--site", SITE, "--start",
                        "2060-12-01T18:00:00", "--stop", "2060-12-02T06:00:00",
                        "--table-cache", "{tmp}/t"], ["2060-12-01", "2053-10-09"], 2),
    ("a site file that is a model", ["table", "--model", LANTERN, "--site", LANTERN, *NIGHT],
     ["lantern.toml", "site"], 2),
    ("a model file that is missing", ["table", "--model", "{tmp}/nothing.toml", "--site",
                                      SITE, *NIGHT], ["--model", "nothing.toml"], 2),
    ("a model file that is a template", ["table", "--model", data_file("lantern-template.toml"),
                                         "--site", SITE, *NIGHT],
     ["a pulse template", "not a spin model"], 2),
    ("inspect a TOML file", ["inspect", SITE], ["corvid-ridge.toml"], 2),
    ("inspect a folder that does not exist", ["inspect", "{tmp}/nowhere"], ["nowhere"], 2),
    ("demo with an unknown fault", ["demo", "--fault", "bogus", "--out-dir", "{tmp}/d"],
     ["--fault", "bogus"], 2),
    ("demo for minus five seconds", ["demo", "--seconds", "-5", "--out-dir", "{tmp}/d"],
     ["--seconds", "-5"], 2),
    ("watch a service that is not there", ["watch", "--endpoint", "tcp://127.0.0.1:9",
                                           "--once", "--wait", "0.5"],
     ["tcp://127.0.0.1:9"], 1),
    ("watch a folder that does not exist", ["watch", "--folder", "{tmp}/nowhere"],
     ["nowhere"], 2),
    ("report on a folder that is not output", ["report", "{tmp}/not-output"],
     ["not-output", "not a turnstamp output folder"], 2),
    ("report every zero seconds", ["report", "{tmp}/not-output", "--every", "0"],
     ["--every"], 2),
    ("run with an energy without its unit", ["run", "{tmp}/unitless.toml"],
     ["energy_min", "500", "no unit"], 2),
    ("run with a misspelt key", ["run", "{tmp}/typo.toml"], ["window_minutes", "unknown field"],
     2),
    ("run with a model file that was moved", ["run", "{tmp}/moved-model.toml"],
     ["targets.", ".models = ", "moved.toml", "cannot read"], 2),
    ("check a file that does not exist", ["check", "{tmp}/nowhere.toml"], ["nowhere.toml"],
     2),
    ("check with a model that expired", ["check", "{tmp}/expired-config.toml", "--night",
                                         "2026-12-01"],
     ["target lantern", "no spin model is valid"], 1),
    ("model summary of a missing file", ["model", "summary", "{tmp}/nothing.toml"],
     ["nothing.toml"], 2),
    ("stack a folder without a checkpoint", ["stack", "{tmp}/not-output"],
     ["not-output", "checkpoint"], 2),
]

WARNINGS = [
    # (name, argv, texts that must appear on stdout): exit 0, but the warning is visible
    ("a frequency with too few digits", ["model", "check", "{tmp}/coarse.toml"],
     ["warning", "frequency_hz = 311.37", "cycles"]),
    ("a model summary with too few digits", ["model", "summary", "{tmp}/coarse.toml"],
     ["warning", "frequency_hz = 311.37"]),
]


def run(argv: list[str], tmp: Path, capsys) -> tuple[int, str]:
    argv = [a.replace("{tmp}", str(tmp)) for a in argv]
    try:
        status = main(argv)
    except SystemExit as exit_:  # argparse's own refusals
        status = exit_.code
    captured = capsys.readouterr()
    return status, captured.out + captured.err


@pytest.mark.parametrize("name, argv, texts, status", MISTAKES, ids=[m[0] for m in MISTAKES])
def test_a_mistake_is_explained_in_one_line(name, argv, texts, status, scratch, capsys,
                                            monkeypatch):
    monkeypatch.chdir(scratch)
    started = time.monotonic()
    got, text = run(argv, scratch, capsys)
    assert got != 0 and (status is None or got == status), (name, got, text)
    assert "Traceback" not in text, text
    for expected in texts:
        assert expected.replace("{tmp}", str(scratch)) in text, (name, expected, text)
    assert time.monotonic() - started < 60  # no mistake hangs


@pytest.mark.parametrize("name, argv, texts", WARNINGS, ids=[w[0] for w in WARNINGS])
def test_a_doubtful_input_is_warned_about(name, argv, texts, scratch, capsys):
    got, text = run(argv, scratch, capsys)
    assert got == 0 and "Traceback" not in text
    for expected in texts:
        assert expected in text, (name, expected, text)


def test_there_are_about_twenty_mistakes():
    assert len(MISTAKES) + len(WARNINGS) >= 20
