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

Accumulation speed. Only cos and sin of the fundamental angle are evaluated per
event. Higher harmonics follow from the complex recurrence
``z_k = z_(k-1) · z_1`` with ``z_1 = exp(2πiφ)`` (rounding error grows about
linearly in k, ~k·1e-16), processed in chunks that fit in cache.

The module does no I/O, holds no clock and imports neither zmq nor pyarrow.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Mapping
from typing import Any

import numpy as np

from turnstamp.errors import InputError

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

_CHUNK = 8192  # events per pass: the (harmonics x chunk) complex block stays in cache
_TWO_PI = 2.0 * math.pi
_MOMENT_KEYS = (
    "kind", "version", "harmonics", "bins", "count", "weighted", "sum_w", "sum_w2",
    "cos_sums", "sin_sums", "hist_w", "hist_w2",
)


def positive_int(name: str, value: object) -> int:
    """``value`` as an int; ``ValueError`` naming ``name`` unless it is an integer >= 1."""
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


def _event_arrays(phases, weights):
    """Phases (and weights) as contiguous float64 vectors of the same length."""
    phases = np.ascontiguousarray(phases, dtype=np.float64).reshape(-1)
    if weights is not None:
        weights = np.ascontiguousarray(weights, dtype=np.float64).reshape(-1)
        if weights.shape != phases.shape:
            raise ValueError(f"weights has {weights.size} values but phases has {phases.size}")
    return phases, weights


def _reduced_phases(phi: np.ndarray) -> np.ndarray:
    """Finite phases (cycles) reduced into [0, 1); ``ValueError`` on a non-finite one."""
    lowest, highest = phi.min(), phi.max()
    if not (math.isfinite(lowest) and math.isfinite(highest)):
        raise ValueError("phases must be finite")
    if lowest < 0.0 or highest >= 1.0:
        phi = phi - np.floor(phi)
        phi[phi >= 1.0] = 0.0  # tiny negative phases round up to exactly 1
    return phi


def _harmonic_sums(phi, w, block, unit, angle) -> np.ndarray:
    """Σ w e^{2πikφ} for k = 1..harmonics over one chunk, in the scratch arrays.

    u = exp(2πiφ) once per event; row k of the block holds w·u^(k+1) by the
    recurrence row_k = row_(k-1)·u, so each harmonic's weighted sum is a plain row
    sum. (No BLAS here: threaded BLAS on blocks this small is slower, not faster.)
    """
    m = phi.size
    z = block[:, :m]
    u = unit[:m]
    a = angle[:m]
    np.multiply(phi, _TWO_PI, out=a)
    np.cos(a, out=u.real)
    np.sin(a, out=u.imag)
    if w is not None:
        if not w.min() >= 0.0 or not math.isfinite(w.max()):
            raise ValueError("weights must be finite and >= 0")
        np.multiply(u.view(np.float64).reshape(m, 2), w[:, None],
                    out=z[0].view(np.float64).reshape(m, 2))
    for k in range(1, block.shape[0]):
        np.multiply(z[k - 1], u, out=z[k])
    return z.sum(axis=1)


def _add_histogram(phi, w, bins, angle, hist_w, hist_w2) -> None:
    """Add one chunk to the Σw and Σw² phase histograms (``hist_w2`` is ``hist_w``
    itself when unweighted)."""
    # φ·bins < bins for every float64 φ < 1 (the product's rounding error is below
    # half an ulp of bins), so no clamp is needed
    a = angle[:phi.size]
    np.multiply(phi, bins, out=a)
    index = a.astype(np.intp)
    if w is None:
        hist_w += np.bincount(index, minlength=bins)
    else:
        hist_w += np.bincount(index, weights=w, minlength=bins)
        hist_w2 += np.bincount(index, weights=w * w, minlength=bins)


def _accumulate(phases, weights, harmonics: int, bins: int):
    """Harmonic sums and histograms of a whole batch, chunk by chunk (nothing committed)."""
    chunk = min(_CHUNK, phases.size)
    block, angle, spare = _scratch(harmonics)
    unit = spare if weights is not None else block[0]
    sums = np.zeros(harmonics, dtype=np.complex128)
    hist_w = np.zeros(bins)
    hist_w2 = np.zeros(bins) if weights is not None else hist_w
    for start in range(0, phases.size, chunk):
        phi = _reduced_phases(phases[start : start + chunk])
        w = None if weights is None else weights[start : start + chunk]
        sums += _harmonic_sums(phi, w, block, unit, angle)
        _add_histogram(phi, w, bins, angle, hist_w, hist_w2)
    return sums, hist_w, hist_w2


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
        sums, hist_w, hist_w2 = _accumulate(phases, weights, self.harmonics, self.bins)
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
