"""Trigonometric moments of pulse phases and the periodicity tests built on them.

Theory of operation
-------------------
Every periodicity test used by turnstamp (Z²ₘ, the Rayleigh test, the H-test, in
their photon-weighted forms) depends on the events only through a few sums, for
phases φ in cycles and weights w (photon probability weights; 1 when unweighted):

    count,  Σw,  Σw²,  C_k = Σ w cos 2πkφ,  S_k = Σ w sin 2πkφ   (k = 1..harmonics)

plus, for the light curve, a histogram of Σw and Σw² over ``bins`` equal phase
bins on [0, 1). All of them add, so partial results from different batches,
workers or time intervals merge exactly (up to float rounding) by addition.
:class:`PhaseMoments` keeps these sums; :class:`TimeBinnedMoments` keeps one
``PhaseMoments`` per fixed time interval so that sliding windows cost
O(number of intervals), never a pass over the events.

Accumulation speed. Only cos and sin of the fundamental angle are evaluated per
event. Higher harmonics follow from the complex recurrence
``z_k = z_(k-1) · z_1`` with ``z_1 = exp(2πiφ)`` (rounding error grows about
linearly in k, ~k·1e-16), processed in chunks that fit in cache, and the
weighted sums over a chunk are one complex matrix-vector product.

Statistics use the weighted normalisation of Kerr (2011, ApJ 732, 38):

    Z²_m = (2 / Σw²) Σ_{k≤m} (C_k² + S_k²)

which for unit weights is the Z²ₘ of Buccheri et al. (1983, A&A 128, 245).

Conventions
-----------
* ``log_p`` is the **natural** logarithm of the chance probability. It is computed
  in log space and stays finite and accurate far into the tail; ``p = exp(log_p)``
  may underflow to 0.
* ``sigma`` is the **one-sided** Gaussian equivalent, σ = Φ⁻¹(1 − p), so that
  p = 2.87e-7 is 5σ (two-sided tables give larger σ for the same p). p = 1 maps to
  σ = −inf and p = 0.5 to σ = 0.

The module does no I/O, holds no clock and imports neither zmq nor pyarrow.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import special

from turnstamp.errors import InputError

__all__ = [
    "MAX_HARMONICS",
    "DEFAULT_BINS",
    "H_CALIBRATED_UP_TO",
    "PhaseMoments",
    "TimeBinnedMoments",
    "TestResult",
    "z2_from_sums",
    "z2_series",
    "z2_test",
    "rayleigh_test",
    "h_test",
    "h_log_p",
    "chi2_even_log_sf",
    "sigma_from_log_p",
    "log_p_from_sigma",
    "trials_log_p",
]

MAX_HARMONICS = 20
"""Harmonics kept by default, and the largest m the H-test searches."""
DEFAULT_BINS = 32
"""Phase bins of the light-curve histogram by default."""
H_CALIBRATED_UP_TO = 70.0
"""H beyond which exp(-0.4 H) is an extrapolation (de Jager & Büsching 2010, from memory)."""

_CHUNK = 8192  # events per pass: the (harmonics x chunk) complex block stays in cache
_STATE_VERSION = 1
_TWO_PI = 2.0 * math.pi


# ---------------------------------------------------------------------------------------------
# PhaseMoments


def _positive_int(name: str, value: object) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{name} must be a positive integer, got {value!r}")
    return int(value)


_LOCAL = threading.local()


def _scratch(harmonics: int):
    """Per-thread work arrays for ``update``, reused between calls: a fresh 2.6 MB
    block per call would cost page faults on every batch."""
    cached = getattr(_LOCAL, "arrays", None)
    if cached is None or cached[0].shape[0] != harmonics:
        cached = (np.empty((harmonics, _CHUNK), dtype=np.complex128), np.empty(_CHUNK),
                  np.empty(_CHUNK, dtype=np.complex128))
        _LOCAL.arrays = cached
    return cached


class PhaseMoments:
    """Additive trigonometric moments and phase histogram of weighted events.

    Attributes (all sums over the events added so far):
        harmonics: number of harmonics k = 1..harmonics kept.
        bins: number of equal phase bins of the histogram on [0, 1).
        count: number of events.
        weighted: True once any non-empty update supplied weights.
        sum_w, sum_w2: Σw and Σw².
        cos_sums, sin_sums: float64 arrays, ``cos_sums[k-1] = Σ w cos 2πkφ``.
        hist_w, hist_w2: float64 arrays of Σw and Σw² per phase bin
            (bin b holds b/bins <= φ mod 1 < (b+1)/bins).
    """

    def __init__(self, harmonics: int = MAX_HARMONICS, bins: int = DEFAULT_BINS):
        self.harmonics = _positive_int("harmonics", harmonics)
        self.bins = _positive_int("bins", bins)
        self.count = 0
        self.weighted = False
        self.sum_w = 0.0
        self.sum_w2 = 0.0
        self.cos_sums = np.zeros(self.harmonics)
        self.sin_sums = np.zeros(self.harmonics)
        self.hist_w = np.zeros(self.bins)
        self.hist_w2 = np.zeros(self.bins)

    # -- accumulation ----------------------------------------------------------------------

    def update(self, phases, weights=None) -> PhaseMoments:
        """Add events with ``phases`` (cycles) and optional ``weights`` (>= 0).

        Phases outside [0, 1) are reduced modulo 1. The update is atomic: on a
        non-finite phase or weight, a negative weight or a shape mismatch it raises
        ``ValueError`` and leaves the moments unchanged. Supplying weights (for at
        least one event) sets ``weighted``. Returns ``self``.
        """
        phases = np.ascontiguousarray(phases, dtype=np.float64).reshape(-1)
        if weights is not None:
            weights = np.ascontiguousarray(weights, dtype=np.float64).reshape(-1)
            if weights.shape != phases.shape:
                raise ValueError(
                    f"weights has {weights.size} values but phases has {phases.size}"
                )
        n = phases.size
        if n == 0:  # an empty batch changes nothing, not even ``weighted``
            return self

        harmonics, bins = self.harmonics, self.bins
        chunk = min(_CHUNK, n)
        block, angle, spare = _scratch(harmonics)
        unit = spare if weights is not None else block[0]
        sums = np.zeros(harmonics, dtype=np.complex128)
        hist_w = np.zeros(bins)
        hist_w2 = np.zeros(bins) if weights is not None else hist_w

        for start in range(0, n, chunk):
            phi = phases[start : start + chunk]
            m = phi.size
            lowest, highest = phi.min(), phi.max()
            if not (math.isfinite(lowest) and math.isfinite(highest)):
                raise ValueError("phases must be finite")
            if lowest < 0.0 or highest >= 1.0:
                phi = phi - np.floor(phi)
                phi[phi >= 1.0] = 0.0  # tiny negative phases round up to exactly 1

            # u = exp(2πiφ) once per event; row k holds w·u^(k+1) by the recurrence
            # row_k = row_(k-1)·u, so each harmonic's weighted sum is a plain row sum.
            # (No BLAS here: threaded BLAS on blocks this small is slower, not faster.)
            z = block[:, :m]
            u = unit[:m]
            a = angle[:m]
            np.multiply(phi, _TWO_PI, out=a)
            np.cos(a, out=u.real)
            np.sin(a, out=u.imag)
            if weights is not None:
                w = weights[start : start + chunk]
                if not w.min() >= 0.0 or not math.isfinite(w.max()):
                    raise ValueError("weights must be finite and >= 0")
                np.multiply(u.view(np.float64).reshape(m, 2), w[:, None],
                            out=z[0].view(np.float64).reshape(m, 2))
            for k in range(1, harmonics):
                np.multiply(z[k - 1], u, out=z[k])
            sums += z.sum(axis=1)

            # histogram: φ·bins < bins for every float64 φ < 1 (the product's rounding
            # error is below half an ulp of bins), so no clamp is needed
            np.multiply(phi, bins, out=a)
            index = a.astype(np.intp)
            if weights is None:
                hist_w += np.bincount(index, minlength=bins)
            else:
                hist_w += np.bincount(index, weights=w, minlength=bins)
                hist_w2 += np.bincount(index, weights=w * w, minlength=bins)

        if weights is None:
            sum_w = sum_w2 = float(n)
        else:
            sum_w, sum_w2 = float(hist_w.sum()), float(hist_w2.sum())
        # commit only when everything is in
        self.cos_sums += sums.real
        self.sin_sums += sums.imag
        self.hist_w += hist_w
        if weights is None:
            self.hist_w2 += hist_w
        else:
            self.hist_w2 += hist_w2
            self.weighted = True
        self.sum_w += sum_w
        self.sum_w2 += sum_w2
        self.count += n
        return self

    # -- combination -----------------------------------------------------------------------

    def _check_compatible(self, other: object) -> PhaseMoments:
        if not isinstance(other, PhaseMoments):
            raise TypeError(f"cannot combine PhaseMoments with {type(other).__name__}")
        if other.harmonics != self.harmonics or other.bins != self.bins:
            raise ValueError(
                "cannot combine PhaseMoments with different shapes: "
                f"harmonics={self.harmonics}, bins={self.bins} versus "
                f"harmonics={other.harmonics}, bins={other.bins}"
            )
        return other

    def _add_in_place(self, other: PhaseMoments) -> PhaseMoments:
        self.count += other.count
        self.weighted = self.weighted or other.weighted
        self.sum_w += other.sum_w
        self.sum_w2 += other.sum_w2
        self.cos_sums += other.cos_sums
        self.sin_sums += other.sin_sums
        self.hist_w += other.hist_w
        self.hist_w2 += other.hist_w2
        return self

    def merge(self, other: PhaseMoments) -> PhaseMoments:
        """New moments holding the events of both (same harmonics and bins)."""
        self._check_compatible(other)
        return self.copy()._add_in_place(other)

    def __add__(self, other: PhaseMoments) -> PhaseMoments:
        return self.merge(other)

    def __radd__(self, other: object) -> PhaseMoments:
        if isinstance(other, int) and other == 0:  # lets sum() start from 0
            return self.copy()
        return NotImplemented

    def __iadd__(self, other: PhaseMoments) -> PhaseMoments:
        self._check_compatible(other)
        return self._add_in_place(other)

    def copy(self) -> PhaseMoments:
        new = PhaseMoments.__new__(PhaseMoments)
        new.harmonics = self.harmonics
        new.bins = self.bins
        new.count = self.count
        new.weighted = self.weighted
        new.sum_w = self.sum_w
        new.sum_w2 = self.sum_w2
        new.cos_sums = self.cos_sums.copy()
        new.sin_sums = self.sin_sums.copy()
        new.hist_w = self.hist_w.copy()
        new.hist_w2 = self.hist_w2.copy()
        return new

    @property
    def is_empty(self) -> bool:
        return self.count == 0

    def __repr__(self) -> str:
        return (
            f"PhaseMoments(harmonics={self.harmonics}, bins={self.bins}, count={self.count}, "
            f"weighted={self.weighted}, sum_w={self.sum_w:.6g})"
        )

    # -- state -----------------------------------------------------------------------------

    def to_state(self) -> dict[str, Any]:
        """JSON-serialisable snapshot (ints, floats, bools and lists of floats)."""
        return {
            "kind": "PhaseMoments",
            "version": _STATE_VERSION,
            "harmonics": self.harmonics,
            "bins": self.bins,
            "count": self.count,
            "weighted": self.weighted,
            "sum_w": float(self.sum_w),
            "sum_w2": float(self.sum_w2),
            "cos_sums": self.cos_sums.tolist(),
            "sin_sums": self.sin_sums.tolist(),
            "hist_w": self.hist_w.tolist(),
            "hist_w2": self.hist_w2.tolist(),
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any], field: str = "state") -> PhaseMoments:
        """Rebuild from :meth:`to_state` output; raises ``InputError`` naming the bad field."""
        _check_keys(state, field, "PhaseMoments", _MOMENT_KEYS)
        harmonics = _state_int(state, field, "harmonics", minimum=1)
        bins = _state_int(state, field, "bins", minimum=1)
        new = cls(harmonics, bins)
        new.count = _state_int(state, field, "count", minimum=0)
        new.weighted = _state_bool(state, field, "weighted")
        new.sum_w = _state_float(state, field, "sum_w", nonnegative=True)
        new.sum_w2 = _state_float(state, field, "sum_w2", nonnegative=True)
        new.cos_sums = _state_floats(state, field, "cos_sums", harmonics)
        new.sin_sums = _state_floats(state, field, "sin_sums", harmonics)
        new.hist_w = _state_floats(state, field, "hist_w", bins, nonnegative=True)
        new.hist_w2 = _state_floats(state, field, "hist_w2", bins, nonnegative=True)
        if new.count == 0 and (new.sum_w2 != 0.0 or new.sum_w != 0.0):
            raise InputError(f"{field}.count", 0, "is 0 but the weight sums are not")
        return new


_MOMENT_KEYS = (
    "kind", "version", "harmonics", "bins", "count", "weighted", "sum_w", "sum_w2",
    "cos_sums", "sin_sums", "hist_w", "hist_w2",
)


def _check_keys(state: object, field: str, kind: str, keys: Iterable[str]) -> None:
    if not isinstance(state, Mapping):
        raise InputError(field, type(state).__name__, "must be a mapping (from to_state)")
    expected = set(keys)
    missing = sorted(expected - set(state))
    unknown = sorted(set(state) - expected)
    if missing:
        raise InputError(field, missing, "is missing these keys")
    if unknown:
        raise InputError(field, unknown, "has unknown keys")
    if state["kind"] != kind:
        raise InputError(f"{field}.kind", state["kind"], f"must be {kind!r}")
    if state["version"] != _STATE_VERSION:
        raise InputError(f"{field}.version", state["version"], f"supported: {_STATE_VERSION}")


def _state_int(state, field, key, minimum=None, optional=False):
    value = state[key]
    if value is None and optional:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise InputError(f"{field}.{key}", value, "must be an integer")
    if minimum is not None and value < minimum:
        raise InputError(f"{field}.{key}", value, f"must be >= {minimum}")
    return int(value)


def _state_bool(state, field, key):
    value = state[key]
    if not isinstance(value, bool):
        raise InputError(f"{field}.{key}", value, "must be true or false")
    return value


def _state_float(state, field, key, nonnegative=False):
    value = state[key]
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)):
        raise InputError(f"{field}.{key}", value, "must be a number")
    value = float(value)
    if not math.isfinite(value) or (nonnegative and value < 0.0):
        problem = "must be finite and >= 0" if nonnegative else "must be finite"
        raise InputError(f"{field}.{key}", value, problem)
    return value


def _state_floats(state, field, key, length, nonnegative=False):
    value = state[key]
    if isinstance(value, (str, bytes, Mapping)) or not isinstance(value, (list, tuple, np.ndarray)):
        raise InputError(f"{field}.{key}", type(value).__name__, "must be a list of numbers")
    if len(value) != length:
        raise InputError(f"{field}.{key}", f"{len(value)} values", f"must hold {length}")
    if any(isinstance(v, bool) or not isinstance(v, (int, float, np.floating, np.integer))
           for v in value):
        raise InputError(f"{field}.{key}", list(value)[:8], "must hold only numbers")
    array = np.array(value, dtype=np.float64)
    if not np.isfinite(array).all():
        raise InputError(f"{field}.{key}", "non-finite value", "must be finite")
    if nonnegative and (array < 0.0).any():
        raise InputError(f"{field}.{key}", float(array.min()), "must be >= 0")
    return array


# ---------------------------------------------------------------------------------------------
# TimeBinnedMoments


class TimeBinnedMoments:
    """Partial :class:`PhaseMoments` per fixed time interval, for sliding windows.

    Events are grouped by interval index ``time_ns // interval_ns`` (times are int64
    nanoseconds in any scale; floor division, so negative times work). Interval j
    covers [j·interval_ns, (j+1)·interval_ns). With ``retain_ns`` set, intervals that
    end at or before ``latest_ns − retain_ns`` are folded into an "expired" total and
    dropped, so memory holds about ``retain_ns / interval_ns + 2`` intervals; events
    that arrive for an expired interval go straight into the expired total.
    :meth:`total` always covers everything ever added.
    """

    def __init__(self, interval_ns: int, harmonics: int = MAX_HARMONICS,
                 bins: int = DEFAULT_BINS, retain_ns: int | None = None):
        self.interval_ns = _positive_int("interval_ns", interval_ns)
        self.harmonics = _positive_int("harmonics", harmonics)
        self.bins = _positive_int("bins", bins)
        if retain_ns is not None:
            if isinstance(retain_ns, bool) or not isinstance(retain_ns, (int, np.integer)) \
                    or retain_ns < 0:
                raise ValueError(f"retain_ns must be None or an integer >= 0, got {retain_ns!r}")
            retain_ns = int(retain_ns)
        self.retain_ns = retain_ns
        self.latest_ns: int | None = None
        self._intervals: dict[int, PhaseMoments] = {}
        self._expired = PhaseMoments(self.harmonics, self.bins)
        self._expired_through: int | None = None  # largest folded interval index

    # -- accumulation ----------------------------------------------------------------------

    def _slot(self, index: int) -> PhaseMoments:
        if self._expired_through is not None and index <= self._expired_through:
            return self._expired
        moments = self._intervals.get(index)
        if moments is None:
            moments = self._intervals[index] = PhaseMoments(self.harmonics, self.bins)
        return moments

    def update(self, times_ns, phases, weights=None) -> TimeBinnedMoments:
        """Add events at ``times_ns`` (int64 ns) with ``phases`` and optional ``weights``.

        Any order works; a batch that is time-sorted (the usual case, one or two
        intervals) is split without sorting. Returns ``self``.
        """
        times = np.asarray(times_ns).reshape(-1)
        if times.dtype.kind not in "iu":
            raise TypeError(f"times_ns must be integer nanoseconds, got dtype {times.dtype}")
        times = times.astype(np.int64, copy=False)
        phases = np.ascontiguousarray(phases, dtype=np.float64).reshape(-1)
        if phases.shape != times.shape:
            raise ValueError(f"phases has {phases.size} values but times_ns has {times.size}")
        if weights is not None:
            weights = np.ascontiguousarray(weights, dtype=np.float64).reshape(-1)
            if weights.shape != times.shape:
                raise ValueError(
                    f"weights has {weights.size} values but times_ns has {times.size}"
                )
        if times.size == 0:
            return self
        # validate before touching any interval, so that a bad batch changes nothing
        if not np.isfinite(phases).all():
            raise ValueError("phases must be finite")
        if weights is not None and not (np.isfinite(weights).all() and (weights >= 0).all()):
            raise ValueError("weights must be finite and >= 0")

        index = times // self.interval_ns
        first = int(index[0])
        if index.size == 1 or (int(index[-1]) == first and (index == first).all()):
            groups = [(first, slice(None))]
        else:
            if not (np.diff(index) >= 0).all():
                order = np.argsort(index, kind="stable")
                index, times, phases = index[order], times[order], phases[order]
                if weights is not None:
                    weights = weights[order]
            bounds = [0, *(np.flatnonzero(np.diff(index)) + 1).tolist(), index.size]
            groups = [(int(index[a]), slice(a, b))
                      for a, b in zip(bounds[:-1], bounds[1:], strict=True)]

        for interval, part in groups:
            self._slot(interval).update(phases[part], None if weights is None else weights[part])
        newest = int(times.max())
        if self.latest_ns is None or newest > self.latest_ns:
            self.latest_ns = newest
        self._prune()
        return self

    def _prune(self) -> None:
        if self.retain_ns is None or self.latest_ns is None:
            return
        # interval j is expired when it ends at or before the cut-off
        through = (self.latest_ns - self.retain_ns) // self.interval_ns - 1
        self._expire_through(through)

    def _expire_through(self, through: int | None) -> None:
        if through is None:
            return
        if self._expired_through is not None and through <= self._expired_through:
            return
        for index in sorted(i for i in self._intervals if i <= through):
            self._expired += self._intervals.pop(index)
        self._expired_through = through

    # -- queries ---------------------------------------------------------------------------

    def window(self, length_ns: int, end_ns: int | None = None) -> PhaseMoments:
        """Sum of the intervals that overlap (end_ns − length_ns, end_ns].

        ``length_ns`` must be a positive multiple of ``interval_ns``; ``end_ns``
        defaults to :attr:`latest_ns`. The result is interval-granular: it holds every
        event of each overlapping interval, so it spans between ``length_ns`` and
        ``length_ns + interval_ns`` of event time, and with an explicit ``end_ns`` it
        includes the events after ``end_ns`` in the interval containing ``end_ns``.
        Raises ``ValueError`` when the window reaches into expired intervals.
        """
        if isinstance(length_ns, bool) or not isinstance(length_ns, (int, np.integer)) \
                or length_ns <= 0 or length_ns % self.interval_ns:
            raise ValueError(
                f"length_ns must be a positive multiple of interval_ns={self.interval_ns}, "
                f"got {length_ns!r}"
            )
        result = PhaseMoments(self.harmonics, self.bins)
        if end_ns is None:
            end_ns = self.latest_ns
            if end_ns is None:
                return result
        end_ns = int(end_ns)
        lowest = (end_ns - int(length_ns) + 1) // self.interval_ns
        highest = end_ns // self.interval_ns
        if self._expired_through is not None and lowest <= self._expired_through \
                and not self._expired.is_empty:
            raise ValueError(
                f"the window ({end_ns - length_ns}, {end_ns}] ns reaches before the retained "
                f"history (retain_ns={self.retain_ns}); only its total is kept"
            )
        if highest - lowest + 1 < len(self._intervals):
            for index in range(lowest, highest + 1):
                part = self._intervals.get(index)
                if part is not None:
                    result += part
        else:
            for index in sorted(self._intervals):
                if lowest <= index <= highest:
                    result += self._intervals[index]
        return result

    def intervals(self) -> list[tuple[int, PhaseMoments]]:
        """Retained intervals as (start_ns, copy of their moments), sorted by start."""
        return [(index * self.interval_ns, self._intervals[index].copy())
                for index in sorted(self._intervals)]

    def total(self) -> PhaseMoments:
        """Everything ever added, including expired intervals."""
        result = self._expired.copy()
        for index in sorted(self._intervals):
            result += self._intervals[index]
        return result

    @property
    def expired(self) -> PhaseMoments:
        """Copy of the folded total of the expired intervals."""
        return self._expired.copy()

    @property
    def is_empty(self) -> bool:
        return self._expired.is_empty and all(m.is_empty for m in self._intervals.values())

    def __len__(self) -> int:
        """Number of retained intervals."""
        return len(self._intervals)

    def __repr__(self) -> str:
        return (
            f"TimeBinnedMoments(interval_ns={self.interval_ns}, harmonics={self.harmonics}, "
            f"bins={self.bins}, retain_ns={self.retain_ns}, intervals={len(self._intervals)}, "
            f"latest_ns={self.latest_ns})"
        )

    # -- combination -----------------------------------------------------------------------

    def _check_compatible(self, other: object) -> TimeBinnedMoments:
        if not isinstance(other, TimeBinnedMoments):
            raise TypeError(f"cannot combine TimeBinnedMoments with {type(other).__name__}")
        mine = (self.interval_ns, self.harmonics, self.bins)
        theirs = (other.interval_ns, other.harmonics, other.bins)
        if mine != theirs:
            raise ValueError(
                "cannot combine TimeBinnedMoments with different shapes: "
                f"(interval_ns, harmonics, bins) = {mine} versus {theirs}"
            )
        return other

    def _add_in_place(self, other: TimeBinnedMoments) -> TimeBinnedMoments:
        # An interval expired on either side is expired in the result; otherwise a
        # window over it would silently miss the other side's events.
        self._expired += other._expired
        if other._expired_through is not None:
            self._expire_through(other._expired_through)
        for index, part in other._intervals.items():
            self._slot(index)._add_in_place(part)
        if other.latest_ns is not None and (self.latest_ns is None
                                            or other.latest_ns > self.latest_ns):
            self.latest_ns = other.latest_ns
        self._prune()
        return self

    def copy(self) -> TimeBinnedMoments:
        new = TimeBinnedMoments(self.interval_ns, self.harmonics, self.bins, self.retain_ns)
        new.latest_ns = self.latest_ns
        new._intervals = {i: m.copy() for i, m in self._intervals.items()}
        new._expired = self._expired.copy()
        new._expired_through = self._expired_through
        return new

    def merge(self, other: TimeBinnedMoments) -> TimeBinnedMoments:
        """New object holding the events of both; ``retain_ns`` is taken from ``self``."""
        self._check_compatible(other)
        return self.copy()._add_in_place(other)

    def __add__(self, other: TimeBinnedMoments) -> TimeBinnedMoments:
        return self.merge(other)

    def __iadd__(self, other: TimeBinnedMoments) -> TimeBinnedMoments:
        self._check_compatible(other)
        return self._add_in_place(other)

    # -- state -----------------------------------------------------------------------------

    def to_state(self) -> dict[str, Any]:
        """JSON-serialisable snapshot; interval starts are integer nanoseconds."""
        return {
            "kind": "TimeBinnedMoments",
            "version": _STATE_VERSION,
            "interval_ns": self.interval_ns,
            "harmonics": self.harmonics,
            "bins": self.bins,
            "retain_ns": self.retain_ns,
            "latest_ns": self.latest_ns,
            "expired_through": self._expired_through,
            "expired": self._expired.to_state(),
            "intervals": [[index * self.interval_ns, self._intervals[index].to_state()]
                          for index in sorted(self._intervals)],
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any], field: str = "state") -> TimeBinnedMoments:
        """Rebuild from :meth:`to_state` output; raises ``InputError`` naming the bad field."""
        _check_keys(state, field, "TimeBinnedMoments", _BINNED_KEYS)
        interval_ns = _state_int(state, field, "interval_ns", minimum=1)
        harmonics = _state_int(state, field, "harmonics", minimum=1)
        bins = _state_int(state, field, "bins", minimum=1)
        retain_ns = _state_int(state, field, "retain_ns", minimum=0, optional=True)
        new = cls(interval_ns, harmonics, bins, retain_ns)
        new.latest_ns = _state_int(state, field, "latest_ns", optional=True)
        new._expired_through = _state_int(state, field, "expired_through", optional=True)
        new._expired = _matching_moments(state["expired"], f"{field}.expired", harmonics, bins)
        if new._expired_through is None and not new._expired.is_empty:
            raise InputError(f"{field}.expired_through", None, "is null but expired holds events")
        entries = state["intervals"]
        if not isinstance(entries, (list, tuple)):
            raise InputError(f"{field}.intervals", type(entries).__name__, "must be a list")
        for number, entry in enumerate(entries):
            where = f"{field}.intervals[{number}]"
            if not isinstance(entry, (list, tuple)) or len(entry) != 2:
                raise InputError(where, entry, "must be a pair [start_ns, moments]")
            start = entry[0]
            if isinstance(start, bool) or not isinstance(start, (int, np.integer)) \
                    or start % interval_ns:
                raise InputError(f"{where}[0]", start,
                                 f"must be an integer multiple of interval_ns={interval_ns}")
            index = int(start) // interval_ns
            if index in new._intervals:
                raise InputError(f"{where}[0]", start, "appears twice")
            if new._expired_through is not None and index <= new._expired_through:
                raise InputError(f"{where}[0]", start, "lies in the expired range")
            if new.latest_ns is not None and int(start) > new.latest_ns:
                raise InputError(f"{where}[0]", start, f"starts after latest_ns={new.latest_ns}")
            new._intervals[index] = _matching_moments(entry[1], f"{where}[1]", harmonics, bins)
        if new.latest_ns is None and (new._intervals or not new._expired.is_empty):
            raise InputError(f"{field}.latest_ns", None, "is null but events are present")
        return new


_BINNED_KEYS = (
    "kind", "version", "interval_ns", "harmonics", "bins", "retain_ns", "latest_ns",
    "expired_through", "expired", "intervals",
)


def _matching_moments(state, field, harmonics, bins) -> PhaseMoments:
    moments = PhaseMoments.from_state(state, field)
    if moments.harmonics != harmonics or moments.bins != bins:
        raise InputError(field, (moments.harmonics, moments.bins),
                         f"(harmonics, bins) must be ({harmonics}, {bins})")
    return moments


# ---------------------------------------------------------------------------------------------
# Statistics


@dataclass(frozen=True)
class TestResult:
    """Outcome of one periodicity test.

    ``log_p`` is the natural log of the chance probability (finite far into the
    tail), ``p = exp(log_p)`` (may underflow to 0) and ``sigma`` the one-sided
    Gaussian equivalent. ``harmonics`` is m for Z²ₘ, 1 for Rayleigh and the best m
    for the H-test. ``beyond_calibration`` marks an H value above the range over
    which the exp(−0.4 H) tail was checked (:data:`H_CALIBRATED_UP_TO`).
    """

    __test__ = False  # not a pytest test class, despite the name

    name: str
    statistic: float
    harmonics: int
    log_p: float
    p: float
    sigma: float
    count: int
    sum_w: float
    beyond_calibration: bool = False


def z2_from_sums(cos_sums, sin_sums, sum_w2):
    """Z²_m for m = 1..K from sums with K harmonics on the last axis (vectorised).

    ``Z²_m = (2/Σw²) Σ_{k≤m} (C_k² + S_k²)`` (Buccheri et al. 1983; Kerr 2011).
    Leading axes broadcast, so many realisations can be evaluated at once. Where
    Σw² = 0 (no events) the result is 0.
    """
    cos_sums = np.asarray(cos_sums, dtype=np.float64)
    sin_sums = np.asarray(sin_sums, dtype=np.float64)
    sum_w2 = np.asarray(sum_w2, dtype=np.float64)[..., None]
    power = np.cumsum(cos_sums * cos_sums + sin_sums * sin_sums, axis=-1)
    safe = np.where(sum_w2 > 0.0, sum_w2, 1.0)
    return np.where(sum_w2 > 0.0, 2.0 * power / safe, 0.0)


def z2_series(moments: PhaseMoments) -> np.ndarray:
    """Z²_m for m = 1..moments.harmonics (weighted normalisation; classic for w ≡ 1)."""
    return z2_from_sums(moments.cos_sums, moments.sin_sums, moments.sum_w2)


def chi2_even_log_sf(statistic: float, dof: int) -> float:
    """Natural log of P(χ² > statistic) for an even number of degrees of freedom.

    Closed form ``P = e^{−x/2} Σ_{j<dof/2} (x/2)^j / j!``, evaluated in log space
    (no underflow however large the statistic).
    """
    if dof < 2 or dof % 2:
        raise ValueError(f"dof must be a positive even integer, got {dof!r}")
    half = 0.5 * float(statistic)
    if not half > 0.0:  # includes 0 (and refuses NaN below)
        if math.isnan(half):
            raise ValueError("statistic is NaN")
        return 0.0
    terms = np.arange(dof // 2)
    log_terms = terms * math.log(half) - special.gammaln(terms + 1.0)
    return min(0.0, -half + float(special.logsumexp(log_terms)))


def _result(name, statistic, harmonics, log_p, moments, beyond=False) -> TestResult:
    return TestResult(
        name=name,
        statistic=float(statistic),
        harmonics=int(harmonics),
        log_p=float(log_p),
        p=math.exp(log_p),
        sigma=sigma_from_log_p(log_p),
        count=int(moments.count),
        sum_w=float(moments.sum_w),
        beyond_calibration=beyond,
    )


def z2_test(moments: PhaseMoments, m: int = 2) -> TestResult:
    """Z²ₘ test: p = P(χ²_{2m} > Z²ₘ), exact closed form for even dof, in log space.

    The χ² null distribution is asymptotic (many events; for weights, many events
    with no single weight dominating; Kerr 2011). Name ``"Z2_<m>"``.
    """
    if isinstance(m, bool) or not isinstance(m, (int, np.integer)) \
            or not 1 <= m <= moments.harmonics:
        raise ValueError(f"m must be an integer in 1..{moments.harmonics}, got {m!r}")
    statistic = float(z2_series(moments)[m - 1])
    return _result(f"Z2_{int(m)}", statistic, m, chi2_even_log_sf(statistic, 2 * m), moments)


def rayleigh_test(moments: PhaseMoments) -> TestResult:
    """Rayleigh test, Z²₁, with the asymptotic chance probability p = exp(−Z²₁/2).

    Note: ``astropy.stats.circstats.rayleightest`` applies a small-sample correction
    (Wilkie 1983) for n < 50 and then differs from this; for n >= 50 both are
    exp(−n R̄²) with n R̄² = Z²₁/2.
    """
    statistic = float(z2_series(moments)[0])
    return _result("Rayleigh", statistic, 1, -0.5 * statistic, moments)


def h_log_p(h: float) -> float:
    """Natural log of the H-test chance probability, −0.4 H (de Jager & Büsching 2010)."""
    return -0.4 * float(h)


def h_test(moments: PhaseMoments) -> TestResult:
    """H-test: H = max_{1≤m≤20} (Z²ₘ − 4m + 4), with its best m.

    de Jager, Raubenheimer & Swanepoel (1989, A&A 221, 180) defined the test; the
    chance probability used here is P(>H) = exp(−0.4 H), the calibration of
    de Jager & Büsching (2010, A&A 517, L9) from ~10¹⁴ white-noise realisations.
    That calibration was checked by its authors to about H ≈ 70 (from memory);
    beyond :data:`H_CALIBRATED_UP_TO` the probability is an extrapolation and the
    result has ``beyond_calibration=True``. With weights the statistic is the
    weighted H of Kerr (2011) and the name is ``"weighted H"``.

    With fewer than 20 harmonics kept, the maximum runs over those available
    (the calibration assumes 20).
    """
    series = z2_series(moments)[:MAX_HARMONICS]
    m = np.arange(1, series.size + 1)
    penalised = series - 4.0 * m + 4.0
    best = int(np.argmax(penalised))
    h = float(penalised[best])
    name = "weighted H" if moments.weighted else "H"
    return _result(name, h, best + 1, h_log_p(h), moments, beyond=h > H_CALIBRATED_UP_TO)


# ---------------------------------------------------------------------------------------------
# Probability <-> sigma, trials


def sigma_from_log_p(log_p):
    """One-sided Gaussian equivalent σ = Φ⁻¹(1 − p) of a natural-log probability.

    Uses ``scipy.special.ndtri_exp`` (σ = −Φ⁻¹(p) computed from log p), accurate
    far into the tail (40σ ↔ log p ≈ −804.6). log p = 0 gives −inf. Accepts
    scalars (returns float) or arrays.
    """
    values = np.asarray(log_p, dtype=np.float64)
    if np.isnan(values).any() or (values > 0.0).any():
        raise ValueError(f"log_p must be <= 0 (a log probability), got {log_p!r}")
    sigma = -special.ndtri_exp(values)
    return float(sigma) if sigma.ndim == 0 else sigma


def log_p_from_sigma(sigma):
    """Natural log of the one-sided tail probability of ``sigma``: log(1 − Φ(σ))."""
    values = np.asarray(sigma, dtype=np.float64)
    if np.isnan(values).any():
        raise ValueError("sigma is NaN")
    log_p = special.log_ndtr(-values)
    return float(log_p) if log_p.ndim == 0 else log_p


def trials_log_p(log_p: float, trials: float) -> float:
    """Natural log of the post-trials probability 1 − (1 − p)^n for n independent trials.

    Computed as ``log(−expm1(n·log1p(−p)))`` while p is representable, and as
    log n + log p deep in the tail where n·p ≪ 1 (the rounding of 1 − p would
    otherwise lose everything). ``trials`` may be a non-integer effective number >= 1.
    """
    log_p = float(log_p)
    trials = float(trials)
    if math.isnan(log_p) or log_p > 0.0:
        raise ValueError(f"log_p must be <= 0, got {log_p!r}")
    if not (trials >= 1.0 and math.isfinite(trials)):
        raise ValueError(f"trials must be a finite number >= 1, got {trials!r}")
    if trials == 1.0 or log_p == -math.inf or log_p == 0.0:
        return log_p  # p = 1 stays 1 after any number of trials
    log_np = math.log(trials) + log_p
    if log_np < -40.0:
        # 1 − (1 − p)^n = n p (1 − (n − 1) p / 2 + …): the correction is below 1e-17
        return log_np
    if log_p > -700.0:
        exponent = trials * math.log1p(-math.exp(log_p))
    else:
        exponent = -math.exp(log_np)  # log1p(−p) = −p to full precision here
    if exponent < -math.log(2.0):
        return math.log1p(-math.exp(exponent))
    return math.log(-math.expm1(exponent))
