"""A re-tagging run: a dataset of event files through the tagging step on a Dask
cluster, into a partitioned Parquet dataset and merged statistics.

Theory of operation
-------------------
The client prepares what every fragment shares: the tagging job (target, spin
models, time base, plausible range, time convention; ``tagging.run.tag_job``),
the outputs' provenance and the run's fingerprint (``plan``), and sends the job to
every worker once (``scatter``, broadcast). Fragments already done under the same
fingerprint are skipped, their marks merged as they are.

Each remaining fragment goes through two tasks. ``work.fragment_days`` (on a
worker) finds the TT days it holds; the client builds each day's barycentre
table the first time a fragment needs it (from ``--table-cache`` when there, so
once per site, target and night) and scatters it; ``work.retag_fragment`` then
tags the fragment with those tables and writes its outputs. Results are merged
as they arrive (``merge.RunTotals``), whatever the order; a failed fragment
(a bad file, a worker lost more often than Dask's ``allowed-failures``) is
recorded with its file and reason while the others go on. The merged statistics
are written at the end, also when some fragments failed (they say which).
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from ..assemble import Environment
from ..core.targets import TargetSetup
from ..core.timebase import NS_PER_DAY, Scale
from ..tagging.batchtag import StatisticsShape, TagJob
from ..tagging.run import run_metadata, tag_job
from ..tagging.summary import recipe_lines
from ..tagging.times import TimeConvention
from .merge import RunTotals, write_statistics
from .plan import Fragment, Plan, fingerprint, model_fingerprint, plan_run
from .work import Failure, FragmentResult, fragment_days, retag_fragment

__all__ = ["RetagSummary", "Prepared", "prepare", "execute", "retag", "NIGHTLY"]

NIGHTLY = StatisticsShape(interval_ns=NS_PER_DAY, retain_ns=None)  # one interval per TT day


@dataclass
class RetagSummary:
    """What a run did: fragments, accounting, failures, where the statistics are."""

    out: Path
    statistics: Path
    totals: RunTotals
    fragments: int
    failed: list[tuple[str, str]] = field(default_factory=list)
    seconds: float = 0.0
    workers: int = 0
    target: str = ""

    def lines(self) -> list[str]:
        t = self.totals
        rate = t.events / self.seconds if self.seconds > 0 and t.done else 0.0
        out = [f"{self.fragments} fragments: {t.done} re-tagged, {t.skipped} already done, "
               f"{len(self.failed)} failed ({self.workers} workers, {self.seconds:.1f} s)",
               f"{t.events:,} events ({rate:,.0f}/s): {t.tagged:,} tagged, "
               f"{t.filtered:,} filtered, {t.rejected:,} rejected"]
        out += [f"  rejected ({reason}): {count:,}"
                for reason, count in sorted(t.rejected_by_reason.items())]
        out += [f"  tagged with {flag}: {count:,}" for flag, count in sorted(t.quality.items())]
        out += [f"failed: {name}: {reason}" for name, reason in self.failed]
        out += [f"archive: {self.out}", f"statistics: {self.statistics}"]
        stats = {k: v for k, v in t.statistics.items() if v is not None}
        return out + recipe_lines(self.target, stats)

    def as_dict(self) -> dict:
        t = self.totals
        return {"fragments": self.fragments, "done": t.done, "skipped": t.skipped,
                "failed": [{"fragment": f, "reason": r} for f, r in self.failed],
                "events": t.events, "tagged": t.tagged, "filtered": t.filtered,
                "rejected": t.rejected, "rejected_by_reason": dict(t.rejected_by_reason),
                "tagged_with_quality_flag": dict(t.quality), "archive": str(self.out),
                "statistics": str(self.statistics), "seconds": self.seconds,
                "workers": self.workers}


class _Tables:
    """Barycentre tables by TT day: built (or read from the cache) once, scattered once."""

    def __init__(self, client, day_tables):
        self._client = client
        self._days = day_tables
        self._futures: dict[int, object] = {}
        self.built = 0

    def futures(self, days: list[int]) -> list:
        new = [day for day in days if day not in self._futures]
        if new:  # one round trip to the scheduler for all of them
            scattered = self._client.scatter([self._days.day_table(d) for d in new], hash=False)
            self._futures.update(zip(new, scattered, strict=True))
            self.built += len(new)
        return [self._futures[day] for day in days]


def _outcome(future) -> object:
    try:
        return future.result()
    except Exception as exc:  # a lost worker (KilledWorker), a bug: reported, others go on
        return Failure("", f"{type(exc).__name__}: {exc}")


@dataclass
class Prepared:
    """A run before any cluster: the job, the provenance, the fingerprint, the plan."""

    job: TagJob
    metadata: dict[str, str]
    fingerprint: str
    plan: Plan
    out: Path
    recipes: list[str]
    target: str


def prepare(dataset: Path, out: Path, setup: TargetSetup, env: Environment, scale: Scale, *,
            convention: TimeConvention | None = None,
            table_cache: Path | None = None) -> Prepared:
    """Everything a run needs but the cluster; bad input is refused here, before any
    worker starts (``plan.plan_run``).

    Parameters
    ----------
    dataset : Path
        A folder of Parquet or Arrow IPC files (hive partitions welcome), or one file.
    out : Path
        Output folder: the archive as a partitioned Parquet dataset, the rejects,
        completion marks and ``_statistics.json`` (``plan``, ``merge``).
    setup, env, scale, convention, table_cache
        As for ``tagging.run.tag_file``.
    """
    job = tag_job(setup, env, scale, table_cache, str(dataset), dataset.name,
                  convention or TimeConvention())
    models = [p.model.model_dump_json() for p in setup.tagger.calculators]
    metadata = {**run_metadata(job, env, job.tables.provenance()),
                "model_fingerprint": model_fingerprint(models)}
    run_fingerprint = fingerprint(metadata, models)
    plan = plan_run(dataset, out, run_fingerprint)
    return Prepared(job, metadata, run_fingerprint, plan, out,
                    [r.name for r in setup.recipes], setup.name)


def execute(prepared: Prepared, client, *, on_fragment: Callable[..., None] | None = None,
            work: Callable = retag_fragment) -> RetagSummary:
    """Run a prepared re-tagging on ``client``'s cluster (module docstring).

    Parameters
    ----------
    prepared : Prepared
    client : distributed.Client
    on_fragment : callable, optional
        Progress: ``on_fragment(0, total=n)`` first, then ``on_fragment(1)`` per
        fragment finished (done or failed).
    work : callable
        The per-fragment task (``work.retag_fragment``).
    """
    from distributed import as_completed

    started = time.perf_counter()
    plan, job = prepared.plan, prepared.job
    prepared.out.mkdir(parents=True, exist_ok=True)
    totals = RunTotals(prepared.recipes)
    for mark in plan.done.values():
        totals.add(FragmentResult.from_mark(mark))
    shared = client.scatter(dataclasses.replace(job, tables=None, statistics=NIGHTLY),
                            broadcast=True, hash=False)
    tables = _Tables(client, job.tables)
    failed: list[tuple[str, str]] = []
    if on_fragment is not None:
        on_fragment(0, total=len(plan.todo))
    pending: dict = {}
    running = as_completed()
    for fragment in plan.todo:
        future = client.submit(fragment_days, fragment, shared, pure=False)
        pending[future] = (fragment, "days")
        running.add(future)
    for future in running:
        fragment, step = pending.pop(future)
        outcome = _outcome(future)
        if isinstance(outcome, Failure):
            failed.append((fragment.relative, outcome.reason))
        elif step == "days":
            _submit_work(client, running, pending, work, fragment, shared, prepared,
                         tables.futures(outcome))
            continue
        else:
            totals.add(outcome)
        if on_fragment is not None:
            on_fragment(1)
    statistics = write_statistics(prepared.out, totals,
                                  {**prepared.metadata, "fingerprint": prepared.fingerprint},
                                  failed)
    return RetagSummary(prepared.out, statistics, totals, len(plan.todo) + len(plan.done),
                        failed, time.perf_counter() - started, _workers(client), prepared.target)


def retag(dataset: Path, out: Path, setup: TargetSetup, env: Environment, scale: Scale,
          client, *, convention: TimeConvention | None = None, table_cache: Path | None = None,
          on_fragment: Callable[..., None] | None = None,
          work: Callable = retag_fragment) -> RetagSummary:
    """``prepare`` then ``execute``: re-tag every fragment of ``dataset`` into ``out``."""
    prepared = prepare(dataset, out, setup, env, scale, convention=convention,
                       table_cache=table_cache)
    return execute(prepared, client, on_fragment=on_fragment, work=work)


def _submit_work(client, running, pending: dict, work: Callable, fragment: Fragment, shared,
                 prepared: Prepared, tables: list) -> None:
    future = client.submit(work, fragment, shared, prepared.metadata, prepared.fingerprint,
                           *tables, pure=False)
    pending[future] = (fragment, "work")
    running.add(future)


def _workers(client) -> int:
    try:
        return len(client.nthreads())
    except OSError:
        return 0
