"""The spin as seen at the site: apparent frequency, the phase a time error moves, arrival times.

Theory of operation
-------------------
The clock check needs three things of a pulsar beyond its folded phases, all at
site TT instants t: the apparent frequency ν_app(t) = dφ/dt (the barycentric
frequency times the Earth's and the orbit's Doppler factors), the phase moved by a
time error Δt, φ(t) − φ(t − Δt), and the barycentric (TDB) instant at which a
chunk's pulse arrives. :class:`SiteSpin` takes them from the target's tagger, the
same chain that tagged the events: φ is evaluated in extended precision as (pulse
number, fraction), so differences over a second or a minute keep ~1e-9 cycles.
ν_app(t) = [φ(t + 1 s) − φ(t − 1 s)]/2 s is exact to (1 s)²·ν''/6: negligible
for any Doppler acceleration. :class:`ConstantSpin` is a pulsar seen at one
frequency (tests, and diagnoses run without a tagger).

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

from typing import Protocol

import numpy as np

from ..cycles import wrap_cycles
from ..tagger import TargetTagger
from ..timebase import NS_PER_S

__all__ = ["SpinView", "ConstantSpin", "SiteSpin"]


class SpinView(Protocol):
    """What the clock check asks of a pulsar at site TT instants (int64 ns)."""

    def frequency_hz(self, instants_ns: np.ndarray) -> np.ndarray:
        """Apparent spin frequency at the site, Hz."""
        ...

    def shift_cycles(self, instants_ns: np.ndarray, delta_t_s: float) -> np.ndarray:
        """φ(t) − φ(t − Δt): the offset (cycles) of events whose times are late by Δt."""
        ...


class ConstantSpin:
    """A pulsar seen at one apparent frequency ``nu`` (Hz) all night."""

    def __init__(self, nu: float):
        self.nu = float(nu)

    def frequency_hz(self, instants_ns: np.ndarray) -> np.ndarray:
        return np.full(np.shape(instants_ns), self.nu)

    def shift_cycles(self, instants_ns: np.ndarray, delta_t_s: float) -> np.ndarray:
        return np.full(np.shape(instants_ns), self.nu * float(delta_t_s))


class SiteSpin:
    """The spin of a tagged target at the site, from its tagger (tables and models)."""

    def __init__(self, tagger: TargetTagger):
        self.tagger = tagger

    def _phase(self, instants_ns: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        result = self.tagger.tag(np.asarray(instants_ns, dtype=np.int64))
        return result.pulse_number, result.phase

    def _difference(self, later: np.ndarray, earlier: np.ndarray) -> np.ndarray:
        (n1, f1), (n0, f0) = self._phase(later), self._phase(earlier)
        return (n1 - n0).astype(float) + (f1 - f0)

    def frequency_hz(self, instants_ns: np.ndarray) -> np.ndarray:
        t = np.asarray(instants_ns, dtype=np.int64)
        return self._difference(t + NS_PER_S, t - NS_PER_S) / 2.0

    def shift_cycles(self, instants_ns: np.ndarray, delta_t_s: float) -> np.ndarray:
        t = np.asarray(instants_ns, dtype=np.int64)
        return self._difference(t, t - int(round(float(delta_t_s) * NS_PER_S)))

    def arrival_tdb_ns(self, instants_ns: np.ndarray, shift_cycles: np.ndarray) -> np.ndarray:
        """Barycentric (TDB) instants (ns) of the pulses nearest ``instants_ns`` that arrive
        ``shift_cycles`` later than the model's phase zero (the template's reference).

        The model phase φ at each instant t gives the nearest site arrival
        t + wrap(shift − frac φ)/ν_app; it is then carried to the barycentre by the
        tagger. NaN shifts give the int64 minimum.
        """
        t = np.asarray(instants_ns, dtype=np.int64)
        shift = np.asarray(shift_cycles, dtype=float)
        good = np.isfinite(shift)
        out = np.full(t.shape, np.iinfo(np.int64).min, dtype=np.int64)
        if not good.any():
            return out
        _, phase = self._phase(t[good])
        lead = np.asarray(wrap_cycles(shift[good] - phase), dtype=float) \
            / self.frequency_hz(t[good])
        arrival = t[good] + np.round(lead * NS_PER_S).astype(np.int64)
        out[good] = self.tagger.tag(arrival).barycentric_tdb_ns
        return out
