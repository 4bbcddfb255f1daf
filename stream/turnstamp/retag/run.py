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
from concurrent.futures import CancelledError
from dataclasses import dataclass, field
from pathlib import Path

from ..assemble import Environment
from ..core.targets import TargetSetup
from ..core.timebase import Scale
from ..tagging.batchtag import TagJob
from ..tagging.run import run_metadata, tag_job
from ..tagging.summary import recipe_lines
from ..tagging.times import TimeConvention
from .merge import RunTotals, write_statistics
from .plan import Fragment, Plan, fingerprint, model_fingerprint, plan_run
from .work import Failure, FragmentResult, fragment_days, retag_fragment

__all__ = ["RetagSummary", "Prepared", "prepare", "execute", "retag"]


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
    skipped_events: int = 0  # in fragments already done

    def lines(self) -> list[str]:
        t = self.totals
        new_events = t.events - self.skipped_events
        rate = f", {new_events / self.seconds:,.0f}/s re-tagged" if self.seconds > 0 and \
            new_events else ""
        out = [f"{self.fragments} fragments: {t.done} re-tagged, {t.skipped} already done, "
               f"{len(self.failed)} failed ({self.workers} workers, {self.seconds:.1f} s)",
               f"{t.events:,} events{rate}: {t.tagged:,} tagged, "
               f"{t.filtered:,} filtered, {t.rejected:,} rejected"]
        out += [f"  rejected ({reason}): {count:,}"
                for reason, count in sorted(t.rejected_by_reason.items())]
        out += [f"  tagged with {flag}: {count:,}" for flag, count in sorted(t.quality.items())]
        out += [f"failed: {name}: {reason}" for name, reason in self.failed]
        out += [f"archive: {self.out}", f"statistics: {self.statistics}"]
        stats = {k: v for k, v in t.statistics.items() if v is not None}
        if t.tagged and t.quality.get("OUTSIDE_MODEL_VALIDITY", 0) == t.tagged:
            out.append("warning: every event lies outside the spin model's validity window "
                       "(a model for other dates?)")
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


class _Shared:
    """What the tasks share, on the workers: the job, and each TT day's barycentre
    table, built (or read from the cache) once on the client and scattered to every
    worker. Scattered data has no recipe, and Dask may drop spare copies, so a
    worker's death can lose it: whatever is lost is scattered again from the
    client's copy (never rebuilt)."""

    def __init__(self, client, job: TagJob):
        self._client = client
        self._job = dataclasses.replace(job, tables=None)
        self._days = job.tables
        self._tables: dict[int, object] = {}
        self._futures: dict = {}

    def _scattered(self, key, value):
        future = self._futures.get(key)
        if future is None or future.status != "finished":
            future = self._futures[key] = self._client.scatter(value, broadcast=True,
                                                                hash=False)
        return future

    def job(self):
        return self._scattered("job", self._job)

    def tables(self, days: list[int]) -> list:
        for day in days:
            if day not in self._tables:
                self._tables[day] = self._days.day_table(day)
        return [self._scattered(day, self._tables[day]) for day in days]


def _outcome(future) -> object:
    try:
        return future.result()
    except CancelledError:  # its inputs were lost with a worker: tried again
        return None
    except Exception as exc:  # a worker lost too often (KilledWorker), a bug: reported
        return Failure("", f"{type(exc).__name__}: {exc}")


class _Tasks:
    """The fragments' tasks in flight: days first, then the tagging (module docstring)."""

    RETRIES = 3  # fragments whose shared inputs were lost, tried again this often

    def __init__(self, client, prepared: Prepared, work: Callable):
        from distributed import as_completed

        self.client, self.prepared, self.work = client, prepared, work
        self.shared = _Shared(client, prepared.job)
        self.running = as_completed()
        self.pending: dict = {}
        self.retries: dict[str, int] = {}

    def days(self, fragment: Fragment) -> None:
        self._submit(fragment, "days", fragment_days, fragment, self.shared.job())

    def tag(self, fragment: Fragment, days: list[int]) -> None:
        self._submit(fragment, "work", self.work, fragment, self.shared.job(),
                     self.prepared.metadata, self.prepared.fingerprint,
                     *self.shared.tables(days))

    def _submit(self, fragment: Fragment, step: str, function, *args) -> None:
        future = self.client.submit(function, *args, pure=False)
        self.pending[future] = (fragment, step)
        self.running.add(future)

    def outcomes(self):
        """(fragment, result) of each fragment finished: a ``FragmentResult`` or a
        ``Failure``."""
        for future in self.running:
            fragment, step = self.pending.pop(future)
            outcome = _outcome(future)
            if outcome is None:
                tries = self.retries[fragment.relative] = self.retries.get(
                    fragment.relative, 0) + 1
                if tries <= self.RETRIES:
                    self.days(fragment)
                    continue
                outcome = Failure(fragment.relative, "its inputs were lost with workers "
                                  f"{tries} times")
            if step == "days" and not isinstance(outcome, Failure):
                self.tag(fragment, outcome)
                continue
            yield fragment, outcome


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
    started = time.perf_counter()
    plan = prepared.plan
    prepared.out.mkdir(parents=True, exist_ok=True)
    totals = RunTotals(prepared.recipes)
    for mark in plan.done.values():
        totals.add(FragmentResult.from_mark(mark))
    skipped_events = totals.events
    failed: list[tuple[str, str]] = []
    if on_fragment is not None:
        on_fragment(0, total=len(plan.todo))
    tasks = _Tasks(client, prepared, work)
    for fragment in plan.todo:
        tasks.days(fragment)
    for fragment, outcome in tasks.outcomes():
        if isinstance(outcome, Failure):
            failed.append((fragment.relative, outcome.reason))
        else:
            totals.add(outcome)
        if on_fragment is not None:
            on_fragment(1)
    statistics = write_statistics(prepared.out, totals,
                                  {**prepared.metadata, "fingerprint": prepared.fingerprint},
                                  failed)
    return RetagSummary(prepared.out, statistics, totals, len(plan.todo) + len(plan.done),
                        failed, time.perf_counter() - started, _workers(client), prepared.target,
                        skipped_events)


def retag(dataset: Path, out: Path, setup: TargetSetup, env: Environment, scale: Scale,
          client, *, convention: TimeConvention | None = None, table_cache: Path | None = None,
          on_fragment: Callable[..., None] | None = None,
          work: Callable = retag_fragment) -> RetagSummary:
    """``prepare`` then ``execute``: re-tag every fragment of ``dataset`` into ``out``."""
    prepared = prepare(dataset, out, setup, env, scale, convention=convention,
                       table_cache=table_cache)
    return execute(prepared, client, on_fragment=on_fragment, work=work)


def _workers(client) -> int:
    try:
        return len(client.nthreads())
    except OSError:
        return 0
