"""Reading the service's status defensively, and spelling its numbers, for both the
plain-text and the rich screen.

Any key of the status may be missing, null or of an odd type (an older or newer
service, a target still warming up): every reader here returns something
printable, "-" for what is not known.
"""

from __future__ import annotations

import math

from ...core.timebase import format_instant

__all__ = [
    "UNKNOWN",
    "NO_EXCESS",
    "TOTALS",
    "mapping",
    "is_count",
    "is_number",
    "count_text",
    "number_text",
    "sigma_text",
    "time_text",
    "counters",
    "adds_up",
    "last_sequence",
    "window_labels",
    "ascii_text",
    "problems_text",
    "unusable_text",
]

UNKNOWN = "-"
"""How a missing, null or non-finite value is shown."""
NO_EXCESS = "no excess"
"""How a significance below zero (fewer events in phase than chance gives) is shown."""
TOTALS = ("events_received", "events_tagged", "events_filtered", "events_rejected")
"""The counters that reconcile: received = tagged + filtered + rejected."""

_TO_ASCII = {"σ": "sigma", "µ": "u", "μ": "u", "±": "+/-", "≤": "<=", "≥": ">=", "—": "-",
             "–": "-", "−": "-", "²": "^2", "χ": "chi", "→": "->", "…": "...", "×": "x",
             "°": " deg", "√": "sqrt", "Δ": "delta", "ν": "nu", "φ": "phi"}


def mapping(value) -> dict:
    """``value`` if it is a dict, else an empty one."""
    return value if isinstance(value, dict) else {}


def is_count(value) -> bool:
    """Whether ``value`` is an integer count (not a bool)."""
    return isinstance(value, int) and not isinstance(value, bool)


def is_number(value) -> bool:
    """Whether ``value`` is a finite int or float (not a bool)."""
    return (isinstance(value, (int, float)) and not isinstance(value, bool)
            and math.isfinite(float(value)))


def count_text(value) -> str:
    """A count with thousands separators ("477,090"), or "-"."""
    return f"{int(value):,}" if is_number(value) else UNKNOWN


def number_text(value, digits: int = 2) -> str:
    """A number with ``digits`` decimals and thousands separators, or "-"."""
    return f"{float(value):,.{digits}f}" if is_number(value) else UNKNOWN


def sigma_text(value, digits: int = 2) -> str:
    """A significance in σ: the number, "no excess" below zero (also -inf), else "-"."""
    if isinstance(value, (int, float)) and not isinstance(value, bool) and value < 0:
        return NO_EXCESS
    return number_text(value, digits)


def time_text(ns) -> str | None:
    """A UTC label (int ns since 2000-01-01T12:00:00) as "2026-12-02 02:04:05 UTC"."""
    if not is_count(ns) or ns == 0:
        return None
    try:
        return format_instant(ns, 0).replace("T", " ") + " UTC"
    except (ValueError, OverflowError):
        return None


def counters(status: dict) -> dict:
    """The status's ``counters`` (empty when missing)."""
    return mapping(status.get("counters"))


def adds_up(numbers: dict) -> bool | None:
    """received == tagged + filtered + rejected; None when a counter is missing."""
    values = [numbers.get(k) for k in TOTALS]
    if not all(is_count(v) for v in values):
        return None
    received, tagged, filtered, rejected = values
    return received == tagged + filtered + rejected


def last_sequence(source: dict):
    """A source's last sequence number (``highest_sequence`` from the service)."""
    return source.get("last_sequence", source.get("highest_sequence"))


def window_labels(windows: dict) -> list[str]:
    """Window labels in display order: cumulative first, then the others sorted."""
    return [k for k in ("cumulative", *sorted(k for k in windows if k != "cumulative"))
            if k in windows]


def ascii_text(text: str) -> str:
    """Plain-ASCII spelling of the few symbols the service's messages use; '?' else."""
    if text.isascii():
        return text
    return "".join(c if c.isascii() else _TO_ASCII.get(c, "?") for c in text)


_SHORT_PROBLEM = {"OUTSIDE_MODEL_VALIDITY": "outside model validity (not in statistics)",
                  "EARTH_ORIENTATION_PREDICTED": "Earth orientation predicted",
                  "EARTH_ORIENTATION_HELD": "Earth orientation held",
                  "LEAP_TABLE_EXPIRED": "leap table expired",
                  "CLOCK_CORRECTION_EXTRAPOLATED": "clock correction extrapolated",
                  "BINARY_NOT_CONVERGED": "binary not converged",
                  "BUILTIN_EPHEMERIS": "built-in ephemeris",
                  "ORBIT_TABLE_EXTRAPOLATED": "orbit table extrapolated"}
"""Short words for the ``Quality`` flags counted in ``tagged_with_problems``."""


def problems_text(status: dict) -> str | None:
    """"tagged with a problem: N outside model validity (...), ..." or None.

    The benign EARTH_ORIENTATION_PREDICTED (a few ns) is left out of this line."""
    counts = {k: v for k, v in mapping(status.get("tagged_with_problems")).items()
              if is_count(v) and v and k != "EARTH_ORIENTATION_PREDICTED"}
    if not counts:
        return None
    order = sorted(counts, key=lambda k: (k != "OUTSIDE_MODEL_VALIDITY", k))
    return "tagged with a problem: " + ", ".join(
        f"{count_text(counts[k])} {_SHORT_PROBLEM.get(k, k.lower())}" for k in order)


def unusable_text(target: dict, short: bool = False) -> str | None:
    """Why a target's statistics hold no event although events were tagged, or None
    (``short``: for a narrow table cell)."""
    excluded = target.get("excluded_from_statistics")
    if not is_count(excluded) or not excluded:
        return None
    if short:
        return f"{count_text(excluded)} outside validity"
    return f"none usable: {count_text(excluded)} outside model validity"
