"""Offline tagging runs: an event file (or a table in memory) in, the archive out.

Theory of operation
-------------------
One pass over the input's record batches, with nothing of the whole file in
memory: each batch is tagged by ``batchtag.tag_record`` (barycentre tables are
added as new days appear), its archive and rejects rows are committed through the
ledger (archive, then rejects, as the service commits a message) into outputs
written batch by batch, and its statistics partials are added to the run's
totals. The outputs are published when the last batch is in (``outputs``). A
file and a table holding the same batches give the same archive rows, with the
same accounting as the service.
"""

from __future__ import annotations

import logging
import time
from collections import Counter
from collections.abc import Callable, Iterable
from pathlib import Path

import pyarrow as pa

from ..assemble import Environment, phase_calculators_for, target_setup
from ..core.accounting import MessageRecord, QualityCounts
from ..core.chain import ChainSettings
from ..core.spin import SpinModel
from ..core.targets import TargetSetup
from ..core.timebase import NS_PER_DAY, Scale, parse_instant
from ..files import schemas
from ..files.ledger import Ledger
from ..files.outputs import archive_table, rejects_table
from .aside import MomentsAside
from .batchtag import TagJob, tag_record
from .begin import FileTagging
from .inputs import READ_ROWS, EventReader
from .outputs import BackgroundWrites, OutputFile, make_folder, remove_folders
from .summary import TagSummary
from .tables import DayTables
from .times import PlausibleRange, TimeConvention

__all__ = ["tag_file", "tag_into", "tag_table", "tag_job", "TagRun", "run_metadata",
           "offline_target", "plausible_range"]

_log = logging.getLogger(__name__)
_J2000_JD = 2_451_545.0
_J2000_MJD = 51_544.5
_YEAR_NS = 365 * NS_PER_DAY


def plausible_range(env: Environment) -> PlausibleRange:
    """The service's plausible event times (the intake's defaults), narrowed to the
    ephemeris and to a year past the end of the Earth-orientation table."""
    from ..config import IntakeConfig

    fields = IntakeConfig.model_fields
    earliest = parse_instant(fields["plausible_from"].default)
    latest = parse_instant(fields["plausible_until"].default)
    why = ["the service's plausible range"]
    span = getattr(env.ephemeris, "span_jd", None)
    if span is not None:
        earliest = max(earliest, round((span[0] - _J2000_JD) * NS_PER_DAY))
        if round((span[1] - _J2000_JD) * NS_PER_DAY) < latest:
            latest = round((span[1] - _J2000_JD) * NS_PER_DAY)
            why.append("the planetary ephemeris")
    orientation = round((float(env.orientation.mjd[-1]) - _J2000_MJD) * NS_PER_DAY) + _YEAR_NS
    if orientation < latest:
        latest = orientation
        why.append("a year past the end of the Earth-orientation table")
    return PlausibleRange(earliest, latest, ", ".join(why))


def offline_target(models: Iterable[SpinModel], name: str | None = None) -> TargetSetup:
    """A single-recipe target (all events, unweighted statistics) named after its
    models' target unless ``name`` is given."""
    calculators = phase_calculators_for(list(models))
    return target_setup(name or calculators[0].model.target.name, calculators)


def _with_metadata(schema: pa.Schema, metadata: dict) -> pa.Schema:
    return schema.with_metadata({**(schema.metadata or {}),
                                 **{k: str(v) for k, v in metadata.items()}})


def tag_job(setup: TargetSetup, env: Environment, scale: Scale, table_cache: Path | None,
            label: str, source: str, convention: TimeConvention) -> TagJob:
    """What every batch of a run shares (``batchtag.TagJob``): the target with tables
    added as days appear, the site's time base, the plausible range of the input's
    times and the columns the recipes check. ``label`` names the input in messages,
    ``source`` fills the archive's ``source`` column."""
    tables = DayTables(setup, env, table_cache)
    plausible = plausible_range(env)
    chain = ChainSettings(env.leaps, env.clock_chain, plausible.earliest_ns,
                          plausible.latest_ns, setup.columns())
    return TagJob(setup, chain, scale, convention, plausible, source, label, tables)


def run_metadata(job: TagJob, env: Environment, tables: str) -> dict[str, str]:
    """The provenance of a run's outputs: site tables, software, target, models,
    recipes, barycentre tables (``tables``: their provenance) and time convention."""
    setup = job.setup
    return {**env.provenance(), "target": setup.name,
            "models": ",".join(setup.tagger.model_ids), "input": job.label,
            "recipes": ",".join(r.name for r in setup.recipes), "table": tables,
            "time_convention": f"{job.convention.words()}, {job.scale.value}"}


class TagRun:
    """One target's tagging of one input: the job, the totals, the accounting.

    ``job`` is prepared (``tag_job``, or a job whose tables already cover the
    input, as a re-tagging worker holds); ``metadata`` is the outputs' provenance
    (``run_metadata``)."""

    def __init__(self, job: TagJob, metadata: dict[str, str]):
        self.job = job
        self.totals = {r.name: job.statistics.moments() for r in job.setup.recipes}
        self.quality = QualityCounts()
        self.rejected: Counter[tuple[str, str]] = Counter()
        self.model_ids = job.setup.tagger.model_ids
        self.metadata = metadata
        self.aside: MomentsAside | None = None  # adds up the statistics when there is one

    @classmethod
    def start(cls, setup: TargetSetup, env: Environment, scale: Scale,
              table_cache: Path | None, label: str, source: str,
              convention: TimeConvention) -> TagRun:
        """A run that builds its barycentre tables as days appear."""
        job = tag_job(setup, env, scale, table_cache, label, source, convention)
        return cls(job, run_metadata(job, env, job.tables.provenance()))

    def feed(self, record: pa.RecordBatch, sequence: int, ledger: Ledger) -> None:
        """Tag one batch; commit its rows (archive, then rejects) and add its statistics
        (or hand its columns to ``aside``, which adds them)."""
        tagged = tag_record(record, self.job, sequence, into=list(self.totals.values()),
                            statistics=self.aside is None)
        result, name = tagged.result, self.job.setup.name
        archive = []
        columns = result.archive.get(name)
        if columns is not None:
            if self.aside is not None:
                self.aside.add(columns)
            archive.append(archive_table(columns, self.job.source, sequence, name,
                                         self.model_ids))
            self.quality.add(name, columns["quality_flags"])
        rejects = []
        if result.rejected:
            rejects.append(rejects_table(tagged.batch, result, received_utc_ns=0,
                                         message_bytes=0))
            self.rejected.update(zip(result.rejected_reason, result.rejected_detail,
                                     strict=True))
        ledger.commit(MessageRecord.accepted(0, self.job.source, sequence, result),
                      archive, rejects)

    def summary(self, ledger: Ledger, output, rejects, started: float) -> TagSummary:
        counters = ledger.counters
        assert counters.reconciles(), vars(counters)
        return TagSummary(counters.events_received, counters.events_tagged,
                          counters.events_filtered, counters.events_rejected, output, rejects,
                          time.perf_counter() - started, self.job.setup.name,
                          dict(counters.rejected_by_reason), dict(self.rejected),
                          self.quality.of(self.job.setup.name), self.totals)


def tag_file(events: Path, output: Path, setup: TargetSetup, env: Environment, scale: Scale,
             *, table_cache: Path | None = None, convention: TimeConvention | None = None,
             force: bool = False, on_batch: Callable[..., None] | None = None,
             statistics_aside: bool = False) -> TagSummary:
    """Tag every event of a file for one target; write the archive and the rejects.

    Parameters
    ----------
    events : Path
        Arrow IPC file or stream, or Parquet (by the suffix), with ``event_id`` and
        ``time_ns`` (in ``convention``; by default int64 ns since 2000-01-01T12:00:00,
        in ``scale``).
    output : Path
        Archive file (Parquet by the suffix ``.parquet``, else Arrow IPC); rejects go
        beside it as ``STEM.rejects.arrow`` when there are any.
    setup : TargetSetup
        The target (its barycentre tables are built here, a TT day at a time).
    env : Environment
        Site tables.
    scale : Scale
        Time scale of the times (UTC labels, TAI, GPS or TT).
    table_cache : Path, optional
        Folder of cached barycentre tables.
    convention : TimeConvention, optional
        Origin and unit of the time column (default: ns since 2000-01-01T12:00:00).
    force : bool
        Overwrite existing outputs (refused otherwise, before anything is read).
    on_batch : callable, optional
        Progress: called with the number of events of each batch once it is
        committed, and first as ``on_batch(0, total=rows)`` when the file says how
        many rows it holds (``views.progress``'s ``advance``).
    statistics_aside : bool
        Add up the statistics in a forked helper process (``aside``), beside the
        tagging: for a program of its own such as ``turnstamp tag``, not a call inside
        a server or a cluster worker.

    Raises
    ------
    EventFileError
        An unreadable input, a missing or mistyped column, times in another
        convention, or an output that exists (without ``force``); no output is left.
    """
    with FileTagging(events, output, force, statistics_aside) as tagging:
        return tagging.tag(setup, env, scale, table_cache=table_cache, convention=convention,
                           on_batch=on_batch)


def tag_into(reader: EventReader, run: TagRun, output: Path, rejects: Path,
             started: float, on_batch: Callable[..., None] | None = None,
             aside: MomentsAside | None = None) -> TagSummary:
    """Tag every batch of ``reader`` with ``run`` into the archive ``output`` and the
    ``rejects`` file (each written into a hidden partial file and renamed into place
    when the last batch is in; replacing what is there); the run's summary.
    ``on_batch`` as for ``tag_file``; ``aside``: a statistics helper forked for this
    run and not yet begun (``aside.MomentsAside.fork``), which adds up the statistics
    and is ended here. The step ``tag_file`` and a re-tagging worker share."""
    archive = OutputFile(output, _with_metadata(schemas.ARCHIVE, run.metadata), always=True)
    refused = OutputFile(rejects, _with_metadata(schemas.REJECTS, run.metadata))
    created = make_folder(output.parent)
    if aside is not None:
        run.aside = aside
        aside.begin(run.job.setup.recipes, run.totals.values())
    writes = BackgroundWrites()
    ledger = Ledger(writes.stream(archive, handed=True), writes.stream(refused))
    if on_batch is not None and reader.rows is not None:
        on_batch(0, total=reader.rows)
    try:
        for sequence, record in reader:
            run.feed(record, sequence, ledger)
            if on_batch is not None:
                on_batch(record.num_rows)
        if run.aside is not None:
            run.totals = dict(zip(run.totals, run.aside.finish(), strict=True))
            _log.info("statistics helper process: %.1f MB of memory of its own",
                      run.aside.own_memory_kb / 1024)
        writes.drain()
        published = archive.finish(), refused.finish()
    except BaseException:
        writes.drain_quietly()
        archive.abandon()
        refused.abandon()
        remove_folders(created)
        raise
    finally:
        if run.aside is not None:
            run.aside.close()
            run.aside = None
    if published[1] is None:
        rejects.unlink(missing_ok=True)  # an old run's, replaced (``force``)
    return run.summary(ledger, *published, started)


class _Collected:
    """A stream kept in memory: the tables written to it, in order."""

    def __init__(self):
        self.tables: list[pa.Table] = []

    def write(self, table: pa.Table) -> None:
        self.tables.append(table)


def tag_table(table: pa.Table, setup: TargetSetup, env: Environment, scale: Scale,
              table_cache: Path | None = None, source: str = "events",
              convention: TimeConvention | None = None) -> pa.Table:
    """Tag the events of a table in memory for one target; return the archive rows.

    The same path as ``tag_file``: for the same batches, the same rows. Rejected
    events (duplicate ids, values out of range, ...) are not in the result.

    Parameters
    ----------
    table : pyarrow.Table
        ``event_id`` and ``time_ns`` (in ``convention``, ``scale``) and any optional
        wire-format columns.
    setup, env, scale, table_cache, convention
        As for ``tag_file``.
    source : str
        Written to the archive's ``source`` column.

    Returns
    -------
    pyarrow.Table
        Archive schema (``files.schemas.ARCHIVE``) with the provenance in its metadata.
    """
    run = TagRun.start(setup, env, scale, table_cache, source, source,
                       convention or TimeConvention())
    archive = _Collected()
    ledger = Ledger(archive, _Collected())
    for sequence, record in enumerate(table.to_batches(max_chunksize=READ_ROWS)):
        run.feed(record, sequence, ledger)
    schema = _with_metadata(schemas.ARCHIVE, run.metadata)
    return pa.concat_tables([part.cast(schema) for part in archive.tables]
                            or [schema.empty_table()])
