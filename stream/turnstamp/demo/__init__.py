"""The demo: an invented scenario, its simulated nights and the live run.

This package module is the scenario itself: Corvid Ridge is an invented site
with an invented gamma-ray array (the Kestrel array); Lantern (a bright
millisecond pulsar) and Ember (a young pulsar in a binary, not pulsing in the
simulation) are invented too. Their model and template files ship in
``turnstamp/data``. Beside it: ``simulator`` (a simulated night published over
ZeroMQ: ``turnstamp simulate``) and ``live`` (service and simulator together on
loopback: ``turnstamp demo``).
"""

from __future__ import annotations

from importlib import resources

from ..config import SiteConfig

__all__ = ["DEMO_SITE", "data_file", "site_toml", "lantern_toml"]

DEMO_SITE = SiteConfig(name="Corvid Ridge", latitude_deg=36.78, longitude_deg=-104.23,
                       height_m=2340.0)


def data_file(name: str) -> str:
    """Path of a file shipped in turnstamp/data."""
    return str(resources.files("turnstamp") / "data" / name)


def site_toml(site=DEMO_SITE) -> str:
    """The [site] table of a configuration file for ``site``."""
    return (f'[site]\nname = "{site.name}"\nlatitude_deg = {site.latitude_deg}\n'
            f"longitude_deg = {site.longitude_deg}\nheight_m = {site.height_m}\n")


def lantern_toml(model: str | None = None, region_radius_deg: float = 1.5,
                 recipes: str = "") -> str:
    """A [[targets]] table for the invented pulsar Lantern, with its template."""
    return (f'[[targets]]\nname = "lantern"\nmodels = ["{model or data_file("lantern.toml")}"]\n'
            f'template = "{data_file("lantern-template.toml")}"\n'
            f"region_radius_deg = {region_radius_deg}\n{recipes}")
