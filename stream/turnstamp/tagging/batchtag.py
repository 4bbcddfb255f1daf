"""One record batch of an event file tagged for one target: the per-batch step of
offline tagging, and the function a re-tagging job maps over dataset fragments.

Theory of operation
-------------------
Everything that lasts is built once per run into a ``TagJob``: the target (spin
models and its barycentre tables), the site's time base, the time convention
and plausible range of the input. ``tag_record`` then takes one Arrow record
batch and returns a ``TaggedBatch``: the accounting and archive columns of the
batch (``core.chain``, the code the live service runs) and fresh statistics
partials, one ``TimeBinnedMoments`` per recipe, which merge into the run's totals
by addition. Nothing of the batch is kept, so any number of batches (or workers)
can be tagged in any grouping and summed.

When the job holds ``DayTables``, the tables of days not seen before are added
just before tagging (the only state a batch changes); a job given tables that
already cover its events (a worker) needs none.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np
import pyarrow as pa

from ..core.accounting import FeedResult
from ..core.batch import MISSING_TIME, EventBatch
from ..core.chain import ChainSettings, add_recipe_moments, tag_targets, time_base
from ..core.moments import DEFAULT_BINS, MAX_HARMONICS
from ..core.targets import TargetSetup
from ..core.timebase import NS_PER_DAY, Scale
from ..core.timebinned import TimeBinnedMoments
from ..errors import EventFileError, WireError
from ..wire.columns import batch_from_record
from .tables import DayTables, present_days
from .times import PlausibleRange, TimeConvention, check_times, to_instants

__all__ = ["StatisticsShape", "TagJob", "TaggedBatch", "tag_record", "tt_days"]


class StatisticsShape(NamedTuple):
    """How an offline run keeps its statistics: by default one interval per TT day,
    all kept (a run reports totals and a re-tagging merges days; ten-second intervals,
    as the live service keeps them, cost a fifth more of the moments' time)."""

    interval_ns: int = NS_PER_DAY
    harmonics: int = MAX_HARMONICS
    bins: int = DEFAULT_BINS
    retain_ns: int | None = None

    def moments(self) -> TimeBinnedMoments:
        return TimeBinnedMoments(self.interval_ns, self.harmonics, self.bins, self.retain_ns)


@dataclass
class TagJob:
    """What every batch of a run shares (see the module docstring).

    Attributes
    ----------
    setup : TargetSetup
        The target; its tagger's table set must cover the events (or ``tables`` fills it).
    chain : ChainSettings
        Time base (leaps, clock chain), plausible range, checked columns.
    scale : Scale
        Time scale of the input's times.
    convention : TimeConvention
        How the file counts time.
    plausible : PlausibleRange
        Event times that can be tagged (the run stops on a batch mostly outside).
    source : str
        Written to the archive's ``source`` column (the input file's name).
    label : str
        The input, for messages.
    tables : DayTables, optional
        Adds the tables of new days before each batch is tagged.
    statistics : StatisticsShape
    """

    setup: TargetSetup
    chain: ChainSettings
    scale: Scale
    convention: TimeConvention
    plausible: PlausibleRange
    source: str
    label: str
    tables: DayTables | None = None
    statistics: StatisticsShape = StatisticsShape()


class TaggedBatch(NamedTuple):
    """One batch tagged: the batch, its accounting and archive columns (``FeedResult``;
    the target's columns are ``result.archive[target]``) and one statistics partial
    per recipe (those given as ``into``, when given)."""

    batch: EventBatch
    result: FeedResult
    moments: list[TimeBinnedMoments]


def _event_batch(record: pa.RecordBatch, job: TagJob, sequence: int) -> EventBatch:
    """The record's events in the core's form, times converted and checked."""
    label = f"{job.label}, batch {sequence}"
    if "time_ns" not in record.schema.names:
        raise EventFileError("time_ns", None, f"{job.label}: required column missing; "
                             f"columns: {record.schema.names}")
    raw = record.column("time_ns")
    converted = to_instants(raw, job.convention, label, job.plausible)
    if converted is not raw:
        record = record.set_column(record.schema.get_field_index("time_ns"), "time_ns",
                                   converted)
    try:
        batch, _ = batch_from_record(record, source=job.source, sequence=sequence,
                                     time_scale=job.scale)
    except WireError as exc:
        raise EventFileError("events", job.label, exc.detail) from None
    times = batch.time_ns if raw.null_count == 0 else batch.time_ns[batch.time_ns != MISSING_TIME]
    check_times(times, raw, job.convention, job.plausible, label)
    return batch


def tag_record(record: pa.RecordBatch, job: TagJob, sequence: int,
               into: list[TimeBinnedMoments] | None = None,
               statistics: bool = True) -> TaggedBatch:
    """Tag one record batch of an event file (see the module docstring).

    Parameters
    ----------
    record : pyarrow.RecordBatch
        ``event_id``, ``time_ns`` (in ``job.convention`` and ``job.scale``) and any
        optional columns of the wire format.
    job : TagJob
    sequence : int
        The batch's number in the input (the archive's ``sequence`` column).
    into : list of TimeBinnedMoments, optional
        One per recipe: add the batch's statistics to these (a run's totals) instead
        of fresh partials; the same sums, without the cost of merging.
    statistics : bool
        False: none at all (``moments`` is empty: the caller sums them elsewhere from
        the archive columns, as ``aside.MomentsAside`` does).

    Raises
    ------
    EventFileError
        A missing or mistyped column, or times in another convention.
    """
    batch = _event_batch(record, job, sequence)
    timed = time_base(batch, job.chain)
    if job.tables is not None:
        job.tables.cover(_valid_tt(timed))
    result = tag_targets(batch, timed, [job.setup])
    if not statistics:
        return TaggedBatch(batch, result, [])
    partials = into if into is not None else [job.statistics.moments()
                                              for _ in job.setup.recipes]
    columns = result.archive.get(job.setup.name)
    if columns is not None:
        add_recipe_moments(partials, [recipe.use_weights for recipe in job.setup.recipes],
                           columns["site_tt_ns"], columns["phase"], columns["weight"],
                           columns["recipe_flags"], columns["quality_flags"])
    return TaggedBatch(batch, result, partials)


def _valid_tt(timed) -> np.ndarray:
    return timed.tt_ns if timed.valid.all() else timed.tt_ns[timed.valid]


def tt_days(record: pa.RecordBatch, job: TagJob, sequence: int) -> list[int]:
    """The TT days (``tt_ns // NS_PER_DAY``) whose barycentre tables ``tag_record``
    needs for this batch: those of its valid events, found by the same checks and
    time base (``record`` needs ``event_id`` and ``time_ns`` only).

    Raises
    ------
    EventFileError
        As ``tag_record``.
    """
    return present_days(_valid_tt(time_base(_event_batch(record, job, sequence), job.chain)))
