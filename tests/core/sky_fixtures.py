"""The invented sky position and night shared by the barycentre and table tests."""

import numpy as np

from turnstamp.core.barycentre import SkyPosition
from turnstamp.core.timebase import NS_PER_S, Scale, parse_instant, to_tt

__all__ = ["TARGET", "NIGHT_UTC", "night_tt"]

TARGET = SkyPosition(right_ascension_deg=123.456, declination_deg=23.45)  # invented
NIGHT_UTC = parse_instant("2026-03-10T01:00:00")


def night_tt(leaps, hours=12.0):
    """(start, stop) of the test night, TT ns since 2000-01-01T12:00:00."""
    tt, _ = to_tt(np.array([NIGHT_UTC]), Scale.UTC, leaps)
    return int(tt[0]), int(tt[0] + hours * 3600 * NS_PER_S)
