"""Per-event quality flags, shared by every stage and written to the archive.

A flag never hides an event: it travels with the event's phase so that users can
choose what to trust. Events whose phase cannot be computed at all are rejected
with a reason instead (see ``turnstamp.errors.RejectReason``).
"""

from __future__ import annotations

from enum import IntFlag

__all__ = ["Quality", "describe"]


class Quality(IntFlag):
    """Bits of the archive's ``quality_flags`` column (uint32)."""

    LEAP_TABLE_EXPIRED = 1 << 0
    """UTC instant after the expiry date of the bundled leap-second table."""
    EARTH_ORIENTATION_PREDICTED = 1 << 1
    """UT1 and polar motion are IERS predictions (adds a few ns at most)."""
    EARTH_ORIENTATION_HELD = 1 << 2
    """Past the end of the Earth-orientation table: the last values are held.
    UT1 then drifts from the truth by up to ~1 s, moving a ground site by up to
    ~420 m and the barycentric correction by up to ~1.4 µs."""
    CLOCK_CORRECTION_EXTRAPOLATED = 1 << 3
    """Outside a clock-correction table: its end value is held."""
    OUTSIDE_MODEL_VALIDITY = 1 << 4
    """Tagged with the nearest spin model outside its validity window;
    excluded from the statistics."""
    BINARY_NOT_CONVERGED = 1 << 5
    """The binary emission-time iteration did not converge to 1 ps."""
    BUILTIN_EPHEMERIS = 1 << 6
    """Barycentre from erfa's built-in ephemeris (~15 µs rms), not a JPL kernel."""
    ORBIT_TABLE_EXTRAPOLATED = 1 << 7
    """Space-borne observer outside its orbit table."""


def describe(bits: int) -> list[str]:
    """Names of the flags set in ``bits`` (empty when the event is clean)."""
    return [flag.name or "" for flag in Quality if bits & flag]
