"""From the configuration to the service's working parts: pipeline and writers.

The barycentre tables cover [now - hours_before, now + hours_after] (or the
configured ``cover_from`` / ``cover_until``, for replays of old nights); later days
are built while running (``upkeep``). Every output file carries the provenance of
the tables, the configuration and the spin models in its metadata.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path

import numpy as np

from ..assemble import Environment, TableCache, build_target
from ..config import ServiceConfig
from ..core.correctiontable import TableSet
from ..core.pipeline import Pipeline, PipelineSettings
from ..core.timebase import NS_PER_S, Scale, parse_instant, to_tt, unix_to_ns
from ..files import schemas
from ..files.writer import RotatingArrowWriter

__all__ = ["coverage", "build_pipeline", "output_metadata", "open_writers"]


def _tt_ns(utc_text: str, env: Environment) -> int:
    """A UTC instant written as text, in ns TT since 2000-01-01T12:00:00."""
    return int(to_tt(np.array([parse_instant(utc_text)]), Scale.UTC, env.leaps)[0][0])


def coverage(config: ServiceConfig, env: Environment, now: float) -> tuple[int, int]:
    """Start and stop (ns TT) of the barycentre tables built at start-up, ``now``
    being the wall clock (s since 1970, UTC)."""
    b = config.barycentre
    now_tt = int(to_tt(np.array([unix_to_ns(now)]), Scale.UTC, env.leaps)[0][0])
    start = now_tt - int(b.hours_before * 3600 * NS_PER_S)
    stop = now_tt + int(b.hours_after * 3600 * NS_PER_S)
    if b.cover_from:
        start = _tt_ns(b.cover_from, env)
    if b.cover_until:
        stop = _tt_ns(b.cover_until, env)
    return start, stop


def build_pipeline(config: ServiceConfig, env: Environment, tables: TableCache,
                   now: float) -> Pipeline:
    """The pipeline of the configured targets, with tables covering ``coverage``."""
    start, stop = coverage(config, env, now)
    targets = []
    for target in config.targets:
        setup = build_target(target)
        setup.tagger.table = TableSet([tables.table(setup.position, start, stop)])
        targets.append(setup)
    s, check = config.statistics, config.clock_check
    settings = PipelineSettings(
        leaps=env.leaps, clock_chain=env.clock_chain,
        earliest_ns=_tt_ns(config.intake.plausible_from, env),
        latest_ns=_tt_ns(config.intake.plausible_until, env),
        harmonics=s.harmonics, bins=s.bins, interval_ns=int(s.interval_s * NS_PER_S),
        windows_ns=tuple(int(m * 60 * NS_PER_S) for m in s.windows_minutes),
        retain_ns=int(s.retain_hours * 3600 * NS_PER_S),
        clock_chunk_ns=(None if check.chunk_seconds is None
                        else int(check.chunk_seconds * NS_PER_S)),
        tolerance_cycles=check.tolerance_cycles, tolerance_us=check.tolerance_us)
    return Pipeline(settings, targets)


def output_metadata(config: ServiceConfig, env: Environment,
                    pipeline: Pipeline) -> dict[str, str]:
    """Provenance for every output file: tables, configuration, models, recipes."""
    targets = pipeline.targets
    return {
        **env.provenance(),
        "config": config.model_dump_json(),
        "models": json.dumps({n: t.tagger.model_ids for n, t in targets.items()}),
        "recipes_by_target": json.dumps({n: [r.name for r in t.recipes]
                                         for n, t in targets.items()}),
        "table": json.dumps({n: {k: v for k, v in t.tagger.table.tables[0].provenance.items()
                                 if k not in ("start_ns", "stop_ns")}
                             for n, t in targets.items()}),
    }


def open_writers(out: Path, config: ServiceConfig, metadata: dict[str, str],
                 clock: Callable[[], float]) -> dict[str, RotatingArrowWriter]:
    """One rotating writer per output stream (``files.schemas.OUTPUTS``); they rotate
    only between messages (``Ledger.commit``, the loop's rotation check)."""
    o = config.output
    return {stem: RotatingArrowWriter(out, stem, schema, rotate_seconds=o.rotate_minutes * 60,
                                      rotate_bytes=int(o.rotate_megabytes * 2**20),
                                      metadata=metadata, clock=clock, rotate_on_write=False)
            for stem, schema in schemas.OUTPUTS.items()}
