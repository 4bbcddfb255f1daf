"""The usual time-keeping mistakes, and which of them a measured phase offset matches.

A time error Δt moves the phase of a pulsar of frequency ν by ν·Δt cycles; only
frac(ν·Δt) is seen, so a whole-second mistake is recognised by the fraction of a
turn it leaves. The offsets listed are those between the time scales an instrument
may confuse: a leap second, GPS − UTC, TAI − GPS, TT − TAI, TAI − UTC and TT − UTC.

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from ..cycles import wrap_cycles

__all__ = ["KNOWN_TIME_MISTAKES", "Explanation", "explain_offset"]

KNOWN_TIME_MISTAKES = (
    (1.0, "one leap second (missed, or applied twice)"),
    (18.0, "GPS−UTC (GPS time read as UTC, or the reverse; 18 s since 2017)"),
    (19.0, "TAI−GPS (GPS time read as TAI, or the reverse)"),
    (32.184, "TT−TAI (TAI read as TT, or the reverse)"),
    (37.0, "TAI−UTC (TAI read as UTC, or the reverse; 37 s since 2017)"),
    (69.184, "TT−UTC (UTC read as TT, or the reverse)"),
)
"""(Δt in s, description) of time-keeping mistakes; both signs are tried. Values: TT − TAI
= 32.184 s (``erfa.TTMTAI``; IAU 1991 Resolution A4, from memory), TAI − GPS = 19 s (the GPS epoch
1980-01-06, IS-GPS-200; from memory), TAI − UTC = 37 s since 2017-01-01 (IERS Bulletin C;
the leap-second table of ``erfa.dat``)."""


@dataclass(frozen=True)
class Explanation:
    """A time-keeping mistake whose phase offset frac(ν·Δt) matches the data."""

    delta_t_s: float
    label: str
    predicted_cycles: float
    deviation_sigma: float


def explain_offset(
    offset_cycles: float, sigma_cycles: float, frequency_hz: float, n_sigma: float = 2.0,
    frequency_spread_hz: float = 0.0,
) -> list[Explanation]:
    """Time-keeping mistakes Δt whose phase offset frac(ν·Δt) matches ``offset_cycles``.

    Parameters
    ----------
    offset_cycles, sigma_cycles : float
        Measured offset (positive = data late) and 1σ error, cycles.
    frequency_hz : float
        Spin frequency ν, Hz.
    n_sigma : float
        Match when |wrap(offset − ν·Δt)| ≤ n_sigma·σ + |Δt|·frequency_spread_hz.
    frequency_spread_hz : float
        How far the apparent frequency wanders over the night (Doppler): a time error
        Δt shifts phase by ν(t)·Δt, so the prediction is only good to |Δt|·spread.

    Returns
    -------
    list of Explanation
        Δt = ±1, ±18, ±19, ±32.184, ±37, ±69.184 s (:data:`KNOWN_TIME_MISTAKES`);
        positive Δt means the event times are late by Δt. Closest match first.
    """
    out: list[Explanation] = []
    if not (math.isfinite(offset_cycles) and sigma_cycles > 0 and math.isfinite(sigma_cycles)):
        return out
    for dt, label in KNOWN_TIME_MISTAKES:
        for sign in (+1.0, -1.0):
            predicted = wrap_cycles(frequency_hz * sign * dt)
            slack = dt * abs(frequency_spread_hz)
            deviation = max(abs(wrap_cycles(offset_cycles - predicted)) - slack, 0.0) \
                / sigma_cycles
            if deviation <= n_sigma:
                out.append(Explanation(sign * dt, label, predicted, deviation))
    return sorted(out, key=lambda e: e.deviation_sigma)
