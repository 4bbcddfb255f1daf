"""Time axes of the report's figures in UTC clock time: HH:MM (HH:MM:SS for short spans),
dates for spans of days.

The figures plot time as hours since the UTC midnight that starts the night
(``timegrid.UtcHours``), or days past 72 hours; this module chooses round tick
steps for the span shown and labels them as a person reads a clock.
"""

from __future__ import annotations

import datetime as dt
import math

__all__ = ["TICK_STEPS_S", "tick_step_s", "clock_label", "utc_axis"]

TICK_STEPS_S = (1, 2, 5, 10, 15, 20, 30, 60, 120, 300, 600, 900, 1200, 1800, 3600, 7200,
                10800, 21600, 43200)
"""Tick spacings a clock reader expects, seconds."""
_MAX_TICKS = 8


def tick_step_s(span_s: float) -> int:
    """The smallest round step giving at most ``_MAX_TICKS`` ticks over ``span_s``."""
    for step in TICK_STEPS_S:
        if span_s / step <= _MAX_TICKS:
            return step
    return TICK_STEPS_S[-1]


def clock_label(hours: float, date: str, with_seconds: bool) -> str:
    """Hours since midnight of ``date`` (YYYY-MM-DD) as "HH:MM[:SS]", with the date
    prefixed when it falls on another day ("12-03 01:30")."""
    midnight = dt.datetime.fromisoformat(date)
    when = midnight + dt.timedelta(seconds=round(hours * 3600))
    text = when.strftime("%H:%M:%S" if with_seconds else "%H:%M")
    return text if when.date() == midnight.date() else when.strftime("%m-%d ") + text


def utc_axis(axis, hours, low: float, high: float) -> str:
    """Put UTC clock-time ticks on a matplotlib ``axis`` (``ax.xaxis`` or ``ax.yaxis``)
    whose values are ``hours.plot(...)`` units over [low, high]; returns its label."""
    from matplotlib.ticker import FuncFormatter, MultipleLocator

    unit_s = 3600 * hours.per_unit
    if hours.per_unit != 1.0:  # days: one tick a day or more, labelled by date
        step_days = max(1, math.ceil((high - low) / _MAX_TICKS))
        axis.set_major_locator(MultipleLocator(step_days))
        axis.set_major_formatter(FuncFormatter(
            lambda value, _: clock_label(value * 24, hours.date, False)))
        return f"UTC date and time (days from {hours.date})"
    step = tick_step_s(max(high - low, 1e-9) * unit_s)
    axis.set_major_locator(MultipleLocator(step / unit_s))
    seconds = step < 60
    axis.set_major_formatter(FuncFormatter(
        lambda value, _: clock_label(value, hours.date, seconds)))
    return f"UTC ({hours.date}, {'HH:MM:SS' if seconds else 'HH:MM'})"
