"""Time scales, instants, leap seconds and site clock corrections.

Theory of operation
-------------------
An *instant* is an int64 count of nanoseconds since 2000-01-01T12:00:00 in a
named scale (``Scale``): 1 ns resolution over +-292 years, exact addition and
subtraction. For the continuous scales (TAI, GPS, TT, TDB) the count is of SI
seconds. For UTC the count is of *labels*: every UTC day counts 86 400 s, as
POSIX time does, so each count maps one-to-one onto a UTC date and time of day;
the inserted second 23:59:60 has no label of its own, and the table of leap
seconds turns labels into TAI.

Sub-nanosecond parts (the remainder of a clock correction, later the
barycentric correction) travel beside the integer count as float64 seconds.

Conversions are data plus a small router: each scale has one direct hop to TAI
and one back (``_TO_TAI``/``_FROM_TAI``); everything else routes through TAI.
Offsets follow the standards: TT = TAI + 32.184 s (IAU 1991), GPS = TAI - 19 s
(the GPS epoch 1980-01-06 UTC, when TAI - UTC was 19 s), TAI - UTC from the
IERS leap-second table that ships with astropy (handed in by the shell).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from datetime import date
from decimal import ROUND_FLOOR, Decimal, localcontext
from enum import StrEnum

import numpy as np

from .flags import Quality

__all__ = [
    "Scale",
    "NS_PER_S",
    "NS_PER_DAY",
    "MJD_AT_EPOCH",
    "INPUT_SCALES",
    "LeapSecondTable",
    "ClockCorrection",
    "site_tt",
    "to_tt",
    "from_tt",
    "mjd_to_ns",
    "seconds_to_ns",
    "ns_to_mjd",
    "parse_instant",
    "format_instant",
    "unix_to_ns",
]

NS_PER_S = 1_000_000_000
NS_PER_DAY = 86_400 * NS_PER_S
MJD_AT_EPOCH = Decimal("51544.5")  # 2000-01-01T12:00:00
TT_MINUS_TAI_NS = 32_184_000_000  # exact, IAU 1991 Resolution A4
TAI_MINUS_GPS_NS = 19_000_000_000  # exact, by definition of the GPS epoch
# 1970-01-01T00:00:00 as a label
UNIX_EPOCH_NS = -(10_957 * NS_PER_DAY + NS_PER_DAY // 2)
_ORDINAL_AT_MJD_ZERO = 678_576  # date(1858, 11, 17).toordinal()


class Scale(StrEnum):
    """A named time scale."""

    UTC = "UTC"
    TAI = "TAI"
    GPS = "GPS"
    TT = "TT"
    TDB = "TDB"


INPUT_SCALES = (Scale.UTC, Scale.TAI, Scale.GPS, Scale.TT)
"""Scales an instrument may declare for its arrival times."""


@dataclass(frozen=True)
class LeapSecondTable:
    """TAI - UTC in whole seconds, by the UTC date from which each value holds.

    Parameters
    ----------
    start_mjd : int64 array
        UTC MJD (integer day) from which each value applies, increasing.
    tai_minus_utc_s : int64 array
        TAI - UTC in seconds from that date on.
    expires_mjd : int
        The table is known to be complete until this UTC MJD.
    source : str
        Provenance (file and version) for output metadata.
    """

    start_mjd: np.ndarray
    tai_minus_utc_s: np.ndarray
    expires_mjd: int
    source: str = "unknown"
    _start_utc_ns: np.ndarray = field(init=False, repr=False)
    _start_tai_ns: np.ndarray = field(init=False, repr=False)

    def __post_init__(self):
        start = np.asarray(self.start_mjd, dtype=np.int64)
        step = np.asarray(self.tai_minus_utc_s, dtype=np.int64)
        if start.ndim != 1 or start.shape != step.shape or start.size == 0:
            raise ValueError("leap-second table needs equal, non-empty 1-d columns")
        if np.any(np.diff(start) <= 0):
            raise ValueError("leap-second table dates must increase")
        utc_ns = (start - 51_544) * NS_PER_DAY - NS_PER_DAY // 2
        object.__setattr__(self, "start_mjd", start)
        object.__setattr__(self, "tai_minus_utc_s", step)
        object.__setattr__(self, "_start_utc_ns", utc_ns)
        object.__setattr__(self, "_start_tai_ns", utc_ns + step * NS_PER_S)

    @property
    def expires_ns(self) -> int:
        return (self.expires_mjd - 51_544) * NS_PER_DAY - NS_PER_DAY // 2

    def tai_minus_utc_ns(self, utc_ns: np.ndarray) -> np.ndarray:
        """TAI - UTC (int64 ns) at UTC labels; rows before the table get its first value."""
        utc_ns = np.asarray(utc_ns)
        if utc_ns.size > 1:  # a batch between two leap seconds, the usual case: one lookup
            ends = np.searchsorted(self._start_utc_ns, [utc_ns.min(), utc_ns.max()],
                                   side="right") - 1
            if ends[0] == ends[1]:
                step = self.tai_minus_utc_s[max(int(ends[0]), 0)] * NS_PER_S
                return np.full(utc_ns.shape, step, dtype=np.int64)
        row = np.searchsorted(self._start_utc_ns, utc_ns, side="right") - 1
        return self.tai_minus_utc_s[np.maximum(row, 0)] * NS_PER_S

    def utc_label_from_tai(self, tai_ns: np.ndarray) -> np.ndarray:
        """The UTC label of TAI instants (an instant inside a leap second gets the
        label of the following midnight, as the label count has no 23:59:60)."""
        row = np.searchsorted(self._start_tai_ns, tai_ns, side="right") - 1
        return tai_ns - self.tai_minus_utc_s[np.maximum(row, 0)] * NS_PER_S


def _utc_to_tai(ns, leaps):
    if ns.size and ns.max() < leaps.expires_ns:
        flags = np.zeros(ns.shape, np.uint32)
    else:
        flags = np.where(ns >= leaps.expires_ns, Quality.LEAP_TABLE_EXPIRED, 0).astype(np.uint32)
    return ns + leaps.tai_minus_utc_ns(ns), flags


def _tai_to_utc(ns, leaps):
    utc = leaps.utc_label_from_tai(ns)
    flags = np.where(utc >= leaps.expires_ns, Quality.LEAP_TABLE_EXPIRED, 0).astype(np.uint32)
    return utc, flags


def _shift(offset_ns):
    def hop(ns, leaps):
        return ns + offset_ns, np.zeros(ns.shape, np.uint32)

    return hop


_TO_TAI = {
    Scale.TAI: _shift(0),
    Scale.UTC: _utc_to_tai,
    Scale.GPS: _shift(TAI_MINUS_GPS_NS),
    Scale.TT: _shift(-TT_MINUS_TAI_NS),
}
_FROM_TAI = {
    Scale.TAI: _shift(0),
    Scale.UTC: _tai_to_utc,
    Scale.GPS: _shift(-TAI_MINUS_GPS_NS),
    Scale.TT: _shift(TT_MINUS_TAI_NS),
}


def _scale(scale: Scale | str) -> Scale:
    try:
        scale = Scale(scale)
    except ValueError:
        raise ValueError(
            f"time scale {scale!r} is not one of {[s.value for s in INPUT_SCALES]}"
        ) from None
    if scale not in _TO_TAI:
        raise ValueError(
            f"time scale {scale.value!r} cannot be an instrument scale; "
            f"allowed: {[s.value for s in INPUT_SCALES]}"
        )
    return scale


def to_tt(ns, scale: Scale | str, leaps: LeapSecondTable) -> tuple[np.ndarray, np.ndarray]:
    """Instants in an instrument scale to TT.

    Parameters
    ----------
    ns : int64 array
        Nanoseconds since 2000-01-01T12:00:00 in ``scale`` (labels for UTC).
    scale : Scale
        One of UTC, TAI, GPS, TT.
    leaps : LeapSecondTable

    Returns
    -------
    tt_ns : int64 array
    flags : uint32 array of ``Quality`` bits (LEAP_TABLE_EXPIRED).
    """
    ns = np.asarray(ns, dtype=np.int64)
    tai, flags = _TO_TAI[_scale(scale)](ns, leaps)
    return tai + TT_MINUS_TAI_NS, flags


def from_tt(tt_ns, scale: Scale | str, leaps: LeapSecondTable) -> tuple[np.ndarray, np.ndarray]:
    """TT instants to an instrument scale (the inverse of :func:`to_tt`)."""
    tai = np.asarray(tt_ns, dtype=np.int64) - TT_MINUS_TAI_NS
    return _FROM_TAI[_scale(scale)](tai, leaps)


@dataclass(frozen=True)
class ClockCorrection:
    """One link of a site's clock chain: a piecewise-linear offset table.

    ``corrected = reading + offset(reading)``; readings and table instants are
    in the same scale (the one the instrument declares). Outside the table the
    end value is held and the event flagged CLOCK_CORRECTION_EXTRAPOLATED.

    Parameters
    ----------
    name : str
        E.g. "local clock -> GPS"; recorded in output metadata.
    instants_ns : int64 array
        Table instants (ns since 2000-01-01T12:00:00), increasing.
    offsets_s : float64 array
        Offset to add at each instant (seconds).
    """

    name: str
    instants_ns: np.ndarray
    offsets_s: np.ndarray

    def __post_init__(self):
        t = np.asarray(self.instants_ns, dtype=np.int64)
        y = np.asarray(self.offsets_s, dtype=np.float64)
        if t.ndim != 1 or t.shape != y.shape or t.size == 0:
            raise ValueError(f"clock correction {self.name!r}: needs equal, non-empty columns")
        if np.any(np.diff(t) <= 0):
            raise ValueError(f"clock correction {self.name!r}: instants must increase")
        if not np.all(np.isfinite(y)):
            raise ValueError(f"clock correction {self.name!r}: offsets must be finite")
        object.__setattr__(self, "instants_ns", t)
        object.__setattr__(self, "offsets_s", y)

    def apply(self, ns, extra_s):
        """Add the offset: whole nanoseconds to ``ns``, the rest to ``extra_s``.

        Returns ``(ns, extra_s, flags)``.
        """
        t0 = self.instants_ns[0]
        # interpolate on a small-valued float axis (relative to the first row) so
        # that the abscissa keeps nanosecond resolution
        x = (ns - t0).astype(np.float64)
        offset = np.interp(x, (self.instants_ns - t0).astype(np.float64), self.offsets_s)
        whole = np.round(offset * 1e9).astype(np.int64)
        extra = extra_s + (offset - whole * 1e-9)
        outside = (ns < t0) | (ns > self.instants_ns[-1])
        flags = np.where(outside, Quality.CLOCK_CORRECTION_EXTRAPOLATED, 0).astype(np.uint32)
        return ns + whole, extra, flags


def site_tt(readings_ns, scale: Scale | str, clock_chain, leaps: LeapSecondTable):
    """TT at the site of instrument clock readings: the clock chain, then the scale.

    Parameters
    ----------
    readings_ns : int64 array
        Readings, ns since 2000-01-01T12:00:00 in ``scale``.
    scale : Scale
        The instrument's scale (after the clock chain).
    clock_chain : sequence of ClockCorrection
        Applied in order.
    leaps : LeapSecondTable

    Returns
    -------
    tt_ns : int64 array
        TT instants, ns since 2000-01-01T12:00:00 TT.
    extra_s : float64 array
        Sub-nanosecond remainder of the clock corrections, seconds.
    flags : uint32 array
        Quality bits of the clock chain and the scale conversion.
    """
    extra_s = np.zeros(np.shape(readings_ns))
    if not clock_chain:
        tt_ns, flags = to_tt(readings_ns, scale, leaps)
        return tt_ns, extra_s, flags
    flags = np.zeros(np.shape(readings_ns), np.uint32)
    for link in clock_chain:
        readings_ns, extra_s, link_flags = link.apply(readings_ns, extra_s)
        flags |= link_flags
    tt_ns, scale_flags = to_tt(readings_ns, scale, leaps)
    return tt_ns, extra_s, flags | scale_flags


# -- calendar helpers (display, configuration and model files) -------------------

_ISO = re.compile(
    r"^\s*(\d{4})-(\d{2})-(\d{2})(?:[T ](\d{2}):(\d{2})(?::(\d{2})(?:\.(\d{1,9}))?)?)?\s*$"
)


def seconds_to_ns(seconds: Decimal) -> tuple[int, Decimal]:
    """Exact seconds since 2000-01-01T12:00:00 to (whole ns, remainder in s, in [0, 1 ns))."""
    with localcontext() as ctx:
        ctx.prec = 60
        whole_ns = int((Decimal(seconds) * NS_PER_S).to_integral_value(rounding=ROUND_FLOOR))
        return whole_ns, Decimal(seconds) - Decimal(whole_ns) / NS_PER_S


def mjd_to_ns(mjd: Decimal | str) -> tuple[int, Decimal]:
    """An exact MJD to (whole ns since 2000-01-01T12:00:00, remainder in s)."""
    with localcontext() as ctx:
        ctx.prec = 60
        return seconds_to_ns((Decimal(mjd) - MJD_AT_EPOCH) * 86_400)


def ns_to_mjd(ns) -> np.ndarray:
    """Nanoseconds to a float64 MJD (display only: ~0.6 µs resolution)."""
    ns = np.asarray(ns, dtype=np.int64)
    days, rest = np.divmod(ns, NS_PER_DAY)
    return 51_544.5 + days + rest / NS_PER_DAY


def parse_instant(text: str) -> int:
    """Parse ``YYYY-MM-DD[THH:MM[:SS[.fffffffff]]]`` (a label in any scale) to ns."""
    match = _ISO.match(text)
    if not match:
        raise ValueError(f"instant {text!r} is not YYYY-MM-DDTHH:MM:SS[.fffffffff]")
    year, month, day, hour, minute, second, frac = match.groups()
    try:
        mjd = date(int(year), int(month), int(day)).toordinal() - _ORDINAL_AT_MJD_ZERO
    except ValueError as exc:
        raise ValueError(f"instant {text!r}: {exc}") from None
    hour, minute, second = int(hour or 0), int(minute or 0), int(second or 0)
    if hour > 23 or minute > 59 or second > 59:
        raise ValueError(f"instant {text!r}: time of day out of range (23:59:60 has no label)")
    nanos = int((frac or "0").ljust(9, "0"))
    return (
        (mjd - 51_544) * NS_PER_DAY
        - NS_PER_DAY // 2
        + ((hour * 60 + minute) * 60 + second) * NS_PER_S
        + nanos
    )


def format_instant(ns: int, digits: int = 9) -> str:
    """Format ns since 2000-01-01T12:00:00 as an ISO date-time label."""
    days, rest = divmod(int(ns) + NS_PER_DAY // 2, NS_PER_DAY)
    day = date.fromordinal(51_544 + days + _ORDINAL_AT_MJD_ZERO)
    seconds, nanos = divmod(rest, NS_PER_S)
    minutes, second = divmod(seconds, 60)
    hour, minute = divmod(minutes, 60)
    text = f"{day.isoformat()}T{hour:02d}:{minute:02d}:{second:02d}"
    return text + (f".{nanos:09d}"[: digits + 1] if digits > 0 else "")


def unix_to_ns(unix_seconds: float) -> int:
    """A POSIX time stamp (UTC labels) to UTC label ns (for wall-clock defaults)."""
    return UNIX_EPOCH_NS + int(round(unix_seconds * NS_PER_S))
