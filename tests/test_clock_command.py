"""``turnstamp clock``: the morning-after check of an offline-tagged archive and of a
service output folder, in words (UTC times) and in JSON.

The nights come from the project's simulator through the whole chain (site, barycentre,
spin model), so that the command is exercised on real archive files; the statistics
behind the verdicts are checked in tests/core with the tests' own sampler.
"""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pytest

from turnstamp.commands.main import main
from turnstamp.demo import data_file


def _events_file(path, demo_env, lantern, night_start_tt, fault: str, seconds: float = 1200):
    from turnstamp.core.simulate import Fault, NightPlan, simulate_night

    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=seconds, pulsed_rate_hz=120,
                     background_rate_hz=300, template=lantern.template, fault=Fault(fault),
                     batch_seconds=60, seed=21)
    batches = list(simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps))
    table = pa.table({
        "event_id": np.concatenate([b.event_id for b in batches]),
        "time_ns": np.concatenate([b.time_ns for b in batches]),
    })
    with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table)
    return batches


@pytest.mark.slow
def test_clock_on_an_offline_tagged_archive(tmp_path, capsys, demo_env, lantern,
                                            night_start_tt, demo_site_file):
    # issue 11: the report of an offline archive said "no clock-chain check"; the
    # command names a 200 µs offset from the archive alone
    events, tagged = tmp_path / "events.arrow", tmp_path / "tagged.arrow"
    _events_file(events, demo_env, lantern, night_start_tt, "offset")
    model, template = data_file("lantern.toml"), data_file("lantern-template.toml")
    assert main(["tag", str(events), "--model", model, "--site", demo_site_file,
                 "--out", str(tagged), "--quiet"]) == 0
    capsys.readouterr()
    assert main(["clock", str(tagged), "--model", model, "--template", template,
                 "--site", demo_site_file, "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    (row,) = data["targets"]
    assert (row["status"], row["kind"]) == ("FAIL", "offset"), row["lines"]
    assert row["size"]["unit"] == "µs"
    assert row["size"]["value"] == pytest.approx(200.0, abs=5 * row["size"]["sigma"])
    assert row["mistake_s"] is None and data["clock"] is None
    assert row["offsets_fitted_to"] == "event phases"  # not their 20 harmonics
    arrivals = [c["arrival_tdb_ns"] for c in row["chunks"] if c["detected"]]
    assert arrivals and all(isinstance(t, int) for t in arrivals)
    # in words, with UTC calendar times
    assert main(["clock", str(tagged), "--model", model, "--template", template,
                 "--site", demo_site_file, "--quiet"]) == 0
    text = capsys.readouterr().out
    assert text.startswith("Lantern (all):") and "FAIL: constant offset" in text  # the model's name
    assert "Z." in text or "Z)" in text or "Z " in text  # a UTC calendar time


@pytest.mark.slow
def test_clock_on_a_service_folder_names_tai_given_as_utc(tmp_path, capsys, demo_env, lantern,
                                                          night_start_tt, demo_site_file):
    from turnstamp.core.pipeline import Pipeline, PipelineSettings
    from turnstamp.files import schemas
    from turnstamp.files.outputs import archive_tables
    from turnstamp.files.writer import RotatingArrowWriter

    batches = _events_file(tmp_path / "events.arrow", demo_env, lantern, night_start_tt,
                           "scale")
    pipeline = Pipeline(PipelineSettings(leaps=demo_env.leaps), [lantern])
    folder = tmp_path / "night"
    folder.mkdir()
    metadata = {"recipes_by_target": json.dumps({"lantern": ["all", "hard"]})}
    with RotatingArrowWriter(folder, "archive", schemas.ARCHIVE, metadata=metadata) as writer:
        for batch in batches:
            result = pipeline.feed(batch)
            for table in archive_tables([batch], [result], pipeline.targets):
                writer.write(table)
    assert main(["clock", str(folder), "--model", f"lantern={data_file('lantern.toml')}",
                 "--template", f"lantern={data_file('lantern-template.toml')}",
                 "--site", demo_site_file, "--json"]) == 0
    (row,) = json.loads(capsys.readouterr().out)["targets"]
    assert (row["status"], row["kind"], row["mistake_s"]) == ("FAIL", "offset", 37.0), \
        row["lines"]


def test_clock_refuses_what_it_cannot_use(tmp_path, capsys, demo_site_file):
    model, template = data_file("lantern.toml"), data_file("lantern-template.toml")
    assert main(["clock", str(tmp_path / "missing.arrow"), "--model", model,
                 "--template", template, "--site", demo_site_file]) == 2
    assert "archive" in capsys.readouterr().err
    bad = tmp_path / "bad.arrow"
    table = pa.table({"x": [1]})
    with pa.OSFile(str(bad), "wb") as sink, pa.ipc.new_file(sink, table.schema) as writer:
        writer.write_table(table)
    assert main(["clock", str(bad), "--model", model, "--template", template,
                 "--site", demo_site_file]) == 2
    assert "not an archive" in capsys.readouterr().err


def test_clock_names_the_option_of_a_wrong_file(tmp_path, capsys, demo_env, lantern,
                                                night_start_tt, demo_site_file):
    model, template = data_file("lantern.toml"), data_file("lantern-template.toml")
    events, tagged = tmp_path / "events.arrow", tmp_path / "tagged.arrow"
    _events_file(events, demo_env, lantern, night_start_tt, "none", seconds=60)
    assert main(["tag", str(events), "--model", model, "--site", demo_site_file,
                 "--out", str(tagged), "--quiet"]) == 0
    capsys.readouterr()
    common = ["clock", str(tagged), "--site", demo_site_file]
    assert main([*common, "--model", model, "--template", str(tmp_path / "none.toml")]) == 2
    assert "--template = " in capsys.readouterr().err
    assert main([*common, "--model", model, "--template", model]) == 2
    assert "this is a spin model" in capsys.readouterr().err  # not a list of unknown fields
    assert main([*common, "--model", template, "--template", template]) == 2
    assert "this is a pulse template" in capsys.readouterr().err
