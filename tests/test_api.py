"""The small public API at the package top, for people who script."""

import math
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pytest

import turnstamp
from turnstamp.commands.main import main
from turnstamp.core.peaks import PeakComponent
from turnstamp.core.simulate import NightPlan, simulate_night
from turnstamp.core.template import PulseTemplate
from turnstamp.demo import DEMO_SITE, data_file, lantern_toml, site_toml
from turnstamp.errors import InputError


def test_import_and_help_stay_light():
    # `import turnstamp` and building the whole command line load none of the heavy
    # libraries: each function and command imports what it needs when it runs.
    code = ("import sys, turnstamp\n"
            "from turnstamp.commands.main import build_parser\n"
            "build_parser()\n"
            "heavy = ('numpy', 'pyarrow', 'zmq', 'astropy', 'scipy', 'pydantic')\n"
            "print(','.join(m for m in heavy if m in sys.modules))")
    loaded = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                            check=True).stdout.strip()
    assert loaded == ""
    assert set(turnstamp.__all__) >= {"load_model", "load_site", "load_template", "tag_events",
                                      "fit_offset"}


def test_load_model_site_and_template(tmp_path):
    model = turnstamp.load_model(data_file("lantern.toml"))
    assert model.model_id == "lantern-2026a" and model.target.name
    template = turnstamp.load_template(data_file("lantern-template.toml"))
    assert isinstance(template, PulseTemplate) and template.name == "lantern"
    site_only = tmp_path / "site.toml"
    site_only.write_text(site_toml())
    assert turnstamp.load_site(site_only) == DEMO_SITE
    whole = tmp_path / "service.toml"  # a full configuration: the other tables are ignored
    whole.write_text(site_toml() + lantern_toml() + '[output]\ndirectory = "out"\n')
    assert turnstamp.load_site(whole) == DEMO_SITE
    with pytest.raises(InputError, match="frequency_hz"):
        bad = tmp_path / "bad.toml"
        bad.write_text('model_id = "x"\nfrequency_hz = "-5"\n')
        turnstamp.load_model(bad)


@pytest.fixture
def events_table(demo_env, lantern, night_start_tt):
    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=60, pulsed_rate_hz=40,
                     background_rate_hz=200, template=lantern.template, seed=11)
    batches = list(simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps))
    return pa.table({name: np.concatenate([b.columns()[name] for b in batches])
                     for name in ("event_id", "time_ns", "energy_kev", "weight")})


def test_tag_events_equals_the_tag_command(tmp_path, events_table, capsys):
    source = tmp_path / "events.arrow"
    with pa.OSFile(str(source), "wb") as sink, \
            pa.ipc.new_file(sink, events_table.schema) as writer:
        writer.write_table(events_table)
    out = tmp_path / "tagged.arrow"
    assert main(["tag", str(source), "--model", data_file("lantern.toml"),
                 "--site", data_file("corvid-ridge.toml"), "--target",
                 "lantern", "--out", str(out), "--quiet"]) == 0
    capsys.readouterr()
    command = pa.ipc.open_file(str(out)).read_all()
    site = tmp_path / "site.toml"
    site.write_text(site_toml())  # the demo site, as the command above is given

    from_table = turnstamp.tag_events(events_table, data_file("lantern.toml"), site,
                                      target="lantern", source="events.arrow")
    columns = {name: events_table[name].to_numpy() for name in events_table.column_names}
    from_dict = turnstamp.tag_events(columns, [turnstamp.load_model(data_file("lantern.toml"))],
                                     DEMO_SITE, time_scale="UTC", target="lantern",
                                     source="events.arrow")
    assert command.num_rows == events_table.num_rows
    for table in (from_table, from_dict):
        assert table.equals(command, check_metadata=False)
        assert table.schema.metadata[b"models"] == b"lantern-2026a"


def test_tag_events_refuses_an_unknown_time_scale(events_table):
    with pytest.raises(InputError, match="time_scale"):
        turnstamp.tag_events(events_table, data_file("lantern.toml"), DEMO_SITE,
                             time_scale="local")


def test_tag_events_names_the_target_after_the_model(events_table):
    archive = turnstamp.tag_events(events_table.slice(0, 100), data_file("lantern.toml"),
                                   DEMO_SITE)
    assert set(archive["target"].to_pylist()) == {"Lantern"}


def test_tag_events_reads_other_time_conventions(events_table):
    # the same instants as Unix-epoch nanoseconds, and as float seconds since 1970:
    # the same phases (float seconds hold ~0.1 µs here, 3e-5 cycles at 311 Hz)
    from turnstamp.core.timebase import NS_PER_S, parse_instant

    events = events_table.slice(0, 2000)
    native = turnstamp.tag_events(events, data_file("lantern.toml"), DEMO_SITE)
    unix_ns = events["time_ns"].to_numpy() - parse_instant("1970-01-01T00:00:00")
    as_unix = events.set_column(1, "time_ns", pa.array(unix_ns))
    with pytest.raises(InputError, match="--time-origin unix"):
        turnstamp.tag_events(as_unix, data_file("lantern.toml"), DEMO_SITE)
    unix = turnstamp.tag_events(as_unix, data_file("lantern.toml"), DEMO_SITE,
                                time_origin="unix")
    assert unix["phase"].equals(native["phase"])
    seconds = events.set_column(1, "time_ns", pa.array(unix_ns / NS_PER_S))
    with pytest.raises(InputError, match="--time-unit s --time-origin unix"):
        turnstamp.tag_events(seconds, data_file("lantern.toml"), DEMO_SITE,
                             time_origin="unix")
    from_seconds = turnstamp.tag_events(seconds, data_file("lantern.toml"), DEMO_SITE,
                                        time_origin="unix", time_unit="s")
    difference = from_seconds["phase"].to_numpy() - native["phase"].to_numpy()
    assert np.max(np.abs((difference + 0.5) % 1 - 0.5)) < 1e-4
    with pytest.raises(InputError, match="time origin"):
        turnstamp.tag_events(events, data_file("lantern.toml"), DEMO_SITE, time_origin="noon")


# A template density written here, independently of turnstamp: a flat part plus one
# wrapped Gaussian peak (the normal density summed over whole turns; common practice).
PULSED_FRACTION = 0.4
PEAK_CYCLES = 0.3
WIDTH_CYCLES = 0.04


def density(phase, shift):
    turns = np.arange(-3, 4)[:, None]
    centred = (phase[None, :] - PEAK_CYCLES - shift + turns) / WIDTH_CYCLES
    peak = np.exp(-0.5 * centred**2).sum(axis=0) / (WIDTH_CYCLES * math.sqrt(2 * math.pi))
    return (1 - PULSED_FRACTION) + PULSED_FRACTION * peak


def draw_phases(n, shift, rng):
    """Inverse-CDF sampling of ``density`` on a fine grid (linear between nodes)."""
    grid = np.linspace(0.0, 1.0, 200_001)
    pdf = density(grid, shift)
    cdf = np.concatenate([[0.0], np.cumsum((pdf[1:] + pdf[:-1]) / 2 * np.diff(grid))])
    return np.interp(rng.random(n), cdf / cdf[-1], grid) % 1.0


def test_fit_offset_recovers_a_known_shift(rng):
    shift = 0.0731
    phases = draw_phases(20_000, shift, rng)
    template = PulseTemplate(name="test", unpulsed_fraction=1 - PULSED_FRACTION, components=[
        PeakComponent(shape="gaussian", position_cycles=PEAK_CYCLES, width_cycles=WIDTH_CYCLES)])
    result = turnstamp.fit_offset(phases, template)
    # 8 000 pulsed events in a 0.04-cycle peak: sigma is at least 0.04 / sqrt(8000) =
    # 4.5e-4 cycles (the error of a mean; common practice), more with the flat part.
    assert 2e-4 < result.sigma_cycles < 1e-3
    assert abs(result.offset_cycles - shift) < 5 * result.sigma_cycles
    assert result.detected and result.significance_sigma > 10
    assert result.amplitude == pytest.approx(8000, rel=0.1)
    weighted = turnstamp.fit_offset(phases, template, weights=np.ones(phases.size))
    assert weighted.offset_cycles == pytest.approx(result.offset_cycles, abs=1e-12)
    assert result.offset_us(100.0) == pytest.approx(result.offset_cycles * 1e4)
