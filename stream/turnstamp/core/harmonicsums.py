"""The moments' kernel: Σw e^{2πikφ}, Σw and Σw² histograms per segment of events.

Theory of operation
-------------------
Events arrive sorted into consecutive *segments* (one for a plain update; one per
time interval for :class:`~turnstamp.core.timebinned.TimeBinnedMoments`). For every
segment the kernel returns the count, the complex harmonic sums
``Σ w exp(2πikφ)`` for k = 1..harmonics, and the Σw and Σw² phase histograms, in
one vectorised pass over the events, whatever the number of segments.

Work is done in chunks of ``CHUNK`` events so that the (harmonics x chunk) block
stays in cache; scratch arrays are reused per thread.

* **The fundamental** ``u = exp(2πiφ)`` comes from a table of ``TABLE_SIZE``
  exact-angle unit vectors and a short Taylor series: with j = round(φ·N), the
  remainder x = 2π(φ·N − j)/N has |x| ≤ π/N = 3.1e-3, where cos x = 1 − x²/2 + x⁴/24
  and sin x = x − x³/6 + x⁵/120 are exact to 1e-18 (the next terms), so
  u = table[j]·(cos x + i sin x) is good to a few 1e-16, better than
  ``cos(2πφ)`` whose argument alone is rounded by up to 4e-16. φ·N and φ·N − j are
  exact in float64 (N is a power of two). This costs a quarter of ``np.cos`` plus
  ``np.sin``.
* **Harmonics** follow from the recurrence ``z_k = z_(k-1)·u`` with ``z_1 = w·u``
  (rounding grows about linearly in k, ~k·1e-16).
* **Segments**: a chunk is summed along its rows per segment (one
  ``np.add.reduceat`` when it spans many) and its histogram binned with one
  ``np.bincount`` over (segment, bin) pairs.
* **Several weightings** of the same events (recipes that take the same rows)
  share the unit vectors and the histogram bins (``shared_segment_sums``).

The module does no I/O, holds no clock and imports neither zmq nor pyarrow.
"""

from __future__ import annotations

import math
import threading
from typing import NamedTuple

import numpy as np

__all__ = ["CHUNK", "TABLE_SIZE", "SegmentSums", "segment_sums", "shared_segment_sums",
           "reduced_phases", "exp_two_pi_i"]

CHUNK = 8192
"""Events per pass: the (harmonics x CHUNK) complex block stays in cache."""
TABLE_SIZE = 1024
"""Unit vectors exp(2πij/N) tabulated (16 KiB: stays in the first-level cache)."""

_TWO_PI = 2.0 * math.pi
_STEP = _TWO_PI / TABLE_SIZE
_ANGLES = np.arange(TABLE_SIZE) * _STEP  # 2πj/N: N a power of two, so exact up to rounding
_TABLE = np.cos(_ANGLES) + 1j * np.sin(_ANGLES)
_LOCAL = threading.local()
_FEW_SEGMENTS = 8  # up to this many per chunk, slice sums beat one np.add.reduceat


class SegmentSums(NamedTuple):
    """Sums over each segment of events (segment s is row s).

    Attributes
    ----------
    counts : ndarray of int64, shape (segments,)
        Events per segment.
    sums : ndarray of complex128, shape (segments, harmonics)
        ``Σ w exp(2πikφ)`` for k = 1..harmonics (w = 1 when unweighted).
    hist_w, hist_w2 : ndarray of float64, shape (segments, bins)
        Σw and Σw² per phase bin (bin b holds b/bins <= φ < (b+1)/bins); the same
        array when unweighted (Σw = Σw² = the count).
    """

    counts: np.ndarray
    sums: np.ndarray
    hist_w: np.ndarray
    hist_w2: np.ndarray


class _Scratch:
    """Work arrays of one thread, reused between calls (a fresh 2.6 MB block per call
    would cost page faults on every batch)."""

    def __init__(self, harmonics: int):
        self.block = np.empty((harmonics, CHUNK), dtype=np.complex128)
        self.unit = np.empty(CHUNK, dtype=np.complex128)
        self.taylor = np.empty(CHUNK, dtype=np.complex128)
        self.index = np.empty(CHUNK, dtype=np.intp)
        self.real = [np.empty(CHUNK) for _ in range(4)]


def _scratch(harmonics: int | None) -> _Scratch:
    """This thread's work arrays (None: any number of harmonics will do)."""
    cached = getattr(_LOCAL, "scratch", None)
    if cached is None or harmonics not in (None, cached.block.shape[0]):
        cached = _LOCAL.scratch = _Scratch(harmonics or 1)
    return cached


def reduced_phases(phi: np.ndarray) -> np.ndarray:
    """Finite phases (cycles) reduced into [0, 1); ``ValueError`` on a non-finite one."""
    lowest, highest = phi.min(), phi.max()
    if not (math.isfinite(lowest) and math.isfinite(highest)):
        raise ValueError("phases must be finite")
    return _into_unit_interval(phi, lowest, highest)


def _into_unit_interval(phi: np.ndarray, lowest: float, highest: float) -> np.ndarray:
    """Finite ``phi`` (smallest and largest value given) reduced into [0, 1)."""
    if lowest < 0.0 or highest >= 1.0:
        phi = phi - np.floor(phi)
        phi[phi >= 1.0] = 0.0  # tiny negative phases round up to exactly 1
    return phi


def _unit_vectors(phi: np.ndarray, s: _Scratch) -> np.ndarray:
    """exp(2πiφ) for phases in [0, 1), by table and Taylor series (module docstring)."""
    m = phi.size
    scaled, nearest, x, x2 = (r[:m] for r in s.real)
    taylor, unit, index = s.taylor[:m], s.unit[:m], s.index[:m]
    np.multiply(phi, TABLE_SIZE, out=scaled)
    np.rint(scaled, out=nearest)
    np.subtract(scaled, nearest, out=x)
    np.multiply(x, _STEP, out=x)
    np.multiply(x, x, out=x2)
    # cos x = 1 + x²(−1/2 + x²/24), written straight into the real parts
    np.multiply(x2, 1.0 / 24.0, out=scaled)
    np.subtract(scaled, 0.5, out=scaled)
    np.multiply(scaled, x2, out=scaled)
    np.add(scaled, 1.0, out=taylor.real)
    # sin x = x (1 + x²(−1/6 + x²/120))
    np.multiply(x2, 1.0 / 120.0, out=scaled)
    np.subtract(scaled, 1.0 / 6.0, out=scaled)
    np.multiply(scaled, x2, out=scaled)
    np.add(scaled, 1.0, out=scaled)
    np.multiply(scaled, x, out=taylor.imag)
    np.copyto(index, nearest, casting="unsafe")
    np.bitwise_and(index, TABLE_SIZE - 1, out=index)  # φ·N rounds up to N near φ = 1
    np.take(_TABLE, index, out=unit)
    np.multiply(unit, taylor, out=unit)
    return unit


def exp_two_pi_i(turns: np.ndarray) -> np.ndarray:
    """exp(2πi·turns) for angles in turns, by the same table and series (a few
    1e-16; a third of the cost of ``np.cos`` plus ``np.sin``). NaN where an angle is
    not finite, as ``np.cos`` would give."""
    turns = np.asarray(turns, dtype=np.float64).reshape(-1)
    out = np.empty(turns.size, dtype=np.complex128)
    if turns.size == 0:
        return out
    bad = None
    lowest, highest = turns.min(), turns.max()
    if not (math.isfinite(lowest) and math.isfinite(highest)):
        bad = ~np.isfinite(turns)
        turns = np.where(bad, 0.0, turns)
        lowest, highest = turns.min(), turns.max()
    turns = _into_unit_interval(turns, lowest, highest)
    s = _scratch(None)
    for lo in range(0, turns.size, CHUNK):
        out[lo : lo + CHUNK] = _unit_vectors(turns[lo : lo + CHUNK], s)
    if bad is not None:
        out[bad] = np.nan
    return out


def _harmonic_block(unit: np.ndarray, w: np.ndarray | None, s: _Scratch) -> np.ndarray:
    """Row k-1 holds w·exp(2πikφ) for k = 1..harmonics, from the unit vectors
    exp(2πiφ) (a view of the scratch block). No BLAS anywhere: threaded BLAS on
    blocks this small is slower, and on a busy machine far slower."""
    z = s.block[:, : unit.size]
    if w is None:
        z[0] = unit
    else:
        np.multiply(unit, w, out=z[0])
    for k in range(1, z.shape[0]):
        np.multiply(z[k - 1], unit, out=z[k])
    return z


def _check_weights(w: np.ndarray) -> None:
    if not w.min() >= 0.0 or not math.isfinite(w.max()):
        raise ValueError("weights must be finite and >= 0")


def _bin_index(phi: np.ndarray, bins: int, s: _Scratch) -> np.ndarray:
    # φ·bins < bins for every float64 φ < 1 (the product's rounding error is below
    # half an ulp of bins), so no clamp is needed
    scaled = s.real[0][: phi.size]
    np.multiply(phi, bins, out=scaled)
    index = s.index[: phi.size]
    np.copyto(index, scaled, casting="unsafe")
    return index


def _histograms(index, w, length, out_w, out_w2) -> None:
    """Add Σw (and Σw²) per value of ``index`` (< length) into flat output arrays."""
    if w is None:
        out_w += np.bincount(index, minlength=length)
    else:
        out_w += np.bincount(index, weights=w, minlength=length)
        out_w2 += np.bincount(index, weights=w * w, minlength=length)


def _chunk_segments(starts: np.ndarray, lo: int, hi: int) -> tuple[int, np.ndarray]:
    """First segment touching events [lo, hi) and the chunk-relative segment starts."""
    first = int(np.searchsorted(starts, lo, side="right")) - 1
    last = int(np.searchsorted(starts, hi - 1, side="right")) - 1
    local = np.empty(last - first + 1, dtype=np.intp)
    local[0] = 0
    local[1:] = starts[first + 1 : last + 1] - lo
    return first, local


def _add_sums(z: np.ndarray, local: np.ndarray, out: np.ndarray) -> None:
    """Add to out[i] the row sums of ``z`` over each column range [local[i], local[i+1])."""
    if local.size > _FEW_SEGMENTS:
        out += np.add.reduceat(z, local, axis=1).T
        return
    bounds = [*local.tolist(), z.shape[1]]
    for i in range(local.size):
        out[i] += z[:, bounds[i] : bounds[i + 1]].sum(axis=1)


def segment_sums(phases, weights, starts, harmonics: int, bins: int) -> SegmentSums:
    """Counts, harmonic sums and histograms of consecutive segments of events.

    Parameters
    ----------
    phases : ndarray of float64
        Rotational phases, cycles (reduced modulo 1 here).
    weights : ndarray of float64 or None
        Photon weights (finite, >= 0), one per phase; None for unit weights.
    starts : ndarray of int
        Index of the first event of each segment: strictly increasing, ``starts[0]
        == 0``, every segment non-empty.
    harmonics, bins : int
        Harmonics k = 1..harmonics summed; equal phase bins of the histograms.

    Returns
    -------
    SegmentSums
        Nothing is committed anywhere: a ``ValueError`` (non-finite phase or weight,
        negative weight) leaves every caller's state unchanged.
    """
    return shared_segment_sums(phases, [weights], starts, harmonics, bins)[0]


def shared_segment_sums(phases, weight_sets, starts, harmonics: int,
                        bins: int) -> list[SegmentSums]:
    """``segment_sums`` of the same events under several sets of weights at once.

    The unit vectors and the histogram bins are computed once; each set's weights
    then enter its own recurrence (z_1 = w·u).

    Parameters
    ----------
    phases, starts, harmonics, bins
        As for ``segment_sums``.
    weight_sets : sequence of (ndarray of float64 or None)
        One weight array (or None for unit weights) per result.
    """
    starts = np.asarray(starts, dtype=np.intp)
    n, count = phases.size, starts.size
    s = _scratch(harmonics)
    sums = [np.zeros((count, harmonics), dtype=np.complex128) for _ in weight_sets]
    hist_w = [np.zeros(count * bins) for _ in weight_sets]
    hist_w2 = [np.zeros(count * bins) if w is not None else h
               for w, h in zip(weight_sets, hist_w, strict=True)]
    for lo in range(0, n, CHUNK):
        hi = min(lo + CHUNK, n)
        phi = reduced_phases(phases[lo:hi])
        chunk = [None if w is None else w[lo:hi] for w in weight_sets]
        for w in chunk:
            if w is not None:
                _check_weights(w)
        unit = _unit_vectors(phi, s)
        first, local = _chunk_segments(starts, lo, hi)
        index = _bin_index(phi, bins, s)
        if local.size > 1:
            index = index + np.repeat(np.arange(local.size) * bins,
                                      np.diff(local, append=hi - lo))
        span = slice(first * bins, (first + local.size) * bins)
        for k, w in enumerate(chunk):
            _add_sums(_harmonic_block(unit, w, s), local, sums[k][first : first + local.size])
            _histograms(index, w, local.size * bins, hist_w[k][span], hist_w2[k][span])
    counts = np.diff(starts, append=n).astype(np.int64)
    shape = (count, bins)
    return [SegmentSums(counts, sums[k], hist_w[k].reshape(shape), hist_w2[k].reshape(shape))
            for k in range(len(weight_sets))]
