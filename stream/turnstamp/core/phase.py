"""Rotational phase of a spin model at barycentric instants, in extended precision.

Theory of operation
-------------------
The phase polynomial and its glitch and noise terms are those of
:mod:`turnstamp.core.spin`. Phase reaches 1e12 cycles (1 kHz over 30 years) and must
be right to 1e-9 cycles, i.e. to 1 part in 1e21: beyond float64. The polynomial is
re-expanded about *anchors* every ``ANCHOR_S`` = 6 h from the reference epoch.
At an anchor, the value and first derivative come from double-double Horner
sums of the exact decimal coefficients; per event only one double-double
product (frequency at the anchor times the offset from it, |offset| <= 3 h)
and a float64 tail of small terms remain. Glitch and noise terms are small
(<= 1e5 cycles) and evaluated in float64 (error < 1e-11 cycles). A binary orbit's
delay is removed first (:func:`turnstamp.core.binarydelay.emission_delay`), with
whole seconds passed apart from the rest so that the orbital phase stays exact.
"""

from __future__ import annotations

import math
from decimal import Decimal, localcontext

import numpy as np

from .binarydelay import emission_delay
from .flags import Quality
from .spin import SpinModel
from .timebase import NS_PER_S, mjd_to_ns, seconds_to_ns
from .twofloat import dd_add, dd_from_decimal, dd_to_decimal, floor_and_fraction, two_prod, two_sum

__all__ = ["ANCHOR_S", "PhaseCalculator"]

ANCHOR_S = 21_600
"""Seconds between the anchors of the re-expanded spin polynomial (6 h)."""


class PhaseCalculator:
    """Compiled, vectorised phase evaluation for one ``SpinModel``."""

    def __init__(self, model: SpinModel):
        self.model = model
        self.model_id = model.model_id
        with localcontext() as ctx:
            ctx.prec = 60
            self._ref_ns, rem = mjd_to_ns(model.reference_epoch_mjd_tdb)
            self._ref_rem_s = float(rem)
            frequencies = [model.frequency_hz, *model.frequency_derivatives]
            # Taylor coefficients of P(t): c_k = f_(k-1) / k!, k = 1..K (exact decimals)
            self._coefficients = [Decimal(0)] + [
                f / math.factorial(k + 1) for k, f in enumerate(frequencies)]
        self._anchor_cache: dict[int, tuple] = {}
        self._glitches = [
            (mjd_to_ns(g.epoch_mjd_tdb), g) for g in model.glitches]
        lo, hi = (mjd_to_ns(model.validity.start_mjd_tdb)[0],
                  mjd_to_ns(model.validity.end_mjd_tdb)[0])
        self.valid_from_ns, self.valid_until_ns = lo, hi
        if model.binary is not None:
            self._binary_ns, binary_rem = seconds_to_ns(model.binary.epoch_tdb_seconds)
            self._binary_rem_s = float(binary_rem)
        # phase zero: evaluate the model there, then fold it into every anchor
        self._zero = Decimal(0)
        zero_ns, zero_rem = mjd_to_ns(model.phase_zero_mjd_tdb or model.reference_epoch_mjd_tdb)
        hi, lo, _ = self._raw_phase(np.array([zero_ns]), np.array([float(zero_rem)]), False)
        self._zero = dd_to_decimal(float(hi[0]), float(lo[0]))
        self._anchor_cache.clear()

    # -- anchors ------------------------------------------------------------------
    def _anchor(self, index: int):
        """Taylor coefficients of the phase about anchor ``index``.

        Returns (a0, a1 per ns, a1 per s, [a2, a3, ...]): a0 = P(anchor) - P(t_zero)
        and the first derivatives as double-doubles, the rest as float64 (per s^m).
        """
        cached = self._anchor_cache.get(index)
        if cached is not None:
            return cached
        with localcontext() as ctx:
            ctx.prec = 60
            t = Decimal(index * ANCHOR_S) - Decimal(self._ref_rem_s)
            c = self._coefficients
            degree = len(c) - 1
            taylor = []
            for m in range(degree + 1):
                total = Decimal(0)
                for k in range(degree, m - 1, -1):  # Horner in t
                    total = total * t + c[k] * math.comb(k, m)
                taylor.append(total)
            a0 = dd_from_decimal(taylor[0] - self._zero)
            a1_per_ns = dd_from_decimal(taylor[1] / NS_PER_S)
        result = (a0, a1_per_ns, dd_from_decimal(taylor[1]),
                  np.array([float(x) for x in taylor[2:]]))
        if len(self._anchor_cache) > 4096:
            self._anchor_cache.clear()
        self._anchor_cache[index] = result
        return result

    # -- evaluation ---------------------------------------------------------------
    def _raw_phase(self, tdb_ns, extra_s, binary=True):
        """Phase as a double-double (hi, lo) and flags at barycentric instants
        tdb_ns + extra_s (emission times after removing the binary delay)."""
        flags = np.zeros(tdb_ns.shape, np.uint32)
        if binary and self.model.binary is not None:
            extra_s, converged = self._remove_binary_delay(tdb_ns, extra_s)
            flags |= np.where(converged, 0, Quality.BINARY_NOT_CONVERGED).astype(np.uint32)
        since = tdb_ns - self._ref_ns
        offset_ns, (a0_hi, a0_lo, a1n_hi, a1n_lo, a1_hi, a1_lo, tail) = self._anchors_for(since)
        # a1 * offset: exactly for the whole-ns part (up to 3 h, 1e7 cycles at 1 kHz);
        # the extra part (|extra| < ~600 s) in float64, good to 7e-11 cycles at 1 kHz
        t1_hi, t1_lo = two_prod(a1n_hi, offset_ns)
        t1_lo += a1n_lo * offset_ns
        t2 = (a1_hi + a1_lo) * extra_s
        # float64 tail: sum_{m>=2} a_m d^m (Horner), plus glitches and noise
        d = offset_ns * 1e-9 + extra_s
        small = np.zeros_like(d)
        for m in range(len(tail) - 1, -1, -1):
            small += tail[m]
            small *= d
        small *= d
        if self._glitches or self.model.timing_noise is not None:
            small += self._glitch_phase(tdb_ns, extra_s) + self._noise_phase(since, extra_s)
        else:
            small += 0.0  # as adding the (zero) terms would: -0.0 becomes 0.0
        hi, lo = two_sum(t1_hi, t2)
        lo += t1_lo + small
        hi, lo = dd_add(a0_hi, a0_lo, hi, lo)
        return hi, lo, flags

    def _remove_binary_delay(self, tdb_ns, extra_s):
        """``extra_s`` minus the binary delay at emission, and where that converged.

        Whole seconds (exact in float64) are passed apart from the rest, which keeps
        the orbital phase exact however many orbits have passed.
        """
        whole_s, rest_ns = np.divmod(tdb_ns - self._binary_ns, NS_PER_S)
        delay, converged = emission_delay(
            self.model.binary, whole_s.astype(np.float64),
            rest_ns * 1e-9 + (extra_s - self._binary_rem_s))
        return extra_s - delay, converged

    def _anchors_for(self, since):
        """Offsets (float64 ns, exact: below 2**53) of ``since`` (ns from the reference
        epoch) from their nearest anchors, and those anchors' coefficients: a0, a1/ns,
        a1/s (hi, lo) and the tail.

        A batch within one anchor (the usual case) gets scalars, with no division per
        event; otherwise each coefficient is gathered per event.
        """
        anchor_ns = ANCHOR_S * NS_PER_S
        half = anchor_ns // 2
        first = (int(since.min()) + half) // anchor_ns if since.size else 0
        if not since.size or first == (int(since.max()) + half) // anchor_ns:
            a0, a1n, a1, tail = self._anchor(first)
            return (since - first * anchor_ns).astype(np.float64), (*a0, *a1n, *a1, tail)
        index = (since + half) // anchor_ns
        offset_ns = (since - index * anchor_ns).astype(np.float64)
        first, last = int(index.min()), int(index.max())
        if last - first > 4 * index.size + 16:
            keys, position = np.unique(index, return_inverse=True)
        else:
            keys, position = np.arange(first, last + 1), index - first
        anchors = [self._anchor(int(k)) for k in keys]
        gathered = (np.array([a[i][j] for a in anchors])[position]
                    for i in range(3) for j in range(2))
        tail = np.stack([a[3] for a in anchors], axis=1)[:, position]
        return offset_ns, (*gathered, tail)

    def _glitch_phase(self, tdb_ns, extra_s):
        total = np.zeros(tdb_ns.shape)
        for (epoch_ns, epoch_rem), g in self._glitches:
            dt = (tdb_ns - epoch_ns) * 1e-9 + (extra_s - float(epoch_rem))
            after = dt > 0
            if not after.any():
                continue
            dt = np.where(after, dt, 0.0)
            term = (g.phase_step_cycles + g.frequency_step_hz * dt
                    + 0.5 * g.frequency_derivative_step_hz_per_s * dt * dt)
            for r in g.recoveries:
                tau = r.timescale_days * 86_400.0
                term = term + r.frequency_step_hz * tau * -np.expm1(-dt / tau)
            total += np.where(after, term, 0.0)
        return total

    def _noise_phase(self, since_ns, extra_s):
        noise = self.model.timing_noise
        if noise is None:
            return 0.0
        t = since_ns * 1e-9 + (extra_s - self._ref_rem_s)
        omega = 2 * np.pi / (noise.fundamental_period_days * 86_400.0)
        total = np.zeros(t.shape)
        for j, (a, b) in enumerate(zip(noise.sine_cycles, noise.cosine_cycles, strict=True), 1):
            total += a * np.sin(j * omega * t) + b * np.cos(j * omega * t)
        return total

    def phase(self, tdb_ns, extra_s=None):
        """Rotational phase at barycentric arrival instants.

        Parameters
        ----------
        tdb_ns : int64 array
            Barycentric arrival instants, whole ns since 2000-01-01T12:00:00 TDB.
        extra_s : float64 array, optional
            Sub-nanosecond and not-yet-added parts (seconds), e.g. the
            barycentric correction when ``tdb_ns`` still holds TT at the site.

        Returns
        -------
        pulse_number : int64 array
        phase : float64 array in [0, 1) (cycles)
        flags : uint32 array (OUTSIDE_MODEL_VALIDITY, BINARY_NOT_CONVERGED)
        """
        tdb_ns = np.asarray(tdb_ns, dtype=np.int64)
        extra_s = np.zeros(tdb_ns.shape) if extra_s is None else np.asarray(extra_s, np.float64)
        hi, lo, flags = self._raw_phase(tdb_ns, extra_s)
        if tdb_ns.size and not (tdb_ns.min() >= self.valid_from_ns
                                and tdb_ns.max() <= self.valid_until_ns):
            outside = (tdb_ns < self.valid_from_ns) | (tdb_ns > self.valid_until_ns)
            flags |= np.where(outside, Quality.OUTSIDE_MODEL_VALIDITY, 0).astype(np.uint32)
        pulse, fraction = floor_and_fraction(hi, lo)
        return pulse, fraction, flags

    def frequency_at(self, tdb_ns) -> np.ndarray:
        """Apparent spin frequency (Hz, float64) at barycentric instants, without
        glitches or the binary Doppler factor (for converting cycles to time)."""
        since = (np.asarray(tdb_ns, dtype=np.int64) - self._ref_ns) * 1e-9
        f = np.zeros(since.shape)
        for k, coefficient in enumerate(self._coefficients[1:], 1):
            f = f + k * float(coefficient) * since ** (k - 1)
        return f
