"""The invented scenario of the demo: a site, an instrument, two pulsars.

Corvid Ridge is an invented site with an invented gamma-ray array (the Kestrel
array); Lantern (a bright millisecond pulsar) and Ember (a young pulsar in a
binary, not pulsing in the simulation) are invented too. Their model and
template files ship in ``phasetag/data``.
"""

from __future__ import annotations

from importlib import resources

from .config import SiteConfig

__all__ = ["DEMO_SITE", "data_file"]

DEMO_SITE = SiteConfig(name="Corvid Ridge", latitude_deg=36.78, longitude_deg=-104.23,
                       height_m=2340.0)


def data_file(name: str) -> str:
    """Path of a file shipped in phasetag/data."""
    return str(resources.files("phasetag") / "data" / name)
