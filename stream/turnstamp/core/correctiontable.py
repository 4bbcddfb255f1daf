"""Piecewise Chebyshev tables of the barycentric correction, and sets of them.

Theory of operation
-------------------
The correction TDB(SSB) − TT(site) (:mod:`turnstamp.core.barycentre`) is smooth, so
it is evaluated from a ``CorrectionTable``: piecewise Chebyshev series over fixed
segments (default one hour, degree 10), whose node values come from the direct
computation. Interpolation error is far below 0.01 ns for a ground site; tables are
built ahead of need by the shell and the hot path is a vectorised Clenshaw
recurrence. A ``TableSet`` holds non-overlapping tables, so that a night, or a file
spanning years with gaps, is covered only where there are events.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np

from .timebase import NS_PER_S

__all__ = ["CorrectionTable", "TableSet"]


@dataclass(frozen=True)
class CorrectionTable:
    """Piecewise Chebyshev series of a smooth function of TT (int64 ns).

    Segment ``i`` covers ``[start_ns + i*segment_ns, start_ns + (i+1)*segment_ns)``
    and holds ``degree + 1`` coefficients (column ``i`` of ``coefficients``; the
    layout makes the per-degree gather contiguous). ``segment_flags`` are the
    Quality bits of the nodes in each segment.
    """

    start_ns: int
    segment_ns: int
    coefficients: np.ndarray  # (degree + 1, segments)
    segment_flags: np.ndarray  # (segments,) uint32
    provenance: Mapping[str, str] = field(default_factory=dict)

    @property
    def degree(self) -> int:
        """Degree of the Chebyshev series of each segment."""
        return self.coefficients.shape[0] - 1

    @property
    def stop_ns(self) -> int:
        """End of the coverage (TT ns, exclusive)."""
        return self.start_ns + self.segment_ns * self.coefficients.shape[1]

    def covers(self, start_ns: int, stop_ns: int) -> bool:
        """True when [start_ns, stop_ns] (TT ns) lies inside the table."""
        return self.start_ns <= start_ns and stop_ns <= self.stop_ns

    @classmethod
    def build(
        cls,
        function: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]],
        start_ns: int,
        stop_ns: int,
        segment_ns: int = 3600 * NS_PER_S,
        degree: int = 10,
        provenance: Mapping[str, str] | None = None,
    ) -> CorrectionTable:
        """Sample ``function`` at Chebyshev nodes of each segment and fit the series.

        ``function(tt_ns) -> (values, flags)``. Nodes are rounded to whole
        nanoseconds; the resulting misplacement (<= 0.5 ns times a slope below
        1e-4) changes values by < 1e-13 s.
        """
        if stop_ns <= start_ns or segment_ns <= 0 or degree < 1:
            raise ValueError("table needs stop > start, a positive segment and degree >= 1")
        segments = -(-(stop_ns - start_ns) // segment_ns)
        nodes = degree + 1
        angle = np.pi * (np.arange(nodes) + 0.5) / nodes
        x = np.cos(angle)  # Chebyshev points of the first kind
        offsets = np.round((x + 1) * (segment_ns / 2)).astype(np.int64)
        times = start_ns + np.arange(segments, dtype=np.int64)[:, None] * segment_ns + offsets
        values, flags = function(times.ravel())
        values = values.reshape(segments, nodes)
        # discrete Chebyshev transform: c_k = (2/n) sum_j f(x_j) cos(k * angle_j)
        basis = np.cos(np.outer(np.arange(nodes), angle))  # (k, j)
        coefficients = (2.0 / nodes) * basis @ values.T
        coefficients[0] /= 2
        segment_flags = np.bitwise_or.reduce(
            np.asarray(flags, dtype=np.uint32).reshape(segments, nodes), axis=1)
        return cls(int(start_ns), int(segment_ns), np.ascontiguousarray(coefficients),
                   segment_flags, dict(provenance or {}))

    def evaluate(self, tt_ns) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Interpolated values at TT instants.

        Returns
        -------
        values : float64 array (NaN outside the table)
        flags : uint32 array of the segments' Quality bits
        inside : bool array, False outside the table's coverage
        """
        tt_ns = np.asarray(tt_ns, dtype=np.int64)
        since = tt_ns - self.start_ns
        count = self.coefficients.shape[1]
        if since.size:  # the usual case, a batch inside one segment: nothing per event but x
            first = int(since.min()) // self.segment_ns
            if 0 <= first < count and first == int(since.max()) // self.segment_ns:
                x = (since - first * self.segment_ns) * (2.0 / self.segment_ns) - 1.0
                return (_clenshaw(x, self.coefficients[:, first]),
                        np.full(tt_ns.shape, self.segment_flags[first], dtype=np.uint32),
                        np.ones(tt_ns.shape, bool))
        segment = since // self.segment_ns
        inside = (since >= 0) & (segment < count)
        segment = np.clip(segment, 0, count - 1)
        x = (since - segment * self.segment_ns) * (2.0 / self.segment_ns) - 1.0
        values = _clenshaw(x, self.coefficients[:, segment])
        values[~inside] = np.nan
        return values, self.segment_flags[segment], inside

    def to_columns(self) -> dict[str, np.ndarray]:
        """Columns for caching: one row per segment."""
        return {
            "segment_start_ns": self.start_ns + np.arange(self.coefficients.shape[1],
                                                          dtype=np.int64) * self.segment_ns,
            "coefficients_s": self.coefficients.T.copy(),
            "flags": self.segment_flags,
        }

    @classmethod
    def from_columns(cls, segment_start_ns, coefficients_s, flags, provenance) -> CorrectionTable:
        """Rebuild a table from ``to_columns`` output (segments evenly spaced)."""
        starts = np.asarray(segment_start_ns, dtype=np.int64)
        steps = np.diff(starts)
        if starts.size == 0 or (steps.size and np.any(steps != steps[0])):
            raise ValueError("cached table segments must be evenly spaced")
        segment_ns = int(steps[0]) if steps.size else int(provenance["segment_ns"])
        return cls(int(starts[0]), segment_ns,
                   np.ascontiguousarray(np.asarray(coefficients_s, dtype=np.float64).T),
                   np.asarray(flags, dtype=np.uint32), dict(provenance))


def _clenshaw(x, c):
    """Chebyshev series at points ``x``, coefficients ``c[0..n-1]`` each a scalar or one
    per point: b_k = (2x b_(k+1) - b_(k+2)) + c_k, three passes a term in three reused
    arrays."""
    two_x = 2.0 * x
    work = [np.empty_like(x) for _ in range(3)]
    b1, b2 = c[-1], 0.0  # until the first term
    for i, k in enumerate(range(len(c) - 2, 0, -1)):
        b = np.multiply(two_x, b1, out=work[i % 3])
        b -= b2
        b += c[k]
        b1, b2 = b, b1
    result = x * b1
    result -= b2
    result += c[0]
    return result


class TableSet:
    """Non-overlapping ``CorrectionTable`` pieces, looked up by instant.

    Lets a night, or a file spanning years with gaps, be covered only where there are
    events (one piece per day with data, say). A batch inside one piece, the usual
    case, goes straight to it.
    """

    def __init__(self, tables=()):
        self._tables: list[CorrectionTable] = []
        self._starts = np.zeros(0, np.int64)
        for table in tables:
            self.add(table)

    @property
    def tables(self) -> tuple[CorrectionTable, ...]:
        """The pieces, in time order."""
        return tuple(self._tables)

    @property
    def start_ns(self) -> int | None:
        """Start of the first piece (TT ns), None when empty."""
        return self._tables[0].start_ns if self._tables else None

    @property
    def stop_ns(self) -> int | None:
        """End of the last piece (TT ns, exclusive), None when empty."""
        return self._tables[-1].stop_ns if self._tables else None

    def add(self, table: CorrectionTable) -> None:
        """Insert a piece; pieces overlapping it are replaced (a rebuilt table wins)."""
        kept = [t for t in self._tables
                if t.stop_ns <= table.start_ns or t.start_ns >= table.stop_ns]
        self._tables = sorted([*kept, table], key=lambda t: t.start_ns)
        self._starts = np.array([t.start_ns for t in self._tables], dtype=np.int64)

    def _piece(self, tt_ns):
        return np.searchsorted(self._starts, tt_ns, side="right") - 1

    def contains(self, tt_ns) -> np.ndarray:
        """True where some piece covers the instant."""
        tt_ns = np.asarray(tt_ns, dtype=np.int64)
        if not self._tables:
            return np.zeros(tt_ns.shape, bool)
        if tt_ns.size > 1:  # a batch inside one piece, the usual case: no lookup per instant
            first, last = self._piece(np.array([tt_ns.min(), tt_ns.max()]))
            if first == last and first >= 0 and tt_ns.max() < self._tables[first].stop_ns:
                return np.ones(tt_ns.shape, bool)
        piece = self._piece(tt_ns)
        stops = np.array([t.stop_ns for t in self._tables], dtype=np.int64)
        return (piece >= 0) & (tt_ns < stops[np.maximum(piece, 0)])

    def evaluate(self, tt_ns) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """As ``CorrectionTable.evaluate``, across pieces."""
        tt_ns = np.asarray(tt_ns, dtype=np.int64)
        if not self._tables or tt_ns.size == 0:
            return (np.full(tt_ns.shape, np.nan), np.zeros(tt_ns.shape, np.uint32),
                    np.zeros(tt_ns.shape, bool))
        first, last = (int(p) for p in self._piece(np.array([tt_ns.min(), tt_ns.max()])))
        if first == last and first >= 0:  # the usual case: no lookup per instant
            return self._tables[first].evaluate(tt_ns)
        piece = self._piece(tt_ns)
        values = np.full(tt_ns.shape, np.nan)
        flags = np.zeros(tt_ns.shape, np.uint32)
        inside = np.zeros(tt_ns.shape, bool)
        for index in np.unique(piece[piece >= 0]):
            rows = piece == index
            values[rows], flags[rows], inside[rows] = self._tables[index].evaluate(tt_ns[rows])
        return values, flags, inside

    def missing(self, tt_ns, block_ns: int) -> list[int]:
        """Starts of the ``block_ns`` blocks holding instants no piece covers."""
        tt_ns = np.asarray(tt_ns, dtype=np.int64)
        uncovered = tt_ns[~self.contains(tt_ns)]
        return sorted(int(b) * block_ns for b in np.unique(uncovered // block_ns))
