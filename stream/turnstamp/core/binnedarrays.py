"""Retained per-interval moments as a few arrays, and back: the binary checkpoint.

``TimeBinnedMoments.to_state()`` spells every interval out as a dictionary of
lists, which costs time in proportion to the night at every checkpoint.
:func:`binned_arrays` takes the same snapshot as one small header and nine arrays
(one row per retained interval) in a few vectorised copies; :func:`state_from_arrays`
turns them back into exactly the ``to_state()`` document, so restoring (and
``turnstamp stack``) is unchanged. The module does no I/O and imports neither zmq
nor pyarrow.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .momentstate import STATE_VERSION
from .timebinned import TimeBinnedMoments

__all__ = ["binned_arrays", "state_from_arrays"]

_SCALARS = ("count", "weighted", "sum_w", "sum_w2")
_VECTORS = ("cos_sums", "sin_sums", "hist_w", "hist_w2")


def binned_arrays(binned: TimeBinnedMoments) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """A snapshot: (header as in ``to_state()`` without the intervals, arrays).

    The arrays are ``start_ns`` (int64), ``count`` (int64), ``weighted`` (bool),
    ``sum_w``, ``sum_w2`` (float64) per interval, and ``cos_sums``, ``sin_sums``
    (intervals × harmonics), ``hist_w``, ``hist_w2`` (intervals × bins); copies.
    """
    indices = sorted(binned._intervals)
    parts = [binned._intervals[i] for i in indices]
    header = {
        "kind": "TimeBinnedMoments", "version": STATE_VERSION,
        "interval_ns": binned.interval_ns, "harmonics": binned.harmonics, "bins": binned.bins,
        "retain_ns": binned.retain_ns, "latest_ns": binned.latest_ns,
        "expired_through": binned._expired_through, "expired": binned._expired.to_state(),
    }
    arrays = {"start_ns": np.array(indices, dtype=np.int64) * binned.interval_ns,
              "count": np.array([p.count for p in parts], dtype=np.int64),
              "weighted": np.array([p.weighted for p in parts], dtype=bool),
              "sum_w": np.array([p.sum_w for p in parts], dtype=np.float64),
              "sum_w2": np.array([p.sum_w2 for p in parts], dtype=np.float64)}
    shapes = {"cos_sums": binned.harmonics, "sin_sums": binned.harmonics,
              "hist_w": binned.bins, "hist_w2": binned.bins}
    for name, width in shapes.items():
        arrays[name] = (np.stack([getattr(p, name) for p in parts]) if parts
                        else np.zeros((0, width)))
    return header, arrays


def state_from_arrays(header: dict[str, Any], arrays: dict[str, np.ndarray]) -> dict[str, Any]:
    """The ``TimeBinnedMoments.to_state()`` document of a ``binned_arrays`` snapshot."""
    columns = {name: np.asarray(arrays[name]).tolist() for name in (*_SCALARS, *_VECTORS)}
    starts = np.asarray(arrays["start_ns"], dtype=np.int64).tolist()
    intervals = []
    for row, start in enumerate(starts):
        moments = {"kind": "PhaseMoments", "version": STATE_VERSION,
                   "harmonics": header["harmonics"], "bins": header["bins"]}
        for name in _SCALARS + _VECTORS:
            moments[name] = columns[name][row]
        moments["count"] = int(moments["count"])
        moments["weighted"] = bool(moments["weighted"])
        intervals.append([int(start), moments])
    return {**header, "intervals": intervals}
