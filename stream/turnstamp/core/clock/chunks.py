"""Chunks of the night and the template offset of each.

``chunk_offsets`` merges consecutive time intervals (of a
:class:`~turnstamp.core.timebinned.TimeBinnedMoments`) into chunks, by a fixed length
or until the chunk's H-test reaches a threshold, and fits the template to each
(:func:`turnstamp.core.templatefit.fit_offset`). The offsets form the series the
clock check judges (:mod:`turnstamp.core.clock.diagnose`).

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from ..eventfit import refine_with_events
from ..moments import PhaseMoments
from ..periodicity import h_test
from ..template import PulseTemplate
from ..templatefit import fit_offset

__all__ = ["DEFAULT_MIN_SIGNAL", "ChunkOffset", "EventPhases", "chunk_offsets"]

DEFAULT_MIN_SIGNAL = 36.0
"""H-test value that closes a chunk (≈ 5σ one-sided with P = exp(−0.4 H), de Jager &
Büsching 2010)."""
_CACHE_LIMIT = 100_000  # fits kept between calls before the cache starts afresh

Interval = tuple[int, PhaseMoments]
EventPhases = Callable[[int, int], tuple[np.ndarray, np.ndarray | None]]
"""(start_ns, end_ns) -> phases (cycles) and weights (None: all 1) of the events in
[start, end), on the intervals' time scale: where the events are kept (an archive),
each fit is refined on them (:mod:`turnstamp.core.eventfit`)."""


@dataclass(frozen=True)
class ChunkOffset:
    """Template offset of one chunk of the night.

    Attributes
    ----------
    start_ns, end_ns : int
        Chunk boundaries (the time scale of the intervals; ns).
    mid_ns : int
        Σw-weighted mean of the interval midpoints, ns.
    shift_cycles, sigma_cycles : float
        Offset (positive = data later) and its 1σ error, cycles.
    amplitude, amplitude_sigma : float
        Pulsed signal b̂ and σ_b, weighted counts.
    count : int
        Events.
    sum_w : float
        Σw.
    detected : bool
        Pulse detected in this chunk (``OffsetFit.detected``).
    ambiguous : bool
        A second minimum (e.g. the interpulse) is comparably likely (``OffsetFit.ambiguous``).
    significance_sigma : float
        One-sided σ of the pulse in this chunk (``OffsetFit.significance_sigma``).
    arrival_tdb_ns : int or None
        Barycentric (TDB) arrival instant of the chunk's pulse nearest its midpoint, ns
        (filled by the pipeline, which knows the spin model; None until then).
    arrival_sigma_us : float or None
        Its 1σ, µs.
    """

    start_ns: int
    end_ns: int
    mid_ns: int
    shift_cycles: float
    sigma_cycles: float
    amplitude: float
    amplitude_sigma: float
    count: int
    sum_w: float
    detected: bool
    ambiguous: bool = False
    significance_sigma: float = 0.0
    arrival_tdb_ns: int | None = None
    arrival_sigma_us: float | None = None


def chunk_offsets(
    intervals,
    template: PulseTemplate,
    chunk_ns: int | None = None,
    min_signal: float = DEFAULT_MIN_SIGNAL,
    *,
    interval_ns: int | None = None,
    target_sigma_cycles: float | None = None,
    harmonics: int | None = None,
    cache: dict | None = None,
    latest_ns: int | None = None,
    events: EventPhases | None = None,
) -> list[ChunkOffset]:
    """Group consecutive time intervals into chunks and fit the template to each.

    Parameters
    ----------
    intervals : list of (int, PhaseMoments), or TimeBinnedMoments
        ``TimeBinnedMoments.intervals()``: interval start (ns) and moments, sorted.
    template : PulseTemplate
        Expected pulse shape.
    chunk_ns : int, optional
        Fixed chunk length, ns; chunk j holds the intervals starting in
        [j·chunk_ns, (j+1)·chunk_ns) (multiples from the time origin, so that chunks
        stay put as old intervals are dropped). When None, chunks
        grow until their H-test reaches ``min_signal`` (or their offset error reaches
        ``target_sigma_cycles``); a weaker remainder joins the last chunk.
    min_signal : float
        H-test value that closes a chunk (default 36 ≈ 5σ).
    interval_ns : int, optional
        Interval length, ns. Default: the ``interval_ns`` of a TimeBinnedMoments, or
        the greatest common divisor of the gaps between starts.
    target_sigma_cycles : float, optional
        Also close a chunk once its fitted offset error is at most this (cycles).
    harmonics : int, optional
        Passed to :func:`fit_offset`.
    cache : dict, optional
        Fits of earlier calls, keyed by the chunk's extent and content; pass the same
        dict each time and a chunk whose data did not change is not refitted.
    latest_ns : int, optional
        The latest event time (ns): the interval holding it is still filling, so its
        events lie between its start and this instant (their mean time is nearer its
        start than its midpoint).
    events : EventPhases, optional
        The events of a time range, where they are kept: each chunk's fit is then
        refined on its events' phases (the moments fit still detects and starts it).

    Returns
    -------
    list of ChunkOffset
        In time order.
    """
    if hasattr(intervals, "intervals"):
        if interval_ns is None:
            interval_ns = int(intervals.interval_ns)
        intervals = intervals.intervals()
    items = sorted(((int(s), m) for s, m in intervals), key=lambda item: item[0])
    if not items:
        return []
    starts = np.array([s for s, _ in items], dtype=np.int64)
    if interval_ns is None:
        interval_ns = _interval_from_starts(starts, chunk_ns)
    if chunk_ns is not None and int(chunk_ns) <= 0:
        raise ValueError(f"chunk_ns = {chunk_ns!r}: must be a positive number of ns")
    if chunk_ns is not None:
        groups = _groups_by_time(items, starts, int(chunk_ns))
    else:
        groups = _groups_by_signal(items, template, min_signal, target_sigma_cycles, harmonics)
    return [_fit_chunk(group, template, interval_ns, harmonics, cache, latest_ns, events)
            for group in groups]


def _interval_from_starts(starts: np.ndarray, chunk_ns: int | None) -> int:
    """Interval length (ns): the greatest common divisor of the gaps between starts."""
    gaps = np.diff(starts)
    gaps = gaps[gaps > 0]
    return int(np.gcd.reduce(gaps)) if gaps.size else int(chunk_ns or 0)


def _groups_by_time(items: list[Interval], starts: np.ndarray,
                    chunk_ns: int) -> list[list[Interval]]:
    """Chunk j: the intervals starting in [j·chunk_ns, (j+1)·chunk_ns)."""
    keys = starts // chunk_ns
    return [[items[i] for i in np.flatnonzero(keys == key)] for key in np.unique(keys)]


def _groups_by_signal(items: list[Interval], template: PulseTemplate, min_signal: float,
                      target_sigma_cycles: float | None,
                      harmonics: int | None) -> list[list[Interval]]:
    """Chunks that grow until their signal suffices; a weaker remainder joins the last."""
    groups: list[list[Interval]] = []
    current: list[Interval] = []
    total: PhaseMoments | None = None
    for item in items:
        current.append(item)
        total = item[1].copy() if total is None else total + item[1]
        if _chunk_is_done(total, template, min_signal, target_sigma_cycles, harmonics):
            groups.append(current)
            current, total = [], None
    if current:
        if groups:
            groups[-1].extend(current)
        else:
            groups.append(current)
    return groups


def _chunk_is_done(total: PhaseMoments, template: PulseTemplate, min_signal: float,
                   target_sigma_cycles: float | None, harmonics: int | None) -> bool:
    """Its H-test reached ``min_signal``, or its offset error ``target_sigma_cycles``."""
    if total.sum_w2 <= 0:
        return False
    if h_test(total).statistic >= min_signal:
        return True
    if target_sigma_cycles is None:
        return False
    trial = fit_offset(total, template, harmonics)
    return bool(trial.detected and trial.sigma_cycles <= target_sigma_cycles)


def _fit_chunk(group: list[Interval], template: PulseTemplate, interval_ns: int,
               harmonics: int | None, cache: dict | None,
               latest_ns: int | None = None, events: EventPhases | None = None) -> ChunkOffset:
    """The template offset of one chunk (from ``cache`` when its data did not change)."""
    total = group[0][1].copy()
    for _, m in group[1:]:
        total += m
    first = group[0][0]
    key = (first, int(group[-1][0]), total.count, total.sum_w, total.sum_w2,
           float(total.cos_sums[0]), id(template), harmonics, events is None)
    if cache is not None and key in cache:
        return cache[key]
    fit = fit_offset(total, template, harmonics)
    end = int(group[-1][0] + interval_ns)
    if events is not None:
        phases, weights = events(int(first), end)
        fit = refine_with_events(fit, phases, template, weights)
    chunk = ChunkOffset(
        start_ns=int(first),
        end_ns=end,
        mid_ns=int(_weighted_middle(group, interval_ns, latest_ns)),
        shift_cycles=fit.shift_cycles,
        sigma_cycles=fit.sigma_cycles,
        amplitude=fit.amplitude,
        amplitude_sigma=fit.amplitude_sigma,
        count=int(total.count),
        sum_w=float(total.sum_w),
        detected=bool(fit.detected),
        ambiguous=bool(fit.ambiguous),
        significance_sigma=float(fit.significance_sigma),
    )
    if cache is not None:
        if len(cache) > _CACHE_LIMIT:
            cache.clear()
        cache[key] = chunk
    return chunk


def _weighted_middle(group: list[Interval], interval_ns: int, latest_ns: int | None) -> int:
    """Σw-weighted mean of the interval midpoints (ns); the plain mean when Σw = 0.

    The interval still filling (it holds ``latest_ns``, the latest event) is taken to
    end there: its events lie between its start and that instant.
    """
    first = group[0][0]
    weights = np.array([m.sum_w for _, m in group], dtype=float)
    starts = np.array([s for s, _ in group], dtype=np.int64)
    ends = starts + interval_ns
    if latest_ns is not None:
        ends = np.where((starts <= latest_ns) & (latest_ns < ends), latest_ns + 1, ends)
    offsets = (starts - first).astype(float) + 0.5 * (ends - starts)
    if weights.sum() > 0:
        return first + int(round(float(weights @ offsets / weights.sum())))
    return first + int(round(float(offsets.mean())))
