"""Trigonometric moments of pulse phases: the sums every periodicity test is built on.

Theory of operation
-------------------
Every periodicity test used by turnstamp (Z²ₘ, the Rayleigh test, the H-test, in
their photon-weighted forms; :mod:`turnstamp.core.periodicity`) depends on the
events only through a few sums, for phases φ in cycles and weights w (photon
probability weights; 1 when unweighted):

    count,  Σw,  Σw²,  C_k = Σ w cos 2πkφ,  S_k = Σ w sin 2πkφ   (k = 1..harmonics)

plus, for the light curve, a histogram of Σw and Σw² over ``bins`` equal phase
bins on [0, 1). All of them add, so partial results from different batches,
workers or time intervals merge exactly (up to float rounding) by addition.
:class:`PhaseMoments` keeps these sums; :class:`turnstamp.core.timebinned.TimeBinnedMoments`
keeps one per fixed time interval for sliding windows.

Accumulation speed: the sums come from :mod:`turnstamp.core.harmonicsums`, which
evaluates one unit vector exp(2πiφ) per event (by table and Taylor series) and the
higher harmonics by complex recurrence, in chunks that fit in cache, for any number
of consecutive segments of events at once.

The module does no I/O, holds no clock and imports neither zmq nor pyarrow.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from turnstamp.errors import InputError

from .harmonicsums import SegmentSums, segment_sums
from .momentstate import (
    STATE_VERSION,
    check_keys,
    state_bool,
    state_float,
    state_floats,
    state_int,
)

__all__ = ["MAX_HARMONICS", "DEFAULT_BINS", "PhaseMoments", "positive_int"]

MAX_HARMONICS = 20
"""Harmonics kept by default, and the largest m the H-test searches."""
DEFAULT_BINS = 32
"""Phase bins of the light-curve histogram by default."""

_ONE_SEGMENT = np.zeros(1, dtype=np.intp)
_MOMENT_KEYS = (
    "kind", "version", "harmonics", "bins", "count", "weighted", "sum_w", "sum_w2",
    "cos_sums", "sin_sums", "hist_w", "hist_w2",
)


def positive_int(name: str, value: object) -> int:
    """``value`` as an int; ``ValueError`` naming ``name`` unless it is an integer >= 1."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{name} must be a positive integer, got {value!r}")
    return int(value)


def _event_arrays(phases, weights):
    """Phases (and weights) as contiguous float64 vectors of the same length."""
    phases = np.ascontiguousarray(phases, dtype=np.float64).reshape(-1)
    if weights is not None:
        weights = np.ascontiguousarray(weights, dtype=np.float64).reshape(-1)
        if weights.shape != phases.shape:
            raise ValueError(f"weights has {weights.size} values but phases has {phases.size}")
    return phases, weights


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
        self.harmonics = positive_int("harmonics", harmonics)
        self.bins = positive_int("bins", bins)
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
        phases, weights = _event_arrays(phases, weights)
        n = phases.size
        if n == 0:  # an empty batch changes nothing, not even ``weighted``
            return self
        found = segment_sums(phases, weights, _ONE_SEGMENT, self.harmonics, self.bins)
        self.add_segment(found, 0, weights is not None)
        return self

    @classmethod
    def from_segment(cls, found: SegmentSums, row: int, weighted: bool) -> PhaseMoments:
        """New moments holding row ``row`` of ``harmonicsums.segment_sums`` output (one
        segment of events; ``weighted``: they came with weights)."""
        if int(found.counts[row]) == 0:
            return cls(found.sums.shape[1], found.hist_w.shape[1])
        new = cls.__new__(cls)
        new.harmonics, new.bins = found.sums.shape[1], found.hist_w.shape[1]
        new.count = int(found.counts[row])
        new.weighted = weighted
        new.cos_sums = found.sums[row].real.copy()
        new.sin_sums = found.sums[row].imag.copy()
        new.hist_w = found.hist_w[row].copy()
        new.hist_w2 = found.hist_w2[row].copy()
        if weighted:
            new.sum_w, new.sum_w2 = float(new.hist_w.sum()), float(new.hist_w2.sum())
        else:
            new.sum_w = new.sum_w2 = float(new.count)
        return new

    def add_segment(self, found: SegmentSums, row: int, weighted: bool) -> None:
        """Add row ``row`` of ``harmonicsums.segment_sums`` output (the kernel's sums of
        one segment of events; ``weighted``: they came with weights)."""
        count = int(found.counts[row])
        if count == 0:  # an empty segment changes nothing, not even ``weighted``
            return
        hist_w, hist_w2 = found.hist_w[row], found.hist_w2[row]
        if weighted:
            sum_w, sum_w2 = float(hist_w.sum()), float(hist_w2.sum())
        else:
            sum_w = sum_w2 = float(count)
        self.cos_sums += found.sums[row].real
        self.sin_sums += found.sums[row].imag
        self.hist_w += hist_w
        self.hist_w2 += hist_w2
        self.weighted = self.weighted or weighted
        self.sum_w += sum_w
        self.sum_w2 += sum_w2
        self.count += count

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
        """An independent copy."""
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
        """True before any event was added."""
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
            "version": STATE_VERSION,
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
        check_keys(state, field, "PhaseMoments", _MOMENT_KEYS)
        harmonics = state_int(state, field, "harmonics", minimum=1)
        bins = state_int(state, field, "bins", minimum=1)
        new = cls(harmonics, bins)
        new.count = state_int(state, field, "count", minimum=0)
        new.weighted = state_bool(state, field, "weighted")
        new.sum_w = state_float(state, field, "sum_w", nonnegative=True)
        new.sum_w2 = state_float(state, field, "sum_w2", nonnegative=True)
        new.cos_sums = state_floats(state, field, "cos_sums", harmonics)
        new.sin_sums = state_floats(state, field, "sin_sums", harmonics)
        new.hist_w = state_floats(state, field, "hist_w", bins, nonnegative=True)
        new.hist_w2 = state_floats(state, field, "hist_w2", bins, nonnegative=True)
        if new.count == 0 and (new.sum_w2 != 0.0 or new.sum_w != 0.0):
            raise InputError(f"{field}.count", 0, "is 0 but the weight sums are not")
        return new
