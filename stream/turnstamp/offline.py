"""Offline tagging: a file of events in, the archive's phase columns out.

Input: an Arrow IPC file (or stream) or a Parquet file with the columns of the
wire format (``event_id``, ``time_ns`` and any optional columns), read batch by
batch so that memory stays bounded. Output: an Arrow IPC file (or Parquet, by
the suffix) with the archive schema, the rejects beside it, and the same
accounting as the service.
"""

from __future__ import annotations

import json
import logging
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .assemble import Environment, TableCache, build_target
from .config import BarycentreConfig, RecipeConfig, TargetConfig
from .core.correctiontable import TableSet
from .core.pipeline import Pipeline, PipelineSettings
from .core.timebase import NS_PER_DAY as DAY_NS
from .core.timebase import NS_PER_S, Scale, to_tt
from .errors import EventFileError, WireError
from .files import schemas
from .service.outputs import archive_table, rejects_table
from .wire.decode import batch_from_record

__all__ = ["TagSummary", "tag_file"]

log = logging.getLogger(__name__)
READ_ROWS = 1 << 20  # rows per read: bounds memory whatever the file size


@dataclass
class TagSummary:
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


def _days_with_events(path: Path, scale: Scale, leaps) -> list[int]:
    """Starts (TT ns) of the days holding events, with a 10-minute margin either side
    so that clock corrections cannot push an event out of its table."""
    days: set[int] = set()
    margin = 600 * NS_PER_S
    for record in _batches(path):
        if "time_ns" not in record.schema.names:
            raise EventFileError("time_ns", None, f"{path}: required column missing; columns: "
                                 f"{record.schema.names}")
        column = record.column("time_ns")
        if not pa.types.is_integer(column.type):
            raise EventFileError("time_ns", str(column.type),
                                 f"{path}: must be an integer column of ns since "
                                 "2000-01-01T12:00:00")
        values = column.drop_null().to_numpy()
        values = values[(values > -2**62) & (values < 2**62)]
        if values.size:
            tt, _ = to_tt(values, scale, leaps)
            for shifted in (tt - margin, tt + margin):
                days.update(int(d) * DAY_NS for d in np.unique(shifted // DAY_NS))
    if not days:
        raise EventFileError("events", str(path), "no events with a time")
    return sorted(days)


def tag_file(events: Path, output: Path, target: TargetConfig, env: Environment,
             scale: Scale, table_cache: Path | None = None, progress=sys.stderr) -> TagSummary:
    """Tag every event of ``events`` for one target; write archive and rejects."""
    started = time.perf_counter()
    setup = build_target(target)
    cache = TableCache(table_cache, env, BarycentreConfig())
    setup.tagger.table = TableSet(cache.table(setup.position, day, day + DAY_NS)
                                  for day in _days_with_events(events, scale, env.leaps))
    pipeline = Pipeline(PipelineSettings(leaps=env.leaps, clock_chain=env.clock_chain,
                                         earliest_ns=-2**62, latest_ns=2**62), [setup])
    metadata = {**env.provenance(), "target": target.name,
                "models": ",".join(setup.tagger.model_ids), "input": str(events),
                "recipes": ",".join(r.name for r in setup.recipes),
                "table": _table_summary(setup.tagger.table)}
    rejects_path = output.with_name(output.stem + ".rejects.arrow")
    archive_out = _Writer(output, schemas.ARCHIVE, metadata)
    rejects_out = _Writer(rejects_path, schemas.REJECTS, metadata)
    with archive_out, rejects_out:
        _feed_file(events, pipeline, target.name, scale, archive_out, rejects_out, progress)
    counters = pipeline.counters
    assert counters.reconciles(), vars(counters)
    return TagSummary(counters.events_received, counters.events_tagged,
                      counters.events_filtered, counters.events_rejected,
                      output, rejects_path if rejects_out.rows else None,
                      time.perf_counter() - started, pipeline.significance())


def _feed_file(events, pipeline, name, scale, archive_out, rejects_out, progress):
    for sequence, record in enumerate(_batches(events)):
        try:
            batch, _ = batch_from_record(record, source=events.name, sequence=sequence,
                                         time_scale=scale)
        except WireError as exc:
            raise EventFileError("events", str(events), exc.detail) from None
        result = pipeline.feed(batch)
        if name in result.archive:
            archive_out.write(archive_table(result.archive[name], events.name,
                                            batch.sequence, name,
                                            pipeline.targets[name].tagger.model_ids))
        if result.rejected:
            rejects_out.write(rejects_table(batch, result, received_utc_ns=0, message_bytes=0))
        if progress is not None:
            counters = pipeline.counters
            print(f"\r{counters.events_received:,} events read, "
                  f"{counters.events_tagged:,} tagged", end="", file=progress, flush=True)
    if progress is not None:
        print(file=progress)


def _table_summary(tables: TableSet) -> str:
    pieces = tables.tables
    common = {k: v for k, v in pieces[0].provenance.items() if k not in ("start_ns", "stop_ns")}
    return json.dumps({**common, "pieces_tt_ns": [[t.start_ns, t.stop_ns] for t in pieces]})


class _Writer:
    """Streams tables into one Arrow IPC or Parquet file, created on first write
    (the archive is always created, even when empty)."""

    def __init__(self, path: Path, schema: pa.Schema, metadata: dict, always: bool = False):
        self.path = path
        self.schema = schema.with_metadata({**(schema.metadata or {}),
                                            **{k: str(v) for k, v in metadata.items()}})
        self.always = always or schema is schemas.ARCHIVE
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
