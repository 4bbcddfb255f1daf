"""Events grouped by fixed time interval for :mod:`turnstamp.core.timebinned`.

``timed_event_arrays`` checks the shapes of times, phases and weights;
``interval_segments`` finds the intervals a batch touches and where each begins,
without a pass over every event when the batch is sorted by time (the usual case).
The module does no I/O and imports neither zmq nor pyarrow.
"""

from __future__ import annotations

import numpy as np

__all__ = ["timed_event_arrays", "interval_segments"]


def timed_event_arrays(times_ns, phases, weight_sets):
    """Times (int64 ns), phases and each weight set as vectors of one length (their
    values are checked by the kernel before any interval is touched)."""
    times = np.asarray(times_ns).reshape(-1)
    if times.dtype.kind not in "iu":
        raise TypeError(f"times_ns must be integer nanoseconds, got dtype {times.dtype}")
    times = times.astype(np.int64, copy=False)
    phases = np.ascontiguousarray(phases, dtype=np.float64).reshape(-1)
    if phases.shape != times.shape:
        raise ValueError(f"phases has {phases.size} values but times_ns has {times.size}")
    weights = []
    for w in weight_sets:
        if w is not None:
            w = np.ascontiguousarray(w, dtype=np.float64).reshape(-1)
            if w.shape != times.shape:
                raise ValueError(f"weights has {w.size} values but times_ns has {times.size}")
        weights.append(w)
    return times, phases, weights



def interval_segments(times, interval_ns):
    """Intervals present (ascending), the first event of each, and the order that
    sorts the events by interval (None when they are in order already).

    A time-sorted batch (the usual case) is cut at the interval boundaries found by
    binary search (no pass computing every event's interval); any other is first
    sorted (stably) by interval.
    """
    if times.size > 1 and not (times[1:] >= times[:-1]).all():
        index = times // interval_ns
        order = np.argsort(index, kind="stable")
        index = index[order]
        starts = np.concatenate([_FIRST, np.flatnonzero(index[1:] != index[:-1]) + 1])
        return index[starts], starts, order
    first, last = int(times[0]) // interval_ns, int(times[-1]) // interval_ns
    if first == last:
        return np.array([first]), _FIRST, None
    if last - first > times.size:  # sparse over a long span: cut where the index changes
        index = times // interval_ns
        starts = np.concatenate([_FIRST, np.flatnonzero(index[1:] != index[:-1]) + 1])
        return index[starts], starts, None
    intervals = np.arange(first, last + 1)
    starts = np.concatenate([_FIRST, np.searchsorted(times, intervals[1:] * interval_ns)])
    filled = np.diff(starts, append=times.size) > 0
    return intervals[filled], starts[filled], None


_FIRST = np.zeros(1, dtype=np.intp)
