"""One batch through the chain: value checks, time base, tagging per target, statistics.

Theory of operation
-------------------
The steps every batch takes, as pure functions of the batch and of objects built
beforehand (targets with their barycentre tables, settings), so that the live
``Pipeline.feed``, offline tagging and a re-tagging job mapped over many files run
the very same code:

1. ``time_base``: the value checks (``batch.check_values``; bad events are refused
   with a reason), then the site clock chain and the instrument's scale to TT;
2. ``tag_targets``: the barycentre tables must cover every valid event for every
   target (else ``OUTSIDE_TABLE_COVERAGE``); per target, the region cut (when the
   stream has directions), barycentric time and phase (``tagger``) and a bit per
   recipe; the accounting of the batch (tagged, filtered, rejected) as a
   ``FeedResult`` holding the archive columns;
3. ``add_recipe_moments`` (``recipemoments``, a module of its own that a process
   adding up statistics alone can import without the rest): each recipe's moments
   take the tagged rows with its bit set, except those tagged outside their model's
   validity (into accumulators of the caller's: the running ones, or fresh partials
   that merge by addition); recipes taking every row share one pass of the moments'
   kernel.

Nothing here keeps state, reads a clock or touches a file.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from .accounting import FeedResult
from .batch import EventBatch, RejectCode, check_values, describe_rejects
from .recipemoments import add_recipe_moments, recipe_rows
from .targets import TargetSetup, cos_angular_distance
from .timebase import ClockCorrection, LeapSecondTable, site_tt

__all__ = ["ChainSettings", "TimedBatch", "TaggedRows", "time_base", "join_timed",
           "tag_targets", "tag_parts", "used_columns", "recipe_rows", "add_recipe_moments"]


@dataclass(frozen=True)
class ChainSettings:
    """What the time base needs.

    Attributes
    ----------
    leaps : LeapSecondTable
    clock_chain : tuple of ClockCorrection
        The site's clock corrections, applied in order before the scale conversion.
    earliest_ns, latest_ns : int
        Plausible range of event times (ns since 2000-01-01T12:00:00).
    checked_columns : frozenset of str, optional
        Optional columns whose values are checked (see ``batch.check_values``);
        None checks every one present.
    """

    leaps: LeapSecondTable
    clock_chain: tuple[ClockCorrection, ...]
    earliest_ns: int
    latest_ns: int
    checked_columns: frozenset[str] | None = None


class TimedBatch(NamedTuple):
    """A batch after the checks and the time base (arrays of the batch's length)."""

    codes: np.ndarray  # uint8 RejectCode per event, 0 = accepted
    valid: np.ndarray  # bool: codes == 0
    tt_ns: np.ndarray  # int64 TT at the site, ns since 2000-01-01T12:00:00 (0 if not valid)
    extra_s: np.ndarray | None  # sub-ns clock remainder, s (None without a clock chain)
    flags: np.ndarray  # uint32 Quality bits of the time base


class TaggedRows(NamedTuple):
    """What one target tagged in a batch: the batch rows, and their archive columns."""

    rows: np.ndarray | slice  # indices into the batch (a slice: every row)
    columns: dict[str, np.ndarray]  # archive column name -> values for those rows


def time_base(batch: EventBatch, settings: ChainSettings) -> TimedBatch:
    """Value checks, then TT at the site of the valid events (clock chain first)."""
    codes = check_values(batch, settings.earliest_ns, settings.latest_ns,
                         settings.checked_columns)
    valid = codes == RejectCode.ACCEPTED
    n = len(batch)
    extra = np.zeros(n) if settings.clock_chain else None
    if valid.all():
        tt_ns, clock_extra, flags = site_tt(batch.time_ns, batch.time_scale,
                                            settings.clock_chain, settings.leaps)
        if extra is not None:
            extra[:] = clock_extra
        return TimedBatch(codes, valid, tt_ns, extra, np.asarray(flags, np.uint32))
    tt_ns = np.zeros(n, np.int64)
    flags = np.zeros(n, np.uint32)
    if valid.any():
        tt_ns[valid], clock_extra, flags[valid] = site_tt(
            batch.time_ns[valid], batch.time_scale, settings.clock_chain, settings.leaps)
        if extra is not None:
            extra[valid] = clock_extra
    return TimedBatch(codes, valid, tt_ns, extra, flags)


def join_timed(parts: Sequence[TimedBatch]) -> TimedBatch:
    """The ``time_base`` of batches joined end to end (``EventBatch.join``)."""
    if len(parts) == 1:
        return parts[0]
    extra = None if parts[0].extra_s is None else np.concatenate([p.extra_s for p in parts])
    return TimedBatch(*(np.concatenate([getattr(p, name) for p in parts])
                        for name in ("codes", "valid", "tt_ns")), extra,
                      np.concatenate([p.flags for p in parts]))


def tag_targets(batch: EventBatch, timed: TimedBatch,
                targets: Iterable[TargetSetup]) -> FeedResult:
    """Tag the valid events for every target; the batch's accounting and archive columns.

    ``timed.codes`` is updated in place with the coverage refusals.
    """
    return tag_parts(batch, timed, targets, [len(batch)])[0]


def tag_parts(batch: EventBatch, timed: TimedBatch, targets: Iterable[TargetSetup],
              lengths: Sequence[int]) -> tuple[FeedResult, list[FeedResult]]:
    """``tag_targets`` of a batch made of consecutive parts (messages joined into one
    batch, ``EventBatch.join``), in one pass: the accounting of the whole, and of each
    part of ``lengths`` rows as ``tag_targets`` of that part alone would give it
    (its archive columns are views of the whole's; row indices its own)."""
    targets = list(targets)
    codes, valid = timed.codes, timed.valid
    for target in targets:
        covered = target.tagger.table.contains(timed.tt_ns)
        if not covered.all():
            codes[valid & ~covered] = RejectCode.OUTSIDE_TABLE_COVERAGE
            valid = valid & covered
    tagged = np.zeros(len(batch), bool)
    found: dict[str, TaggedRows] = {}
    for target in targets:
        rows = _tag_target(target, batch, valid, timed)
        if rows is not None:
            tagged[rows.rows] = True
            found[target.name] = rows
    refused = np.flatnonzero(codes)
    reasons, details = describe_rejects(codes[refused])
    whole = _accounting(0, len(batch), found, refused, reasons, details, tagged, valid,
                        timed.tt_ns)
    if len(lengths) == 1:
        return whole, [whole]
    bounds = np.cumsum([0, *lengths]).tolist()
    parts = [_accounting(lo, hi, found, refused, reasons, details, tagged, valid, timed.tt_ns)
             for lo, hi in zip(bounds[:-1], bounds[1:], strict=True)]
    return whole, parts


def _accounting(lo: int, hi: int, found: dict[str, TaggedRows], refused: np.ndarray,
                reasons: list[str], details: list[str], tagged: np.ndarray, valid: np.ndarray,
                tt_ns: np.ndarray) -> FeedResult:
    """The ``FeedResult`` of rows [lo, hi) of a tagged batch."""
    archive: dict[str, dict[str, np.ndarray]] = {}
    for name, rows in found.items():
        if isinstance(rows.rows, slice):
            first, last = lo, hi
        else:
            first, last = np.searchsorted(rows.rows, [lo, hi]).tolist()
        if last > first:
            whole = first == 0 and last == len(rows.columns["event_id"])
            archive[name] = rows.columns if whole else {
                column: values[first:last] for column, values in rows.columns.items()}
    a, b = np.searchsorted(refused, [lo, hi]).tolist()
    valid_tt = tt_ns[lo:hi] if a == b else tt_ns[lo:hi][valid[lo:hi]]
    tagged_count = int(np.count_nonzero(tagged[lo:hi]))
    return FeedResult(
        archive=archive, rejected_index=refused[a:b] - lo, rejected_reason=reasons[a:b],
        rejected_detail=details[a:b], events=hi - lo, tagged=tagged_count,
        filtered=hi - lo - (b - a) - tagged_count,
        first_tt_ns=int(valid_tt.min()) if valid_tt.size else None,
        last_tt_ns=int(valid_tt.max()) if valid_tt.size else None)


def _selected(target: TargetSetup, batch: EventBatch, valid: np.ndarray):
    """Rows inside the target's region (all valid rows without one) and the cosine of
    their distance from the target (None without directions)."""
    cos_distance = None
    if batch.ra_deg is not None and batch.dec_deg is not None:
        if valid.all():  # the usual batch: no copies
            cos_distance = cos_angular_distance(batch.ra_deg, batch.dec_deg, target.position)
        else:
            cos_distance = np.full(len(batch), -2.0)  # below any cut
            cos_distance[valid] = cos_angular_distance(batch.ra_deg[valid],
                                                       batch.dec_deg[valid], target.position)
    rows = valid
    if target.region_radius_deg is not None and cos_distance is not None:
        rows = valid & (cos_distance >= np.cos(np.radians(target.region_radius_deg)))
    return rows, cos_distance


def _tag_target(target: TargetSetup, batch: EventBatch, valid: np.ndarray,
                timed: TimedBatch) -> TaggedRows | None:
    rows, cos_distance = _selected(target, batch, valid)
    whole = bool(rows.all())
    picked = None if whole else np.flatnonzero(rows)
    index: np.ndarray | slice = slice(None) if picked is None else picked
    count = len(batch) if picked is None else picked.size
    if count == 0:
        return None
    sub = batch if whole else batch.take(index)
    sub_distance = cos_distance if whole or cos_distance is None else cos_distance[index]
    tt_ns = timed.tt_ns if whole else timed.tt_ns[index]
    extra = timed.extra_s
    if extra is not None and not whole:
        extra = extra[index]
    result = target.tagger.tag(tt_ns, extra)
    quality = (timed.flags if whole else timed.flags[index]) | result.flags
    recipe_flags = np.zeros(count, np.uint32)
    for bit, recipe in enumerate(target.recipes):
        selected = recipe.select(sub, sub_distance)
        if selected.all():  # no masked writes for a recipe taking every event
            recipe_flags |= np.uint32(1 << bit)
        else:
            recipe_flags[selected] |= np.uint32(1 << bit)
    return TaggedRows(index, {
        "event_id": sub.event_id,
        "site_tt_ns": tt_ns,
        "barycentric_tdb_ns": result.barycentric_tdb_ns,
        "barycentric_correction_s": result.correction_s,
        "phase": result.phase,
        "pulse_number": result.pulse_number,
        "weight": np.ones(count) if sub.weight is None else sub.weight,
        "recipe_flags": recipe_flags,
        "model_index": result.model_index.astype(np.int32),  # into tagger.model_ids
        "quality_flags": quality,
    })


def used_columns(targets: Iterable[TargetSetup]) -> frozenset[str]:
    """The optional event columns the targets' region cuts and recipes read."""
    return frozenset().union(*(target.columns() for target in targets))
