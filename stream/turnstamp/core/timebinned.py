"""Trigonometric moments per fixed time interval: sliding windows and clock-check chunks.

:class:`TimeBinnedMoments` keeps one :class:`~turnstamp.core.moments.PhaseMoments`
per interval of event time, so that any window, the night's total and the chunks of
the clock check cost O(number of intervals), never a pass over the events. Partials
add, so objects filled separately (by batch, worker or night) merge exactly. A batch
is grouped by interval in one vectorised pass and summed by one call of the
moments' kernel (``harmonicsums.segment_sums``), however many intervals it spans.

The module does no I/O, holds no clock and imports neither zmq nor pyarrow.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from turnstamp.errors import InputError

from .harmonicsums import shared_segment_sums
from .intervalsegments import interval_segments, timed_event_arrays
from .moments import DEFAULT_BINS, MAX_HARMONICS, PhaseMoments, positive_int
from .momentstate import STATE_VERSION, check_keys, state_int

__all__ = ["TimeBinnedMoments", "update_together"]


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
        self.interval_ns = positive_int("interval_ns", interval_ns)
        self.harmonics = positive_int("harmonics", harmonics)
        self.bins = positive_int("bins", bins)
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
        # (k, expired + intervals <= k summed in index order): total() adds only the
        # intervals after k, in the same order, so its result is bit for bit the same
        self._prefix: tuple[int, PhaseMoments] | None = None

    # -- accumulation ----------------------------------------------------------------------

    def _held(self, index: int) -> PhaseMoments | None:
        """The moments interval ``index`` adds to (the expired total for an expired one),
        None when it has none yet."""
        if self._expired_through is not None and index <= self._expired_through:
            return self._expired
        return self._intervals.get(index)

    def update(self, times_ns, phases, weights=None) -> TimeBinnedMoments:
        """Add events at ``times_ns`` (int64 ns) with ``phases`` and optional ``weights``.

        Any order works. The events are grouped by interval in one vectorised pass
        (a time-sorted batch, the usual case, without sorting) and summed per
        interval by one call of the moments' kernel. Atomic: on a bad phase or
        weight it raises ``ValueError`` and changes nothing. Returns ``self``.
        """
        update_together([self], times_ns, phases, [weights])
        return self

    def _add_found(self, intervals: list[int], found, weighted: bool, newest: int) -> None:
        """Add the kernel's per-interval sums (row i: interval ``intervals[i]``)."""
        if self._prefix is not None and intervals and min(intervals) <= self._prefix[0]:
            self._prefix = None  # late events for an interval inside the cached sum
        for row, interval in enumerate(intervals):
            held = self._held(interval)
            if held is None:
                self._intervals[interval] = PhaseMoments.from_segment(found, row, weighted)
            else:
                held.add_segment(found, row, weighted)
        if self.latest_ns is None or newest > self.latest_ns:
            self.latest_ns = newest
        self._prune()

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
            self._prefix = None
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
        """Everything ever added, including expired intervals: the expired total plus
        every interval in index order (the sum up to all but the newest two intervals
        is kept between calls, so a call late in a night adds only a few)."""
        if self._prefix is None:
            ordered = sorted(self._intervals)
            through = ordered[-3] if len(ordered) > 2 else None
            if through is None:
                result = self._expired.copy()
                for index in ordered:
                    result += self._intervals[index]
                return result
            prefix = self._expired.copy()
            for index in ordered:
                if index > through:
                    break
                prefix += self._intervals[index]
            self._prefix = (through, prefix)
        through, prefix = self._prefix
        result = prefix.copy()
        for index in sorted(i for i in self._intervals if i > through):
            result += self._intervals[index]
        return result

    @property
    def expired(self) -> PhaseMoments:
        """Copy of the folded total of the expired intervals."""
        return self._expired.copy()

    @property
    def is_empty(self) -> bool:
        """True before any event was added."""
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
        self._prefix = None
        # An interval expired on either side is expired in the result; otherwise a
        # window over it would silently miss the other side's events.
        self._expired += other._expired
        if other._expired_through is not None:
            self._expire_through(other._expired_through)
        for index, part in other._intervals.items():
            held = self._held(index)
            if held is None:
                self._intervals[index] = part.copy()
            else:
                held._add_in_place(part)
        if other.latest_ns is not None and (self.latest_ns is None
                                            or other.latest_ns > self.latest_ns):
            self.latest_ns = other.latest_ns
        self._prune()
        return self

    def copy(self) -> TimeBinnedMoments:
        """An independent copy."""
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
            "version": STATE_VERSION,
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
        check_keys(state, field, "TimeBinnedMoments", _BINNED_KEYS)
        interval_ns = state_int(state, field, "interval_ns", minimum=1)
        harmonics = state_int(state, field, "harmonics", minimum=1)
        bins = state_int(state, field, "bins", minimum=1)
        retain_ns = state_int(state, field, "retain_ns", minimum=0, optional=True)
        new = cls(interval_ns, harmonics, bins, retain_ns)
        new.latest_ns = state_int(state, field, "latest_ns", optional=True)
        new._expired_through = state_int(state, field, "expired_through", optional=True)
        new._expired = _matching_moments(state["expired"], f"{field}.expired", harmonics, bins)
        if new._expired_through is None and not new._expired.is_empty:
            raise InputError(f"{field}.expired_through", None, "is null but expired holds events")
        entries = state["intervals"]
        if not isinstance(entries, (list, tuple)):
            raise InputError(f"{field}.intervals", type(entries).__name__, "must be a list")
        for number, entry in enumerate(entries):
            new._restore_interval(entry, f"{field}.intervals[{number}]")
        if new.latest_ns is None and (new._intervals or not new._expired.is_empty):
            raise InputError(f"{field}.latest_ns", None, "is null but events are present")
        return new

    def _restore_interval(self, entry: object, where: str) -> None:
        """Check one saved ``[start_ns, moments]`` pair against the rest and keep it."""
        if not isinstance(entry, (list, tuple)) or len(entry) != 2:
            raise InputError(where, entry, "must be a pair [start_ns, moments]")
        start = entry[0]
        if isinstance(start, bool) or not isinstance(start, (int, np.integer)) \
                or start % self.interval_ns:
            raise InputError(f"{where}[0]", start,
                             f"must be an integer multiple of interval_ns={self.interval_ns}")
        index = int(start) // self.interval_ns
        if index in self._intervals:
            raise InputError(f"{where}[0]", start, "appears twice")
        if self._expired_through is not None and index <= self._expired_through:
            raise InputError(f"{where}[0]", start, "lies in the expired range")
        if self.latest_ns is not None and int(start) > self.latest_ns:
            raise InputError(f"{where}[0]", start, f"starts after latest_ns={self.latest_ns}")
        self._intervals[index] = _matching_moments(entry[1], f"{where}[1]", self.harmonics,
                                                   self.bins)


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


def update_together(binned: Sequence[TimeBinnedMoments], times_ns, phases,
                    weight_sets: Sequence) -> None:
    """Add the same events to several accumulators of one shape, each with its own
    weights (None: unit weights), e.g. the recipes of a target that take the same
    rows: the grouping by interval and the harmonic computation are shared
    (``harmonicsums.shared_segment_sums``). Atomic, like ``update``.

    Parameters
    ----------
    binned : sequence of TimeBinnedMoments
        Same interval, harmonics and bins.
    times_ns, phases
        As for ``TimeBinnedMoments.update``.
    weight_sets : sequence of (array_like or None)
        One per accumulator.
    """
    shape = {(b.interval_ns, b.harmonics, b.bins) for b in binned}
    if len(shape) != 1 or len(weight_sets) != len(binned):
        raise ValueError(f"accumulators of one shape and one weight set each, got {shape} "
                         f"and {len(weight_sets)} weight sets for {len(binned)}")
    times, phases, weights = timed_event_arrays(times_ns, phases, weight_sets)
    if times.size == 0:
        return
    first = binned[0]
    intervals, starts, order = interval_segments(times, first.interval_ns)
    if order is not None:
        phases = phases[order]
        weights = [None if w is None else w[order] for w in weights]
    found = shared_segment_sums(phases, weights, starts, first.harmonics, first.bins)
    newest = int(times.max())
    for accumulator, sums, w in zip(binned, found, weights, strict=True):
        accumulator._add_found(intervals.tolist(), sums, w is not None, newest)
