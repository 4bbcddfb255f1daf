"""Offline tagging: events in, the archive's phase columns out (the library behind
``turnstamp tag`` and ``turnstamp.tag_events``).

Input: record batches with the columns of the wire format (``event_id``,
``time_ns`` and any optional columns), either read from an Arrow IPC file (or
stream) or a Parquet file batch by batch so that memory stays bounded
(``tag_file``), or taken from a table in memory (``tag_table``).

Theory of operation: a first pass over the batches finds the days that hold
events; one barycentre table per such day (from the cache when given) is built
before any event is tagged. A second pass feeds every batch to one ``Pipeline``
with a single target and turns its results into archive and rejects tables. Both
entry points share that ``_TagRun``, so a file and a table holding the same
batches give the same archive rows, with the same accounting as the service.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .assemble import Environment, TableCache
from .config import BarycentreConfig, RecipeConfig, TargetConfig
from .core.accounting import MessageRecord
from .core.correctiontable import TableSet
from .core.pipeline import Pipeline, PipelineSettings
from .core.targets import TargetSetup
from .core.timebase import NS_PER_DAY as DAY_NS
from .core.timebase import NS_PER_S, Scale, to_tt
from .errors import EventFileError, WireError
from .files import schemas
from .files.ledger import Ledger
from .files.outputs import archive_table, rejects_table
from .wire.decode import batch_from_record

__all__ = ["TagSummary", "tag_file", "tag_table", "default_target", "READ_ROWS"]

READ_ROWS = 1 << 20  # rows per read: bounds memory whatever the file size
MARGIN_NS = 600 * NS_PER_S  # clock corrections cannot push an event out of its day's table


@dataclass
class TagSummary:
    """Accounting of one ``tag_file`` run (events, and seconds of wall clock)."""

    events: int
    tagged: int
    filtered: int
    rejected: int
    output: Path
    rejects: Path | None
    seconds: float
    significance: list[dict]

    def lines(self) -> list[str]:
        rate = self.events / self.seconds if self.seconds > 0 else 0.0
        out = [f"{self.events} events in {self.seconds:.1f} s ({rate:,.0f}/s): "
               f"{self.tagged} tagged, {self.filtered} filtered, {self.rejected} rejected",
               f"archive: {self.output}"]
        if self.rejects:
            out.append(f"rejects: {self.rejects}")
        for row in self.significance:
            if row["window"] == "cumulative":
                out.append(f"{row['target']}/{row['recipe']}: H = {row['h_statistic']:.1f} "
                           f"({row['h_harmonics']} harmonics), {row['h_sigma']:.2f} sigma")
        return out


def _batches(path: Path):
    """Record batches of an Arrow IPC file/stream or a Parquet file."""
    suffix = path.suffix.lower()
    try:
        if suffix == ".parquet":
            file = pq.ParquetFile(path)
            yield from file.iter_batches(batch_size=READ_ROWS)
            return
        with pa.memory_map(str(path)) as source:
            try:
                reader = pa.ipc.open_file(source)
                for i in range(reader.num_record_batches):
                    yield reader.get_batch(i)
            except pa.ArrowInvalid:
                source.seek(0)
                yield from pa.ipc.open_stream(source)
    except (OSError, pa.ArrowException) as exc:
        raise EventFileError("events", str(path), f"cannot read as Arrow or Parquet: {exc}") \
            from None


def _event_times(record: pa.RecordBatch, label: str) -> np.ndarray:
    """The plausible ``time_ns`` values of one batch (ns since 2000-01-01T12:00:00)."""
    if "time_ns" not in record.schema.names:
        raise EventFileError("time_ns", None, f"{label}: required column missing; columns: "
                             f"{record.schema.names}")
    column = record.column("time_ns")
    if not pa.types.is_integer(column.type):
        raise EventFileError("time_ns", str(column.type),
                             f"{label}: must be an integer column of ns since "
                             "2000-01-01T12:00:00")
    values = column.drop_null().to_numpy()
    return values[(values > -2**62) & (values < 2**62)]


def _days_with_events(records: Iterable[pa.RecordBatch], label: str, scale: Scale,
                      leaps) -> list[int]:
    """Starts (TT ns) of the days holding events, with a 10-minute margin either side
    so that clock corrections cannot push an event out of its table."""
    days: set[int] = set()
    for record in records:
        values = _event_times(record, label)
        if values.size:
            tt, _ = to_tt(values, scale, leaps)
            for shifted in (tt - MARGIN_NS, tt + MARGIN_NS):
                days.update(int(d) * DAY_NS for d in np.unique(shifted // DAY_NS))
    if not days:
        raise EventFileError("events", label, "no events with a time")
    return sorted(days)


def _with_metadata(schema: pa.Schema, metadata: dict) -> pa.Schema:
    return schema.with_metadata({**(schema.metadata or {}),
                                 **{k: str(v) for k, v in metadata.items()}})


class _TagRun:
    """One target's pipeline over barycentre tables for the days that hold events."""

    def __init__(self, setup: TargetSetup, env: Environment, scale: Scale, days: list[int],
                 table_cache: Path | None, label: str, ledger: Ledger):
        cache = TableCache(table_cache, env, BarycentreConfig())
        setup.tagger.table = TableSet(cache.table(setup.position, day, day + DAY_NS)
                                      for day in days)
        self.name, self.scale, self.label = setup.name, scale, label
        self.model_ids = setup.tagger.model_ids
        self.pipeline = Pipeline(PipelineSettings(leaps=env.leaps, clock_chain=env.clock_chain,
                                                  earliest_ns=-2**62, latest_ns=2**62), [setup])
        self.metadata = {**env.provenance(), "target": setup.name,
                         "models": ",".join(self.model_ids), "input": label,
                         "recipes": ",".join(r.name for r in setup.recipes),
                         "table": _table_summary(setup.tagger.table)}
        self.ledger = ledger

    def feed(self, record: pa.RecordBatch, source: str, sequence: int) -> None:
        """Tag one batch and commit its rows to the ledger (archive, then rejects)."""
        try:
            batch, _ = batch_from_record(record, source=source, sequence=sequence,
                                         time_scale=self.scale)
        except WireError as exc:
            raise EventFileError("events", self.label, exc.detail) from None
        result = self.pipeline.feed(batch)
        archive = []
        if self.name in result.archive:
            archive.append(archive_table(result.archive[self.name], source, batch.sequence,
                                         self.name, self.model_ids))
        rejects = []
        if result.rejected:
            rejects.append(rejects_table(batch, result, received_utc_ns=0, message_bytes=0))
        record = MessageRecord.accepted(0, source, batch.sequence, result)
        self.ledger.commit(record, archive, rejects)

    def check_accounting(self) -> None:
        counters = self.pipeline.counters
        assert counters.reconciles(), vars(counters)


def tag_file(events: Path, output: Path, setup: TargetSetup, env: Environment,
             scale: Scale, table_cache: Path | None = None,
             on_batch: Callable[[int], None] | None = None) -> TagSummary:
    """Tag every event of a file for one target; write the archive and the rejects.

    Parameters
    ----------
    events : Path
        Arrow IPC file or stream, or Parquet (by the suffix), with ``event_id`` and
        ``time_ns`` (int64 ns since 2000-01-01T12:00:00 in ``scale``).
    output : Path
        Archive file (Parquet by the suffix ``.parquet``, else Arrow IPC); rejects go
        beside it as ``STEM.rejects.arrow`` when there are any.
    setup : TargetSetup
        The target (its barycentre table is set here).
    env : Environment
        Site tables.
    scale : Scale
        Time scale of ``time_ns`` (UTC labels, TAI, GPS or TT).
    table_cache : Path, optional
        Folder of cached barycentre tables.
    on_batch : callable, optional
        Called with the number of events of each batch once it is committed (progress).
    """
    started = time.perf_counter()
    days = _days_with_events(_batches(events), str(events), scale, env.leaps)
    rejects_path = output.with_name(output.stem + ".rejects.arrow")
    archive_out = _Writer(output, always=True)
    rejects_out = _Writer(rejects_path)
    run = _TagRun(setup, env, scale, days, table_cache, str(events),
                  Ledger(archive_out, rejects_out))
    archive_out.schema = _with_metadata(schemas.ARCHIVE, run.metadata)
    rejects_out.schema = _with_metadata(schemas.REJECTS, run.metadata)
    with archive_out, rejects_out:
        for sequence, record in enumerate(_batches(events)):
            run.feed(record, events.name, sequence)
            if on_batch is not None:
                on_batch(record.num_rows)
    run.check_accounting()
    counters = run.pipeline.counters
    return TagSummary(counters.events_received, counters.events_tagged,
                      counters.events_filtered, counters.events_rejected,
                      output, rejects_path if rejects_out.rows else None,
                      time.perf_counter() - started, run.pipeline.significance())


def tag_table(table: pa.Table, setup: TargetSetup, env: Environment, scale: Scale,
              table_cache: Path | None = None, source: str = "events") -> pa.Table:
    """Tag the events of a table in memory for one target; return the archive rows.

    The same path as ``tag_file``: for the same batches, the same rows. Rejected
    events (duplicate ids, values out of range, ...) are not in the result.

    Parameters
    ----------
    table : pyarrow.Table
        ``event_id`` and ``time_ns`` (int64 ns since 2000-01-01T12:00:00 in ``scale``)
        and any optional wire-format columns.
    setup, env, scale, table_cache
        As for ``tag_file``.
    source : str
        Written to the archive's ``source`` column.

    Returns
    -------
    pyarrow.Table
        Archive schema (``files.schemas.ARCHIVE``) with the provenance in its metadata.
    """
    records = table.to_batches(max_chunksize=READ_ROWS)
    days = _days_with_events(records, source, scale, env.leaps)
    archive: list[pa.Table] = []
    run = _TagRun(setup, env, scale, days, table_cache, source,
                  Ledger(_Collected(archive), _Collected([])))
    for sequence, record in enumerate(records):
        run.feed(record, source, sequence)
    run.check_accounting()
    schema = _with_metadata(schemas.ARCHIVE, run.metadata)
    return pa.concat_tables([part.cast(schema) for part in archive] or [schema.empty_table()])


class _Collected:
    """A stream kept in memory: the tables written to it, in order."""

    def __init__(self, tables: list[pa.Table]):
        self.tables = tables

    def write(self, table: pa.Table) -> None:
        self.tables.append(table)


def _table_summary(tables: TableSet) -> str:
    pieces = tables.tables
    common = {k: v for k, v in pieces[0].provenance.items() if k not in ("start_ns", "stop_ns")}
    return json.dumps({**common, "pieces_tt_ns": [[t.start_ns, t.stop_ns] for t in pieces]})


class _Writer:
    """Streams tables into one Arrow IPC or Parquet file, created on first write
    (or on close when ``always``: the archive exists even when empty)."""

    def __init__(self, path: Path, schema: pa.Schema | None = None, always: bool = False):
        self.path = path
        self.schema = schema
        self.always = always
        self.rows = 0
        self._writer = None
        self._sink = None

    def _open(self):
        self.path.parent.mkdir(parents=True, exist_ok=True)
        if self.path.suffix.lower() == ".parquet":
            self._writer = pq.ParquetWriter(self.path, self.schema)
        else:
            self._sink = pa.OSFile(str(self.path), "wb")
            self._writer = pa.ipc.new_file(self._sink, self.schema)

    def write(self, table: pa.Table) -> None:
        if self._writer is None:
            self._open()
        self._writer.write_table(table.cast(self.schema))
        self.rows += table.num_rows

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        if self._writer is None and self.always:
            self._open()
        if self._writer is not None:
            self._writer.close()
        if self._sink is not None:
            self._sink.close()


def default_target(models: list[str], name: str | None = None) -> TargetConfig:
    """A single-recipe target for the command line (all events, weights if present)."""
    return TargetConfig(name=name or "target", models=[Path(m) for m in models],
                        recipes=[RecipeConfig(name="all")])
