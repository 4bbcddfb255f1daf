"""Event times as files hold them: conventions, conversion, and plausibility.

Theory of operation
-------------------
turnstamp's instants are int64 nanoseconds since 2000-01-01T12:00:00 in the
input's time scale. Files often count otherwise: seconds, or nanoseconds since
1970-01-01 (Unix time, the most common mistake). A ``TimeConvention`` (an origin
and a unit) says how the file counts; ``to_instants`` converts a column
(integers exactly, floating-point seconds to the nearest ns).

The plausibility check is the service's: events outside ``plausible_from`` to
``plausible_until`` of the intake configuration are rejected one by one as
``bad_time``; offline the range is also narrowed to what the tables can tag (the
planetary ephemeris, and a year past the end of the Earth-orientation table).
A batch *mostly* outside the range, or lying wholly within 40 days of the origin
when no unit was given (seconds read as nanoseconds), is a file in another
convention: the run stops with an error naming the likely convention, read off
the batch's median value, before anything is written.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from ..core.timebase import NS_PER_DAY, NS_PER_S, format_instant, parse_instant
from ..errors import EventFileError

__all__ = ["ORIGINS", "UNITS", "TimeConvention", "PlausibleRange", "to_instants",
           "check_times"]

ORIGINS = {"2000-01-01T12:00:00": 0, "unix": parse_instant("1970-01-01T00:00:00"),
           "gps": parse_instant("1980-01-06T00:00:00")}
"""Named time origins (ns since 2000-01-01T12:00:00 in the input's scale); any
``YYYY-MM-DDTHH:MM:SS`` instant is accepted too."""
UNITS = {"ns": 1, "us": 1_000, "ms": 1_000_000, "s": NS_PER_S}
"""Units of the time column, in ns."""

_NEAR_ORIGIN_NS = 40 * NS_PER_DAY  # µs since the origin reach 40 days by 2110
_ORIGIN_NAMES = {"2000-01-01T12:00:00": "2000-01-01T12:00:00", "unix": "1970-01-01 (Unix time)",
                 "gps": "1980-01-06 (the GPS epoch)"}
# readings to suggest, most common first
_READINGS = [("unix", "ns"), ("2000-01-01T12:00:00", "s"), ("unix", "s"), ("unix", "ms"),
             ("unix", "us"), ("2000-01-01T12:00:00", "ms"), ("2000-01-01T12:00:00", "us"),
             ("2000-01-01T12:00:00", "ns"), ("gps", "s"), ("gps", "ns")]
_UNIT_WORDS = {"ns": "nanoseconds", "us": "microseconds", "ms": "milliseconds", "s": "seconds"}


@dataclass(frozen=True)
class TimeConvention:
    """How a file counts time: ``value x unit + origin``.

    Attributes
    ----------
    origin : str
        A name of ``ORIGINS`` or an instant ``YYYY-MM-DDTHH:MM:SS`` (in the input's
        time scale).
    unit : str or None
        A key of ``UNITS``; None means ns, not stated (the near-origin check on).
    """

    origin: str = "2000-01-01T12:00:00"
    unit: str | None = None

    def __post_init__(self):
        if self.unit is not None and self.unit not in UNITS:
            raise EventFileError("time unit", self.unit, f"must be one of {sorted(UNITS)}")
        _ = self.origin_ns  # refuses a bad origin now

    @property
    def origin_ns(self) -> int:
        """The origin, ns since 2000-01-01T12:00:00."""
        if self.origin in ORIGINS:
            return ORIGINS[self.origin]
        try:
            return parse_instant(self.origin)
        except ValueError as exc:
            raise EventFileError("time origin", self.origin,
                                 f"must be one of {sorted(ORIGINS)} or an instant "
                                 f"YYYY-MM-DDTHH:MM:SS ({exc})") from None

    @property
    def unit_ns(self) -> int:
        return UNITS[self.unit or "ns"]

    @property
    def is_native(self) -> bool:
        """Integer ns since 2000-01-01T12:00:00: the column is used as it is."""
        return self.origin_ns == 0 and self.unit_ns == 1

    def words(self) -> str:
        unit = _UNIT_WORDS[self.unit or "ns"]
        return f"{unit} since {_ORIGIN_NAMES.get(self.origin, self.origin)}"


@dataclass(frozen=True)
class PlausibleRange:
    """Event times that can be tagged, ns since 2000-01-01T12:00:00, and why."""

    earliest_ns: int
    latest_ns: int
    why: str

    def contains(self, ns: float) -> bool:
        return self.earliest_ns <= ns <= self.latest_ns

    def words(self) -> str:
        return (f"{_day(self.earliest_ns)} to {_day(self.latest_ns)} ({self.why})")


def _day(ns: float) -> str:
    try:
        return format_instant(int(ns), 0)[:10]
    except (ValueError, OverflowError):
        return "beyond year 9999" if ns > 0 else "before year 1"


def _instant(ns: float) -> str:
    try:
        return format_instant(int(ns), 3)
    except (ValueError, OverflowError):
        return _day(ns)


def to_instants(column: pa.Array, convention: TimeConvention, label: str,
                plausible: PlausibleRange | None = None) -> pa.Array:
    """A time column in ``convention`` as int64 ns since 2000-01-01T12:00:00 (nulls kept).

    ``plausible`` (when given) lets a refusal name the conventions that would fit.

    Raises
    ------
    EventFileError
        Values that overflow int64 ns, or a floating-point column read as ns.
    """
    kind = column.type
    if pa.types.is_timestamp(kind):
        return _timestamp_instants(column, convention, label)
    if pa.types.is_floating(kind) and convention.unit_ns == 1:
        raise EventFileError("time_ns", str(kind), f"{label}: must be an integer column of "
                             "ns since the time origin" + _float_hint(column, plausible))
    if convention.is_native or not (pa.types.is_integer(kind) or pa.types.is_floating(kind)):
        return column  # the wire format's own checks name any other type
    values = column.fill_null(0).to_numpy(zero_copy_only=False)
    unit, origin = convention.unit_ns, convention.origin_ns
    limit = (np.iinfo(np.int64).max - abs(origin)) / unit
    if values.size and not np.abs(values.astype(np.float64)).max() < limit:
        bad = values[~(np.abs(values.astype(np.float64)) < limit)][0]
        raise EventFileError("time_ns", bad, f"{label}: too large for {convention.words()} "
                             "(beyond the int64 ns range of +-292 years)")
    if values.dtype.kind == "f":
        whole = np.floor(values)
        ns = whole.astype(np.int64) * unit + np.rint((values - whole) * unit).astype(np.int64)
    else:
        ns = values.astype(np.int64) * unit
    mask = None if column.null_count == 0 else column.is_null().to_numpy(zero_copy_only=False)
    return pa.array(ns + origin, pa.int64(), mask=mask)


def _timestamp_instants(column: pa.Array, convention: TimeConvention, label: str) -> pa.Array:
    """An Arrow timestamp column: it counts from 1970-01-01 in its own unit."""
    if convention != TimeConvention():
        raise EventFileError("time_ns", str(column.type), f"{label}: a timestamp column "
                             "states its own origin (1970-01-01) and unit: give no time "
                             "origin or unit")
    values = column.cast(pa.int64())
    return to_instants(values, TimeConvention("unix", column.type.unit), label)


def _raw_median(column: pa.Array) -> float | None:
    """The median of a numeric column's finite values as the file holds them."""
    if pa.types.is_timestamp(column.type):
        column = column.cast(pa.int64())
    values = column.drop_null().to_numpy(zero_copy_only=False).astype(np.float64)
    values = values[np.isfinite(values)]
    return float(np.median(values)) if values.size else None


def _float_hint(column: pa.Array, plausible: PlausibleRange | None) -> str:
    median = _raw_median(column)
    if median is None:
        return ""
    if 30_000 < median < 100_000:
        return (f" (the values, about {median:.1f}, look like MJD days: convert them to "
                "integer ns; a float MJD cannot hold a time to better than a microsecond)")
    readings = _readings_hint(median, plausible, units=("s", "ms", "us"))
    as_ns = _plausible_readings(median, plausible, None, ("ns",))
    if as_ns:  # floats never hold today's ns exactly: the column itself must change
        since = "; ".join(f"since {_ORIGIN_NAMES[origin]} they give {_instant(ns)}"
                          for origin, _, ns in as_ns[:2])
        return (f" (the values look like nanoseconds ({since}) held as floating point, "
                f"which rounds them by up to {float(np.spacing(median)) / 2:.0f} ns: write "
                "time_ns as int64)" + readings)
    return readings


def _plausible_readings(raw_median: float, plausible: PlausibleRange | None,
                        current: TimeConvention | None,
                        units: tuple[str, ...]) -> list[tuple[str, str, int]]:
    """(origin, unit, ns) of the readings of the raw value in ``units`` that are
    plausible (and not themselves within 40 days of their origin), most common first."""
    found = []
    for origin, unit in _READINGS:
        if unit not in units or (current is not None
                                 and (origin, unit) == (current.origin, current.unit or "ns")):
            continue
        ns = raw_median * UNITS[unit] + ORIGINS[origin]
        lowest = ORIGINS["unix"] + 20 * 365 * NS_PER_DAY  # 1990, when no range is known
        fits = plausible.contains(ns) if plausible else lowest <= ns <= 100 * 365 * NS_PER_DAY
        if fits and abs(ns - ORIGINS[origin]) >= _NEAR_ORIGIN_NS:
            found.append((origin, unit, ns))
    return found


def _readings_hint(raw_median: float, plausible: PlausibleRange | None,
                   current: TimeConvention | None = None,
                   units: tuple[str, ...] = tuple(UNITS)) -> str:
    """``; read as ...`` naming the plausible readings of the raw value in ``units``
    (``_plausible_readings``) with the options that give them."""
    found = _plausible_readings(raw_median, plausible, current, units)
    if not found:
        return ""
    words = [f"{_UNIT_WORDS[unit]} since {_ORIGIN_NAMES[origin]} give {_instant(ns)} "
             f"(--time-unit {unit} --time-origin {origin})" for origin, unit, ns in found[:2]]
    return "; read as " + ", or as ".join(words)


def check_times(times_ns: np.ndarray, raw: pa.Array, convention: TimeConvention,
                plausible: PlausibleRange, label: str) -> None:
    """Stop on a batch whose times are in another convention (module docstring).

    Parameters
    ----------
    times_ns : ndarray of int64
        The batch's present times, ns since 2000-01-01T12:00:00.
    raw : pyarrow.Array
        The time column as the file holds it (for naming the likely convention).
    convention, plausible, label
        How the file was read, the plausible range, and the file and batch for messages.

    Raises
    ------
    EventFileError
        Naming the median value, what it means as read and the likely convention.
    """
    if times_ns.size == 0:
        return
    lowest, highest = int(times_ns.min()), int(times_ns.max())
    outside = 0
    if lowest < plausible.earliest_ns or highest > plausible.latest_ns:
        outside = int(np.count_nonzero((times_ns < plausible.earliest_ns)
                                       | (times_ns > plausible.latest_ns)))
    origin = convention.origin_ns
    near = (convention.unit is None and abs(highest - origin) < _NEAR_ORIGIN_NS
            and abs(lowest - origin) < _NEAR_ORIGIN_NS)
    if outside * 2 <= times_ns.size and not near:
        return
    shown = int(np.median(times_ns))
    read = f"{label}: read as {convention.words()}, "
    median = _raw_median(raw)
    hint = "" if median is None else _readings_hint(median, plausible, convention)
    if near:
        problem = (read + f"all {times_ns.size:,} times lie within 40 days of the origin, "
                   f"e.g. {_instant(shown)}" + hint
                   + "; if those times are right, pass --time-unit ns")
    else:
        problem = (read + f"{outside:,} of {times_ns.size:,} times fall outside the plausible "
                   f"range {plausible.words()}, e.g. {_instant(shown)}"
                   + (hint or "; no common convention makes them plausible: check the column"))
    raise EventFileError("time_ns", _first(raw), problem)


def _first(raw: pa.Array):
    """The first present value of the column, exactly as the file holds it."""
    present = raw.drop_null()
    return present[0].as_py() if len(present) else None
