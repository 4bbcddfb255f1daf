"""``turnstamp report``: a simulated night written as the service writes it, then the report.

The night is fed through the core pipeline and written with the real writers (no
service): archive rows per batch, significance and profile rows every 30 s of event
time, clock rows every 60 s, a ledger row per message, rejects, and a status.json.
The checks compare the numbers behind every figure (report-data.json) with the Arrow
files, and a headless browser opens the page offline.
"""

from __future__ import annotations

import argparse
import base64
import io
import json
import os
import re
import shutil
import subprocess

import numpy as np
import pyarrow as pa
import pytest

from turnstamp.core.flags import Quality
from turnstamp.core.pipeline import Pipeline, PipelineSettings
from turnstamp.core.simulate import NightPlan, simulate_night
from turnstamp.core.timebase import NS_PER_S, Scale, from_tt
from turnstamp.demo import data_file
from turnstamp.files import outputs, schemas
from turnstamp.files.durable import atomic_write_json
from turnstamp.files.reader import read_stream
from turnstamp.files.writer import RotatingArrowWriter
from turnstamp.views.report import build_report, report_main

pytest.importorskip("matplotlib")

NIGHT_SECONDS = 240
STATS_EVERY_NS = 30 * NS_PER_S
CLOCK_EVERY_NS = 60 * NS_PER_S
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def _lantern_config():
    from turnstamp.config import RecipeConfig, TargetConfig

    return TargetConfig(
        name="lantern", models=[data_file("lantern.toml")],
        template=data_file("lantern-template.toml"), region_radius_deg=1.5,
        recipes=[RecipeConfig(name="all"),
                 RecipeConfig(name="hard", energy_min="1 TeV", max_distance_deg=0.3,
                              min_score=0.5, use_weights=True)])


def _utc_label(env, tt_ns: int) -> int:
    return int(from_tt(np.array([tt_ns], np.int64), Scale.UTC, env.leaps)[0][0])


def _status(pipeline, env, computed_at, rates, clock, state):
    counters = pipeline.counters
    targets = []
    for name, target in pipeline.targets.items():
        recipes = []
        sig = pipeline.significance()
        prof = {p["recipe"]: p for p in pipeline.profiles()}
        for recipe in target.recipes:
            rows = [r for r in sig if r["recipe"] == recipe.name]
            recipes.append({
                "name": recipe.name, "weighted": recipe.use_weights,
                "events": rows[0]["events"], "events_per_s": rates,
                "windows": {r["window"]: {"events": r["events"], "h": r["h_statistic"],
                                          "harmonics": r["h_harmonics"], "sigma": r["h_sigma"],
                                          "sigma_post_trials": r["h_sigma_post_trials"]}
                            for r in rows},
                "profile": {"counts": prof[recipe.name]["counts"],
                            "errors": prof[recipe.name]["errors"]}})
        verdict = clock[0][2]
        targets.append({"name": name, "model_ids": list(target.tagger.model_ids),
                        "frequency_hz": pipeline.frequency_hz(name), "recipes": recipes,
                        "clock": {"recipe": clock[0][1], "status": verdict.status,
                                  "kind": verdict.kind, "lines": verdict.lines}})
    return {"format": "turnstamp.status", "version": 1, "computed_at_utc_ns": computed_at,
            "started_utc": "2026-12-02T02:00:00", "state": state,
            "counters": {"messages_received": 0, "messages_rejected": 0,
                         "events_received": counters.events_received,
                         "events_tagged": counters.events_tagged,
                         "events_filtered": counters.events_filtered,
                         "events_rejected": counters.events_rejected,
                         "missing_messages": 0, "duplicate_messages": 0},
            "rejected_by_reason": dict(counters.rejected_by_reason), "events_per_s": rates,
            "sources": {"simulator": {"messages": 0, "events": counters.events_received,
                                      "last_sequence": 0, "missing": 0}},
            "targets": targets, "trials": pipeline.trials,
            "warnings": ["simulated night for the report tests"]}


@pytest.fixture(scope="module")
def night(tmp_path_factory, demo_env, lantern_table, night_start_tt):
    """A 4-minute simulated night in an output folder, as the service would leave it.

    Also builds a report of the folder half-way through, while the writers are still
    open (files without footers), as ``turnstamp report --every`` would.
    """
    from turnstamp.assemble import build_target

    folder = tmp_path_factory.mktemp("night") / "out"
    config = _lantern_config()
    target = build_target(config)
    target.tagger.table = lantern_table
    pipeline = Pipeline(PipelineSettings(
        leaps=demo_env.leaps, windows_ns=(60 * NS_PER_S, 120 * NS_PER_S),
        clock_chunk_ns=30 * NS_PER_S), [target])
    metadata = {**demo_env.provenance(),
                "config": json.dumps({"targets": [config.model_dump(mode="json")]}),
                "models": json.dumps({"lantern": list(target.tagger.model_ids)}),
                "recipes_by_target": json.dumps({"lantern": [r.name for r in target.recipes]}),
                "table": json.dumps(dict(lantern_table.provenance))}
    writers = {stem: RotatingArrowWriter(folder, stem, schema, metadata=metadata)
               for stem, schema in schemas.OUTPUTS.items()}
    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=NIGHT_SECONDS, pulsed_rate_hz=25,
                     background_rate_hz=2500, template=target.template, batch_seconds=5,
                     seed=20261202)
    next_stats = night_start_tt + STATS_EVERY_NS
    next_clock = night_start_tt + CLOCK_EVERY_NS
    live_report = None
    last = None
    for batch in simulate_night(plan, target.tagger, target.position, demo_env.leaps):
        if batch.sequence == 3:
            batch.time_ns[:4] = np.iinfo(np.int64).min  # a broken time stamp: bad_time
        result = pipeline.feed(batch)
        received = _utc_label(demo_env, result.last_tt_ns) + 2 * NS_PER_S
        if "lantern" in result.archive:
            writers["archive"].write(outputs.archive_table(
                result.archive["lantern"], batch.source, batch.sequence, "lantern",
                target.tagger.model_ids))
        if result.rejected:
            writers["rejects"].write(outputs.rejects_table(batch, result, received, 1000))
        writers["ledger"].write(outputs.ledger_table([{
            "received_utc_ns": received, "source": batch.source, "sequence": batch.sequence,
            "outcome": "accepted", "events": result.events, "tagged": result.tagged,
            "filtered": result.filtered, "rejected": result.rejected, "missing_before": 0,
            "first_tt_ns": result.first_tt_ns, "last_tt_ns": result.last_tt_ns}]))
        last = result.last_tt_ns
        if last >= next_stats:
            writers["significance"].write(outputs.rows_table(
                pipeline.significance(), schemas.SIGNIFICANCE, computed_at_utc_ns=received))
            writers["profiles"].write(outputs.rows_table(
                pipeline.profiles(), schemas.PROFILES, computed_at_utc_ns=received))
            next_stats += STATS_EVERY_NS
        if last >= next_clock:
            writers["clock"].write(outputs.clock_table(pipeline.clock_check(), received))
            next_clock += CLOCK_EVERY_NS
        if live_report is None and last >= night_start_tt + NIGHT_SECONDS * NS_PER_S // 2:
            live_report = build_report(folder, folder.parent / "live-report")
    computed = _utc_label(demo_env, last) + 2 * NS_PER_S
    writers["significance"].write(outputs.rows_table(
        pipeline.significance(), schemas.SIGNIFICANCE, computed_at_utc_ns=computed))
    writers["profiles"].write(outputs.rows_table(
        pipeline.profiles(), schemas.PROFILES, computed_at_utc_ns=computed))
    clock = pipeline.clock_check()
    writers["clock"].write(outputs.clock_table(clock, computed))
    for writer in writers.values():
        writer.close()
    atomic_write_json(folder / "status.json",
                            _status(pipeline, demo_env, computed, 1000.0, clock, "stopped"))
    assert pipeline.counters.reconciles() and pipeline.counters.events_rejected == 4
    return {"folder": folder, "live_report": live_report, "pipeline": pipeline}


@pytest.fixture(scope="module")
def report(night):
    index = build_report(night["folder"])
    data = json.loads((index.parent / "report-data.json").read_text())
    return {"index": index, "html": index.read_text(encoding="utf-8"), "data": data}


def _archive_expectation(folder, recipe_bit, weighted):
    archive = read_stream(folder, "archive")
    flags = archive["recipe_flags"].to_numpy()
    usable = (archive["quality_flags"].to_numpy() & Quality.OUTSIDE_MODEL_VALIDITY) == 0
    chosen = usable & ((flags >> recipe_bit) & 1 == 1)
    weights = archive["weight"].to_numpy().astype(np.float64)
    return float(weights[chosen].sum()) if weighted else float(chosen.sum())


def test_the_page_is_self_contained_with_every_figure_beside_it(report):
    page = report["html"]
    assert report["index"].name == "index.html"
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:|//)""", page)
    assert "<link" not in page and "@import" not in page and "url(" not in page
    images = re.findall(r"<img [^>]*src=\"([^\"]*)\"", page)
    assert len(images) == 4  # profile, phase-time map, significance, clock
    for src in images:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1]).startswith(PNG_MAGIC)
    for name in report["data"]["figures"]:
        png = report["index"].parent / name
        assert png.stat().st_size > 1000 and png.read_bytes().startswith(PNG_MAGIC)
    assert sorted(report["data"]["figures"]) == sorted(
        ["lantern-profile.png", "lantern-phase-time-map.png", "lantern-significance.png",
         "lantern-clock.png"])
    assert "http-equiv=\"refresh\"" not in page  # only with --every
    for stem in ("profile", "phase-time-map", "significance", "clock"):
        assert f'<figure id="lantern-{stem}">' in page
    assert 'alt="lantern phase-time map"' in page


def test_profile_and_phase_time_map_sum_to_the_archive_weights_of_each_recipe(night, report):
    lantern = report["data"]["targets"]["lantern"]
    assert lantern["recipes"] == ["all", "hard"]
    for bit, (recipe, weighted) in enumerate([("all", False), ("hard", True)]):
        expected = _archive_expectation(night["folder"], bit, weighted)
        profile = lantern["profile"][recipe]
        assert profile["weighted"] is weighted
        assert profile["source"] == "profiles stream (last row)"
        # archive weights are float32: sums agree to float32 rounding
        assert sum(profile["counts"]) == pytest.approx(expected, rel=1e-6)
        time_map = lantern["phase_time_map"][recipe]
        assert time_map["total"] == pytest.approx(expected, rel=1e-6)
        assert np.sum(time_map["counts"]) == pytest.approx(expected, rel=1e-6)
        assert len(time_map["counts"][0]) == profile["bins"] == 32
    # a template is configured: the fitted offset is drawn, and it is small (clean night)
    assert abs(lantern["profile"]["all"]["template_shift_cycles"]) < 0.02


def test_significance_curves_end_at_the_last_significance_rows(night, report):
    rows = read_stream(night["folder"], "significance").to_pylist()
    curves = report["data"]["targets"]["lantern"]["significance"]
    for recipe in ("all", "hard"):
        assert set(curves[recipe]["windows"]) == {"cumulative", "1min", "2min"}
        for window, series in curves[recipe]["windows"].items():
            last = [r for r in rows if r["recipe"] == recipe and r["window"] == window][-1]
            assert series["h_sigma"][-1] == pytest.approx(last["h_sigma"], rel=1e-12)
            assert series["h_sigma_post_trials"][-1] == pytest.approx(
                last["h_sigma_post_trials"], rel=1e-12)
            assert series["data_until_tt_ns"][-1] == last["data_until_tt_ns"]
            hours = np.asarray(series["utc_hours"])
            assert np.all((hours > 1.99) & (hours < 2.1))  # 02:00-02:04 UTC
        fit = curves[recipe]["sqrt_t_fit"]
        assert fit is not None and fit["sigma_per_sqrt_s"] > 0
    assert curves["all"]["windows"]["cumulative"]["h_sigma"][-1] > 5  # a bright pulsar


def test_accounting_equals_the_ledger_and_reconciles(night, report):
    ledger = read_stream(night["folder"], "ledger")
    accounting = report["data"]["accounting"]
    total = accounting["total"]
    for column in ("events", "tagged", "filtered", "rejected"):
        assert total[column] == pa.compute.sum(ledger[column]).as_py()
    assert total["messages"] == ledger.num_rows
    assert accounting["sources"]["simulator"]["events"] == total["events"]
    assert accounting["rejected_by_reason"] == [
        {"source": "simulator", "reason": "bad_time", "rows": 4, "events": 4}]
    assert accounting["reconciles"] and all(c["ok"] for c in accounting["checks"])
    assert len(accounting["checks"]) >= 4
    counters = night["pipeline"].counters
    assert total["events"] == counters.events_received
    assert f"{total['events']:,}" in report["html"] and "MISMATCH" not in report["html"]


def test_clock_check_and_provenance_are_shown(night, report):
    clock = report["data"]["targets"]["lantern"]["clock"]
    last = read_stream(night["folder"], "clock").to_pylist()[-1]
    assert clock["status"] == last["status"] and clock["kind"] == last["kind"]
    frequency = json.loads(last["verdict_json"])["frequency_hz"]
    np.testing.assert_allclose(clock["offset_us"],
                               np.asarray(last["chunk_shift_cycles"]) / frequency * 1e6)
    assert clock["tolerance_us"] == pytest.approx(last["tolerance_cycles"] / frequency * 1e6)
    page = report["html"]
    assert "Clock-chain check" in page and last["summary"].splitlines()[0][:40] in page
    provenance = report["data"]["provenance"]
    assert "lantern-2026a (valid MJD 61000 to 62000 (TDB))" in provenance["spin models"]
    assert "Corvid Ridge" in provenance["site"]
    assert "segments of 60 min, degree 10" in provenance["barycentre table"]
    assert provenance["software"].startswith("turnstamp ")
    assert "<details><summary>configuration</summary>" in page


def test_a_live_folder_with_open_files_gives_a_report(night):
    live = night["live_report"]
    assert live is not None and live.exists()
    data = json.loads((live.parent / "report-data.json").read_text())
    notes = " ".join(data["notes"])
    assert "Open or cut-short files" in notes
    assert data["targets"]["lantern"]["phase_time_map"]["all"]["total"] > 0


class FakeTerminal(io.StringIO):
    """A text stream that says it is a terminal."""

    def isatty(self):
        return True


def test_report_main_builds_once_or_repeats_with_a_self_refreshing_page(night, tmp_path,
                                                                        monkeypatch, capsys):
    args = argparse.Namespace(output_dir=str(night["folder"]), out_dir=str(tmp_path / "once"),
                              every=None)
    assert report_main(args) == 0
    assert capsys.readouterr().out.strip().endswith("index.html")

    def interrupt(seconds):
        raise KeyboardInterrupt

    monkeypatch.setattr("turnstamp.views.report.command.time.sleep", interrupt)
    terminal = FakeTerminal()  # standard error on a terminal: progress bars
    monkeypatch.setattr("sys.stderr", terminal)
    args = argparse.Namespace(output_dir=str(night["folder"]), out_dir=str(tmp_path / "every"),
                              every=30.0)
    assert report_main(args) == 0
    page = (tmp_path / "every" / "index.html").read_text()
    assert '<meta http-equiv="refresh" content="30">' in page
    assert "wrote" in capsys.readouterr().out
    assert "building the report" in terminal.getvalue() and "next report" in terminal.getvalue()
    monkeypatch.undo()
    missing = argparse.Namespace(output_dir=str(tmp_path / "nowhere"), out_dir=None, every=None)
    assert report_main(missing) == 2
    assert "no such output folder" in capsys.readouterr().err


def test_offline_tagging_output_alone_gives_a_report(tmp_path, demo_env, lantern,
                                                     night_start_tt):
    from turnstamp.commands.main import main

    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=120, pulsed_rate_hz=40,
                     background_rate_hz=400, template=lantern.template, seed=4)
    batches = list(simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps))
    columns = {name: np.concatenate([b.columns()[name] for b in batches])
               for name in ("event_id", "time_ns", "energy_kev", "weight")}
    events = pa.table(columns)
    source = tmp_path / "events.arrow"
    with pa.OSFile(str(source), "wb") as sink, pa.ipc.new_file(sink, events.schema) as w:
        w.write_table(events, max_chunksize=5000)
    folder = tmp_path / "tagged"
    assert main(["tag", str(source), "--model", data_file("lantern.toml"),
                 "--site", data_file("corvid-ridge.toml"), "--out",
                 str(folder / "night-of-dec-2.arrow"), "--target", "lantern", "--quiet"]) == 0
    index = build_report(folder)
    data = json.loads((index.parent / "report-data.json").read_text())
    assert data["mode"] == "tagging"
    target = data["targets"]["lantern"]
    assert target["recipes"] == ["all"]
    archive = pa.ipc.open_file(str(folder / "night-of-dec-2.arrow")).read_all()
    assert sum(target["profile"]["all"]["counts"]) == archive.num_rows  # unweighted recipe
    assert target["profile"]["all"]["source"] == "archive rows"
    assert target["phase_time_map"]["all"]["total"] == archive.num_rows
    curve = target["significance"]["all"]
    assert curve["source"] == "computed from the archive rows"
    # the last point of the computed curve equals the H-test of the whole file
    from turnstamp.core.moments import PhaseMoments
    from turnstamp.core.periodicity import h_test
    from turnstamp.core.significance import sigma_from_log_p

    moments = PhaseMoments().update(archive["phase"].to_numpy())
    expected = sigma_from_log_p(min(h_test(moments).log_p, 0.0))
    assert curve["windows"]["cumulative"]["h_sigma"][-1] == pytest.approx(expected, rel=1e-9)
    assert target["clock"] is None
    assert sorted(data["figures"]) == ["lantern-phase-time-map.png", "lantern-profile.png",
                                       "lantern-significance.png"]
    notes = " ".join(data["notes"])
    assert "Offline tagging output" in notes and "no clock-chain check" in notes
    page = index.read_text()
    assert "No ledger" in page


def test_without_matplotlib_the_report_says_how_to_install_it(tmp_path, monkeypatch, capsys):
    import sys

    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import matplotlib now fails
    args = argparse.Namespace(output_dir=str(tmp_path), out_dir=None, every=None)
    assert report_main(args) == 2
    assert "pip install 'turnstamp[report]'" in capsys.readouterr().err


def test_numbers_that_do_not_add_up_get_a_red_note(tmp_path):
    # a folder with only a ledger and a status, as after a crash that lost the other streams
    folder = tmp_path / "out"
    with RotatingArrowWriter(folder, "ledger", schemas.LEDGER) as ledger:
        ledger.write(outputs.ledger_table([
            {"received_utc_ns": 1, "source": "kestrel-builder-1", "sequence": 0,
             "outcome": "accepted", "events": 10, "tagged": 5, "filtered": 2, "rejected": 2,
             "missing_before": 0, "first_tt_ns": 5, "last_tt_ns": 9},
            {"received_utc_ns": 2, "source": None, "sequence": None,
             "outcome": "undecodable", "events": 0, "tagged": 0, "filtered": 0, "rejected": 0,
             "missing_before": 0, "first_tt_ns": None, "last_tt_ns": None}]))
    atomic_write_json(folder / "status.json", {"state": "running", "counters": {
        "events_received": 10, "events_tagged": 5, "events_filtered": 2,
        "events_rejected": 3}})
    index = build_report(folder)
    data = json.loads((index.parent / "report-data.json").read_text())
    accounting = data["accounting"]
    assert not accounting["reconciles"]
    assert [c["ok"] for c in accounting["checks"]] == [False, False, True]
    assert accounting["refused_messages_by_reason"] == {"undecodable": 1}
    assert accounting["sources"]["(header unreadable)"]["refused_messages"] == 1
    page = index.read_text()
    assert 'class="bad">The numbers do not reconcile' in page and "MISMATCH" in page
    assert data["figures"] == [] and data["targets"] == {}
    assert "No archive stream in the folder" in " ".join(data["notes"])


def _browser() -> str | None:
    for name in ("/usr/bin/chromium", "chromium", "chromium-browser", "google-chrome"):
        found = shutil.which(name)
        if found:
            return found
    return None


def _browser_command(binary, profile, *extra):
    return [binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
            "--no-first-run", "--disable-background-networking", "--disable-component-update",
            "--disable-sync", "--disable-dev-shm-usage", "--hide-scrollbars",
            f"--user-data-dir={profile}", *extra]


@pytest.mark.browser
def test_a_headless_browser_shows_the_page_and_every_image(report, tmp_path):
    binary = _browser()
    if binary is None:
        pytest.skip("chromium not installed: apt-get install chromium (Debian) to run this")
    url = report["index"].resolve().as_uri()
    env = {**os.environ, "HOME": str(tmp_path)}
    dom = subprocess.run(
        _browser_command(binary, tmp_path / "profile-dom", "--virtual-time-budget=10000",
                         "--dump-dom", url),
        capture_output=True, text=True, timeout=120, env=env, check=False)
    assert dom.returncode == 0, dom.stderr[-2000:]
    total = re.search(r'data-images-total="(\d+)"', dom.stdout)
    loaded = re.search(r'data-images-loaded="(\d+)"', dom.stdout)
    assert total and loaded, "the page's load script did not run:\n" + dom.stdout[:500]
    assert int(total.group(1)) == 4 and int(loaded.group(1)) == 4

    screenshot = tmp_path / "page.png"
    shot = subprocess.run(
        _browser_command(binary, tmp_path / "profile-shot", f"--screenshot={screenshot}",
                         "--window-size=1400,3000", url),
        capture_output=True, text=True, timeout=120, env=env, check=False)
    assert shot.returncode == 0 and screenshot.exists(), shot.stderr[-2000:]
    from matplotlib.image import imread

    pixels = imread(str(screenshot))[..., :3]
    assert pixels.shape[0] == 3000 and pixels.shape[1] == 1400
    assert float(pixels.std()) > 0.05  # not blank
    colours = np.unique((pixels[::4, ::4] * 255).astype(np.uint8).reshape(-1, 3), axis=0)
    assert len(colours) > 50  # figures, text and tables, not one flat colour
