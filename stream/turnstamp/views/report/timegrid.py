"""The archive reduced to a fine time grid, and the UTC time axis of the figures.

The archive is the only large input. It is read file by file, memory-mapped, and
reduced to cells of ``GRID_S`` seconds (wider when the data span more than
``_MAX_CELLS`` of them, as an offline file may): per (target, recipe) the weighted
phase histogram of every cell and, only when no significance stream exists, the
trigonometric moments of every cell. Complete files are reduced once per process
and cached, so ``--every`` does not rescan a finished hour.
"""

from __future__ import annotations

import contextlib
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ...core.accounting import EXCLUDED_FROM_STATISTICS, QualityCounts
from ...core.moments import DEFAULT_BINS, MAX_HARMONICS, PhaseMoments
from ...core.timebase import NS_PER_DAY, NS_PER_S, Scale, format_instant, from_tt
from ...errors import ArrowFileError
from ...files.reader import read_arrow_file_report
from .night import NightFolder, metadata_of, read_any, recipes_from_metadata

__all__ = [
    "GRID_S",
    "GRID_ORIGIN_NS",
    "Grid",
    "ArchiveSummary",
    "reduce_archive",
    "UtcHours",
    "first_data_ns",
    "last_data_ns",
]


GRID_S = 10
"""Finest width of the archive's time grid, seconds (phase-time map rows are whole cells)."""
_MAX_CELLS = 5000
"""The grid widens (in whole multiples of GRID_S) to keep at most this many cells."""
GRID_ORIGIN_NS = 69_184_000_000
"""Cells start at TT instants this far from the epoch: TT - UTC since 2017, so that the
grid falls on whole UTC 10-s marks (any constant would do; only looks change)."""
_ARCHIVE_COLUMNS = ("target", "site_tt_ns", "phase", "weight", "recipe_flags",
                    "quality_flags", "model_id")


@dataclass
class Grid:
    """Per (target, recipe): phase histograms per time cell, optionally moments."""

    bins: int
    weighted: bool
    cell_ns: int
    hist: dict[int, np.ndarray] = field(default_factory=dict)  # cell -> sum w per bin
    hist_w2: dict[int, np.ndarray] = field(default_factory=dict)
    moments: dict[int, PhaseMoments] | None = None
    rows: int = 0
    sum_w: float = 0.0
    first_ns: int | None = None
    last_ns: int | None = None

    def merge(self, other: Grid) -> None:
        for cell, values in other.hist.items():
            if cell in self.hist:
                self.hist[cell] = self.hist[cell] + values
                self.hist_w2[cell] = self.hist_w2[cell] + other.hist_w2[cell]
            else:
                self.hist[cell] = values.copy()
                self.hist_w2[cell] = other.hist_w2[cell].copy()
        if other.moments is not None:
            if self.moments is None:
                self.moments = {}
            for cell, m in other.moments.items():
                self.moments[cell] = self.moments[cell] + m if cell in self.moments \
                    else m.copy()
        self.rows += other.rows
        self.sum_w += other.sum_w
        for name, pick in (("first_ns", min), ("last_ns", max)):
            mine, theirs = getattr(self, name), getattr(other, name)
            setattr(self, name, theirs if mine is None else
                    mine if theirs is None else pick(mine, theirs))


@dataclass
class _FileReduction:
    grids: dict[tuple[str, str], Grid]
    rows_by_target: dict[str, int]
    model_ids: dict[str, set[str]]
    with_moments: bool
    quality: QualityCounts = field(default_factory=QualityCounts)


_CACHE: dict[tuple[str, int, int, tuple], _FileReduction] = {}


def _dictionary_column(batch: pa.RecordBatch, name: str) -> tuple[np.ndarray, list[str]]:
    column = batch.column(name)
    if not pa.types.is_dictionary(column.type):
        column = pc.dictionary_encode(column)
    return (column.indices.to_numpy(zero_copy_only=False).astype(np.int64),
            [str(v) for v in column.dictionary.to_pylist()])


@dataclass(frozen=True)
class _GridOptions:
    weighted: dict[tuple[str, str], bool]
    bins: dict[tuple[str, str], int]
    with_moments: bool
    cell_ns: int


def _reduce_file(path: Path, weighted: dict[tuple[str, str], bool],
                 bins: dict[tuple[str, str], int], with_moments: bool,
                 fallback_recipes: dict[str, list[str]], cell_ns: int) -> _FileReduction:
    """One archive file reduced to per-(target, recipe) grids (cached when complete)."""
    stat = path.stat()
    settings = (tuple(sorted(weighted.items())), tuple(sorted(bins.items())), with_moments,
                cell_ns)
    key = (str(path), stat.st_size, stat.st_mtime_ns, settings)
    if key in _CACHE:  # only complete files are cached; same size and time: unchanged
        return _CACHE[key]
    table, complete = _read_archive(path)
    recipes = recipes_from_metadata(metadata_of(table.schema)) or fallback_recipes
    table = table.select([c for c in _ARCHIVE_COLUMNS if c in table.schema.names])
    options = _GridOptions(weighted, bins, with_moments, cell_ns)
    reduction = _FileReduction({}, {}, {}, with_moments)
    for batch in table.to_batches(max_chunksize=1 << 20):
        if batch.num_rows:
            _reduce_batch(batch, recipes, options, reduction)
    if complete:
        for stale in [k for k in _CACHE if k[0] == key[0]]:
            del _CACHE[stale]
        _CACHE[key] = reduction
    return reduction


def _read_archive(path: Path) -> tuple[pa.Table, bool]:
    """An archive file's rows, and whether the file is complete (closed, or Parquet)."""
    if path.suffix.lower() == ".parquet":
        return read_any(path), True
    table, info = read_arrow_file_report(path)
    return table, info.complete


def _numpy(batch: pa.RecordBatch, name: str) -> np.ndarray:
    return batch.column(name).to_numpy(zero_copy_only=False)


def _reduce_batch(batch: pa.RecordBatch, recipes: dict[str, list[str]],
                  options: _GridOptions, reduction: _FileReduction) -> None:
    """Add one record batch of archive rows to the grids of ``reduction``."""
    target_index, target_names = _dictionary_column(batch, "target")
    models = (_dictionary_column(batch, "model_id") if "model_id" in batch.schema.names
              else None)
    columns = {"tt": _numpy(batch, "site_tt_ns"),
               "phase": _numpy(batch, "phase").astype(np.float64),
               "weight": _numpy(batch, "weight").astype(np.float64),
               "flags": _numpy(batch, "recipe_flags"),
               "quality": _numpy(batch, "quality_flags")}
    columns["usable"] = (columns["quality"] & np.uint32(EXCLUDED_FROM_STATISTICS)) == 0
    for i, target in enumerate(target_names):
        rows = target_index == i
        count = int(rows.sum())
        if not count:
            continue
        reduction.rows_by_target[target] = reduction.rows_by_target.get(target, 0) + count
        reduction.quality.add(target, columns["quality"][rows])
        if models is not None:
            model_index, model_names = models
            reduction.model_ids.setdefault(target, set()).update(
                model_names[j] for j in np.unique(model_index[rows]))
        names = recipes.get(target) or _bit_names(columns["flags"][rows])
        for bit, recipe in enumerate(names):
            _add_recipe_rows(reduction, options, (target, recipe), columns,
                             rows & columns["usable"]
                             & (((columns["flags"] >> np.uint32(bit)) & 1) == 1))


def _bit_names(flags: np.ndarray) -> list[str]:
    """Names for recipes known only by their bits ("recipe 0", "recipe 1", ...)."""
    highest = int(np.max(flags)).bit_length() if flags.size else 0
    return [f"recipe {b}" for b in range(max(highest, 1))]


def _add_recipe_rows(reduction: _FileReduction, options: _GridOptions, key: tuple[str, str],
                     columns: dict[str, np.ndarray], chosen: np.ndarray) -> None:
    if not chosen.any():
        return
    weighted = options.weighted.get(key, False)
    grid = reduction.grids.setdefault(
        key, Grid(options.bins.get(key, DEFAULT_BINS), weighted, options.cell_ns,
                  moments={} if options.with_moments else None))
    _add_rows(grid, columns["tt"][chosen], columns["phase"][chosen],
              columns["weight"][chosen] if weighted else None)


def _add_rows(grid: Grid, tt: np.ndarray, phase: np.ndarray, weight: np.ndarray | None):
    w = np.ones(tt.size) if weight is None else weight
    cells = (tt - GRID_ORIGIN_NS) // grid.cell_ns
    lo = int(cells.min())
    span = int(cells.max()) - lo + 1
    phase_bin = np.minimum((np.remainder(phase, 1.0) * grid.bins).astype(np.int64),
                           grid.bins - 1)
    flat = (cells - lo) * grid.bins + phase_bin
    sums = np.bincount(flat, weights=w, minlength=span * grid.bins).reshape(span, grid.bins)
    squares = np.bincount(flat, weights=w * w,
                          minlength=span * grid.bins).reshape(span, grid.bins)
    for offset in np.flatnonzero(sums.any(axis=1) | (np.bincount(cells - lo) > 0)):
        cell = lo + int(offset)
        if cell in grid.hist:
            grid.hist[cell] += sums[offset]
            grid.hist_w2[cell] += squares[offset]
        else:
            grid.hist[cell] = sums[offset].copy()
            grid.hist_w2[cell] = squares[offset].copy()
    if grid.moments is not None:
        order = np.argsort(cells, kind="stable")
        sorted_cells = cells[order]
        starts = np.flatnonzero(np.r_[True, np.diff(sorted_cells) != 0])
        ends = np.r_[starts[1:], sorted_cells.size]
        for start, end in zip(starts, ends, strict=True):
            cell = int(sorted_cells[start])
            take = order[start:end]
            m = grid.moments.setdefault(cell, PhaseMoments(MAX_HARMONICS,
                                                                 grid.bins))
            m.update(phase[take], None if weight is None else weight[take])
    grid.rows += tt.size
    grid.sum_w += float(w.sum())
    first, last = int(tt.min()), int(tt.max())
    grid.first_ns = first if grid.first_ns is None else min(grid.first_ns, first)
    grid.last_ns = last if grid.last_ns is None else max(grid.last_ns, last)


@dataclass
class ArchiveSummary:
    grids: dict[tuple[str, str], Grid]
    rows_by_target: dict[str, int]
    model_ids: dict[str, set[str]]
    quality: QualityCounts = field(default_factory=QualityCounts)
    """Archive rows tagged with a quality problem, per target and flag."""


def _cell_ns(night: NightFolder) -> int:
    """Grid width for this folder: GRID_S, or a multiple of it for a long span."""
    first, last = None, None
    ledger = night.table("ledger")
    if ledger is not None:
        first, last = pc.min(ledger["first_tt_ns"]).as_py(), pc.max(ledger["last_tt_ns"]).as_py()
    if first is None or last is None:
        for path in night.archive_files:
            with contextlib.suppress(ArrowFileError, OSError, pa.ArrowException):
                bounds = pc.min_max(read_any(path)["site_tt_ns"]).as_py()
                if bounds["min"] is not None:
                    first = bounds["min"] if first is None else min(first, bounds["min"])
                    last = bounds["max"] if last is None else max(last, bounds["max"])
    step = GRID_S * NS_PER_S
    if first is None or last is None:
        return step
    return step * max(1, math.ceil((last - first) / (_MAX_CELLS * step)))


def reduce_archive(night: NightFolder, weighted, bins, with_moments, recipes):
    grids: dict[tuple[str, str], Grid] = {}
    rows: dict[str, int] = {}
    models: dict[str, set[str]] = {}
    quality = QualityCounts()
    cell_ns = _cell_ns(night)
    for path in night.archive_files:
        try:
            part = _reduce_file(path, weighted, bins, with_moments, recipes, cell_ns)
        except (ArrowFileError, OSError, pa.ArrowException) as exc:
            night.notes.append(f"{path.name} skipped: {exc}")
            continue
        for key, grid in part.grids.items():
            if key in grids:
                grids[key].merge(grid)
            else:
                fresh = Grid(grid.bins, grid.weighted, grid.cell_ns,
                             moments={} if grid.moments is not None else None)
                fresh.merge(grid)
                grids[key] = fresh
        for target, count in part.rows_by_target.items():
            rows[target] = rows.get(target, 0) + count
        for target, ids in part.model_ids.items():
            models.setdefault(target, set()).update(ids)
        for target, counts in part.quality.by_target.items():
            into = quality.by_target.setdefault(target, {})
            for name, n in counts.items():
                into[name] = into.get(name, 0) + n
    return ArchiveSummary(grids, rows, models, quality)


# --------------------------------------------------------------------------------------
# Time axis
# --------------------------------------------------------------------------------------


class UtcHours:
    """TT instants (ns) to UTC hours since the UTC midnight that starts the night."""

    def __init__(self, leaps, reference_tt_ns: int):
        self.leaps = leaps
        label = int(from_tt(np.array([reference_tt_ns], np.int64), Scale.UTC, leaps)[0][0])
        half = NS_PER_DAY // 2
        self.midnight_ns = ((label + half) // NS_PER_DAY) * NS_PER_DAY - half
        self.date = format_instant(self.midnight_ns, 0)[:10]
        self.per_unit = 1.0  # plotted value = hours / per_unit (24 for days)

    def use_days_beyond(self, span_ns: int, limit_hours: float = 72.0) -> None:
        """Plot in days when the data span more than ``limit_hours``."""
        self.per_unit = 24.0 if span_ns > limit_hours * 3600 * NS_PER_S else 1.0

    def plot(self, hours) -> np.ndarray:
        return np.asarray(hours, float) / self.per_unit

    def __call__(self, tt_ns) -> np.ndarray:
        tt = np.atleast_1d(np.asarray(tt_ns, dtype=np.int64))
        labels = from_tt(tt, Scale.UTC, self.leaps)[0]
        return (labels - self.midnight_ns) / (3600 * NS_PER_S)

    @property
    def axis_label(self) -> str:
        unit = "days" if self.per_unit == 24.0 else "hours"
        return f"UTC ({unit} since {self.date} 00:00)"

    def text(self, tt_ns: int) -> str:
        label = int(from_tt(np.array([tt_ns], np.int64), Scale.UTC, self.leaps)[0][0])
        return format_instant(label, 0).replace("T", " ") + " UTC"


def first_data_ns(night: NightFolder, archive: ArchiveSummary) -> int | None:
    candidates = [g.first_ns for g in archive.grids.values() if g.first_ns is not None]
    ledger = night.table("ledger")
    if ledger is not None:
        value = pc.min(ledger["first_tt_ns"]).as_py()
        if value is not None:
            candidates.append(int(value))
    significance = night.table("significance")
    if significance is not None:
        times = significance["data_until_tt_ns"].to_numpy()
        times = times[times > 0]
        if times.size:
            candidates.append(int(times.min()))
    clock = night.table("clock")
    if clock is not None and not candidates:  # chunk starts round down to whole intervals
        for starts in clock["chunk_start_tt_ns"].to_pylist():
            if starts:
                candidates.append(int(min(starts)))
    return min(candidates) if candidates else None


def last_data_ns(night: NightFolder, archive: ArchiveSummary) -> int | None:
    ends = [g.last_ns for g in archive.grids.values() if g.last_ns is not None]
    ledger = night.table("ledger")
    if ledger is not None and pc.max(ledger["last_tt_ns"]).as_py() is not None:
        ends.append(int(pc.max(ledger["last_tt_ns"]).as_py()))
    return max(ends) if ends else None
