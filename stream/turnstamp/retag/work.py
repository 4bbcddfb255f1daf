"""The work of one fragment, as a worker does it: pure functions of their arguments.

``fragment_days`` finds the TT days whose barycentre tables a fragment needs (it
reads ``event_id`` and ``time_ns`` only, through the same checks and time base as
tagging). ``retag_fragment`` then tags the fragment with the tables it is given,
by the very step ``turnstamp tag`` runs (``tagging.run.tag_into``): the same
batches, the same archive rows. Its archive is written into a hidden partial file
and renamed into place when complete, then its completion mark (accounting and
statistics partials, one interval per TT day) is written atomically: a worker
killed at any moment leaves either no archive, or a whole one that the next
attempt replaces by the same rows.

Neither function raises for a bad fragment: it returns a ``Failure`` naming the
file and the reason, so that one bad file never stops the others (and no error
object has to cross a process boundary).
"""

from __future__ import annotations

import copy
import dataclasses
import time
from pathlib import Path
from typing import NamedTuple

import pyarrow as pa

from ..core.correctiontable import CorrectionTable, TableSet
from ..core.timebinned import TimeBinnedMoments
from ..errors import InputError
from ..files.durable import atomic_write_json
from ..tagging.batchtag import TagJob, tt_days
from ..tagging.inputs import READ_ROWS, SLICE_ROWS, open_events
from ..tagging.outputs import make_folder, remove_folders
from ..tagging.run import TagRun, tag_into
from .plan import Fragment

__all__ = ["Failure", "FragmentResult", "fragment_days", "retag_fragment"]


class Failure(NamedTuple):
    """A fragment that could not be done: its file and why."""

    relative: str
    reason: str


@dataclasses.dataclass
class FragmentResult:
    """One fragment re-tagged (or found done): accounting, statistics, time taken."""

    relative: str
    events: int
    tagged: int
    filtered: int
    rejected: int
    rejected_by_reason: dict[str, int]
    quality: dict[str, int]
    statistics: dict[str, TimeBinnedMoments]
    seconds: float
    skipped: bool = False

    def to_mark(self, fingerprint: str, source_bytes: int) -> dict:
        """The completion mark's content (JSON-ready; floats round-trip exactly)."""
        return {"fingerprint": fingerprint, "source_bytes": source_bytes,
                "fragment": self.relative, "events": self.events, "tagged": self.tagged,
                "filtered": self.filtered, "rejected": self.rejected,
                "rejected_by_reason": self.rejected_by_reason, "quality": self.quality,
                "seconds": self.seconds,
                "statistics": {k: v.to_state() for k, v in self.statistics.items()}}

    @classmethod
    def from_mark(cls, mark: dict) -> FragmentResult:
        """A done fragment's result from its mark (``skipped``)."""
        statistics = {k: TimeBinnedMoments.from_state(v, f"statistics.{k}")
                      for k, v in mark["statistics"].items()}
        return cls(mark["fragment"], mark["events"], mark["tagged"], mark["filtered"],
                   mark["rejected"], dict(mark["rejected_by_reason"]), dict(mark["quality"]),
                   statistics, 0.0, skipped=True)


def _why(exc: BaseException) -> str:
    return str(exc) if isinstance(exc, InputError) else f"{type(exc).__name__}: {exc}"


def _time_batches(path: Path):
    """(batch number, record) of ``event_id`` and ``time_ns``, in the batches and
    slices tagging reads (``tagging.inputs``), without the other columns."""
    if path.suffix.lower() == ".parquet":
        import pyarrow.parquet as pq

        parquet = pq.ParquetFile(path, pre_buffer=False)
        columns = [c for c in ("event_id", "time_ns") if c in parquet.schema_arrow.names]
        batches = parquet.iter_batches(batch_size=READ_ROWS, columns=columns, use_threads=False)
        for sequence, record in enumerate(batches):
            for start in range(0, max(record.num_rows, 1), SLICE_ROWS):
                yield sequence, record.slice(start, SLICE_ROWS)
        return
    yield from open_events(path)


def fragment_days(fragment: Fragment, job: TagJob) -> list[int] | Failure:
    """The TT days holding valid events of the fragment (ascending), or its failure."""
    days: set[int] = set()
    try:
        for sequence, record in _time_batches(Path(fragment.path)):
            days.update(tt_days(record, job, sequence))
    except (InputError, OSError, pa.ArrowException) as exc:
        return Failure(fragment.relative, _why(exc))
    return sorted(days)


def _job_for(job: TagJob, fragment: Fragment, tables: tuple[CorrectionTable, ...]) -> TagJob:
    """The shared job with this fragment's tables, on a tagger of its own (the shared
    one is untouched, so that tasks may run side by side in one worker)."""
    own = copy.copy(job.setup.tagger)
    own.table = TableSet(tables)
    setup = dataclasses.replace(job.setup, tagger=own)
    return dataclasses.replace(job, setup=setup, source=Path(fragment.relative).name,
                               label=fragment.path, tables=None)


def _remove_stale(output: Path) -> None:
    """Remove the hidden partial files an earlier attempt at ``output`` left behind (a
    worker killed while writing); a fragment is done by one attempt at a time."""
    if output.parent.is_dir():
        for partial in output.parent.glob(f".{output.name}.*.partial"):
            partial.unlink(missing_ok=True)


def retag_fragment(fragment: Fragment, job: TagJob, metadata: dict[str, str],
                   fingerprint: str, *tables: CorrectionTable) -> FragmentResult | Failure:
    """Re-tag one fragment into its archive, rejects and completion mark.

    Parameters
    ----------
    fragment : Fragment
    job : TagJob
        The run's job (no ``DayTables``; statistics one interval per TT day).
    metadata : dict
        The outputs' provenance (the fragment's name is added as ``input``).
    fingerprint : str
        The run's fingerprint (``plan.fingerprint``), kept in the metadata and mark.
    *tables : CorrectionTable
        The barycentre tables of the fragment's days (``fragment_days``).
    """
    started = time.perf_counter()
    for output in (Path(fragment.output), Path(fragment.rejects)):
        _remove_stale(output)
    try:
        run = TagRun(_job_for(job, fragment, tables),
                     {**metadata, "input": fragment.relative, "fingerprint": fingerprint})
        reader = open_events(Path(fragment.path))
        folders = make_folder(Path(fragment.rejects).parent)
        summary = tag_into(reader, run, Path(fragment.output), Path(fragment.rejects), started)
        if summary.rejects is None:
            remove_folders(folders)
    except (InputError, OSError, pa.ArrowException) as exc:
        return Failure(fragment.relative, _why(exc))
    result = FragmentResult(fragment.relative, summary.events, summary.tagged,
                            summary.filtered, summary.rejected, dict(summary.rejected_by_reason),
                            dict(summary.quality), summary.statistics,
                            time.perf_counter() - started)
    mark = Path(fragment.mark)
    mark.parent.mkdir(parents=True, exist_ok=True)
    atomic_write_json(mark, result.to_mark(fingerprint, fragment.size), indent=None)
    return result
