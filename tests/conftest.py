"""Shared test set-up: astropy offline, a deterministic hypothesis profile."""

import os

import pytest
from hypothesis import HealthCheck, settings

from turnstamp.files.bundled import ensure_offline

ensure_offline()

# `ci` is deterministic so that a red run can be reproduced exactly; `dev` explores.
settings.register_profile(
    "ci", derandomize=True, max_examples=60, deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
settings.register_profile("dev", max_examples=300, deadline=None)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))


@pytest.fixture
def rng():
    import numpy as np

    return np.random.default_rng(20261201)


# -- the demo's invented world, shared by pipeline, service and report tests --------------

NIGHT_START_UTC = "2026-12-02T02:00:00"


@pytest.fixture(scope="session")
def demo_env():
    from turnstamp.assemble import Environment
    from turnstamp.demo import DEMO_SITE

    return Environment.from_site(DEMO_SITE)


@pytest.fixture(scope="session")
def night_start_tt(demo_env):
    import numpy as np

    from turnstamp.core.timebase import Scale, parse_instant, to_tt

    return int(to_tt(np.array([parse_instant(NIGHT_START_UTC)]), Scale.UTC,
                     demo_env.leaps)[0][0])


@pytest.fixture(scope="session")
def lantern_table(demo_env, night_start_tt):
    """A barycentre table for the invented pulsar over a 6-hour night."""
    from turnstamp.assemble import TableCache, build_target
    from turnstamp.config import BarycentreConfig, TargetConfig
    from turnstamp.core.timebase import NS_PER_S
    from turnstamp.demo import data_file

    setup = build_target(TargetConfig(name="lantern", models=[data_file("lantern.toml")]))
    return TableCache(None, demo_env, BarycentreConfig()).table(
        setup.position, night_start_tt - 3600 * NS_PER_S, night_start_tt + 6 * 3600 * NS_PER_S)


@pytest.fixture(scope="session")
def demo_site_file():
    """The demo's invented site as a file (``tag`` wants a site named)."""
    from turnstamp.demo import data_file

    return data_file("corvid-ridge.toml")


@pytest.fixture
def lantern(lantern_table):
    """A fresh TargetSetup for the invented pulsar with two recipes."""
    from turnstamp.assemble import build_target
    from turnstamp.config import RecipeConfig, TargetConfig
    from turnstamp.demo import data_file

    setup = build_target(TargetConfig(
        name="lantern", models=[data_file("lantern.toml")],
        template=data_file("lantern-template.toml"), region_radius_deg=1.5,
        recipes=[RecipeConfig(name="all"),
                 RecipeConfig(name="hard", energy_min="1 TeV", max_distance_deg=0.3,
                              min_score=0.5, use_weights=True)]))
    setup.tagger.table = lantern_table
    return setup


# -- a service on the demo night (tests/test_service.py, tests/service/) ------------------

ANY_PORT = "tcp://127.0.0.1:*"  # the service binds a free port and reports it
SERVICE_RECIPES = """
  [[targets.recipes]]
  name = "all"

  [[targets.recipes]]
  name = "hard"
  energy_min = "1 TeV"
  use_weights = true
"""


@pytest.fixture
def service_config(tmp_path):
    """Writes the configuration of a service on the demo night; returns its path.

    Call it as ``service_config(control=True, publish=True, intake=..., bind=...,
    curve=(server_secret_key_file, authorized_clients_directory))``, every argument
    optional. Outputs go to ``tmp_path / "out"``; the spin model is a copy in
    ``tmp_path`` (a test may edit it). Endpoints bind any free loopback port: the
    service reports the ports it got (``Service.endpoints``, ``status.json``), so no
    port is ever guessed.
    """
    import shutil

    from turnstamp.demo import data_file, lantern_toml, site_toml

    model = tmp_path / "lantern.toml"
    shutil.copy(data_file("lantern.toml"), model)

    def write(control=False, publish=False, intake=ANY_PORT, bind=True, curve=None):
        sections = []
        if curve is not None:
            sections.append(f'[intake.curve]\nserver_secret_key_file = "{curve[0]}"\n'
                            f'authorized_clients_directory = "{curve[1]}"\n')
        if control:
            sections.append(f'[control]\nendpoint = "{ANY_PORT}"\n')
        text = f"""
[intake]
endpoints = ["{intake}"]
bind = {str(bind).lower()}
max_message_bytes = 2000000
max_events_per_message = 50000

{site_toml()}
[barycentre]
cover_from = "2026-12-02T01:00:00"
cover_until = "2026-12-02T12:00:00"

{lantern_toml(model=str(model), recipes=SERVICE_RECIPES)}
[statistics]
windows_minutes = [1.0]
update_every_s = 0.2

[clock_check]
chunk_seconds = 10.0
every_s = 0.5

[output]
directory = "{tmp_path / 'out'}"
checkpoint_every_s = 0.2
{f'publish_endpoint = "{ANY_PORT}"' if publish else ""}

{"".join(sections)}"""
        path = tmp_path / "service.toml"
        path.write_text(text)
        return path

    return write
