"""``phasetag report``: a night report as one self-contained HTML page and PNG figures.

Theory of operation
-------------------
The report reads an output folder, never the service: the Arrow streams
(``archive``, ``significance``, ``profiles``, ``clock``, ``ledger``, ``rejects``,
read with ``io.sinks`` so that open files of a live folder count up to their
last complete batch), ``status.json`` when present, and the provenance in the
files' schema metadata. A folder written by ``phasetag tag`` holds one file of
archive schema under any name (and perhaps its rejects); the report then builds
what the archive alone allows (profile and significance from the tagged phases)
and says what is missing.

The archive is the only large input. It is read file by file, memory-mapped,
and reduced to a fine time grid (``GRID_S`` cells, wider when the data span more
than ``_MAX_CELLS`` of them, as an offline file may): per (target, recipe) the
weighted phase histogram of every cell, and, only when no significance stream
exists, the trigonometric moments of every cell. Complete files are reduced
once per process and cached, so ``--every`` does not rescan a finished hour.

Per target the report draws the pulse profile (two cycles), the phaseogram,
significance against time and the clock-chain check; then the accounting of
every event and the provenance. ``report-data.json`` beside the page holds the
numbers behind every figure, so that tests (and people) can check a figure
against the Arrow files without reading pixels.

matplotlib is an optional extra (``pip install 'phasetag[report]'``); it is
imported only when a report is built, with the Agg renderer (no display).
"""

from __future__ import annotations

import base64
import contextlib
import datetime as dt
import html
import io
import json
import logging
import math
import os
import sys
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from . import __version__
from .core import stats
from .core.flags import Quality
from .core.timebase import NS_PER_DAY, NS_PER_S, Scale, format_instant, from_tt
from .io import schemas, sinks

__all__ = [
    "OKABE_ITO",
    "GRID_S",
    "ReportError",
    "NightFolder",
    "load_night",
    "build_report",
    "report_main",
]

log = logging.getLogger(__name__)

OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}
"""The qualitative colour-blind-safe palette of Okabe & Ito (2008), used throughout."""

_SERIES = [OKABE_ITO[k] for k in ("blue", "orange", "bluish_green", "reddish_purple",
                                  "sky_blue", "vermillion", "black")]
_STATUS_COLOUR = {"OK": OKABE_ITO["bluish_green"], "WARN": OKABE_ITO["orange"],
                  "FAIL": OKABE_ITO["vermillion"]}
GRID_S = 10
"""Finest width of the archive's time grid, seconds (phaseogram rows are whole cells)."""
_MAX_CELLS = 5000
"""The grid widens (in whole multiples of GRID_S) to keep at most this many cells."""
_GRID_ORIGIN_NS = 69_184_000_000
"""Cells start at TT instants this far from the epoch: TT - UTC since 2017, so that the
grid falls on whole UTC 10-s marks (any constant would do; only looks change)."""
_MAX_PHASEOGRAM_ROWS = 64
_DPI = 100
_RC = {"font.size": 11, "axes.titlesize": 12, "axes.labelsize": 11, "xtick.labelsize": 10,
       "ytick.labelsize": 10, "legend.fontsize": 10, "figure.titlesize": 12,
       "axes.spines.top": False, "axes.spines.right": False}
_ARCHIVE_COLUMNS = ("target", "site_tt_ns", "phase", "weight", "recipe_flags",
                    "quality_flags", "model_id")


class ReportError(RuntimeError):
    """The report cannot be built (missing optional dependency, no outputs)."""


def _matplotlib():
    """Import matplotlib with the Agg renderer, or say how to install it."""
    try:
        import matplotlib
    except ImportError:
        raise ReportError("the report needs matplotlib, an optional extra: "
                          "pip install 'phasetag[report]' (or pip install matplotlib)") from None
    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    return matplotlib, Figure


# --------------------------------------------------------------------------------------
# Reading the folder
# --------------------------------------------------------------------------------------


@dataclass
class NightFolder:
    """Everything read from one output folder (archive reduced separately)."""

    folder: Path
    mode: str  # "service" (stream files) or "tagging" (one archive-schema file)
    archive_files: list[Path]
    metadata: dict[str, str]
    tables: dict[str, pa.Table | None]  # stem -> rows, None when the stream is absent
    status: dict | None
    files: dict[str, dict[str, int]]  # stem -> files, rows, partial
    notes: list[str] = field(default_factory=list)

    def table(self, stem: str) -> pa.Table | None:
        table = self.tables.get(stem)
        return table if table is not None and table.num_rows else None


def _metadata_of(schema: pa.Schema) -> dict[str, str]:
    return {k.decode(errors="replace"): v.decode(errors="replace")
            for k, v in (schema.metadata or {}).items()}


def _read_any(path: Path) -> pa.Table:
    if path.suffix.lower() == ".parquet":
        import pyarrow.parquet as pq

        return pq.read_table(path)
    return sinks.read_arrow_file(path)


def _is_schema(table: pa.Table, schema: pa.Schema) -> bool:
    return set(schema.names) <= set(table.schema.names)


def load_night(output_dir: Path) -> NightFolder:
    """Read the small streams, ``status.json`` and provenance of an output folder.

    Parameters
    ----------
    output_dir : Path
        A service output folder (live or finished) or a folder holding the output
        of ``phasetag tag`` (an archive-schema ``.arrow``/``.parquet`` file).

    Returns
    -------
    NightFolder

    Raises
    ------
    FileNotFoundError
        The folder does not exist.
    ReportError
        The folder holds no phasetag output at all.
    """
    folder = Path(output_dir)
    if not folder.is_dir():
        raise FileNotFoundError(f"{folder}: no such output folder")
    tables: dict[str, pa.Table | None] = {}
    files: dict[str, dict[str, int]] = {}
    metadata: dict[str, str] = {}
    notes: list[str] = []
    newest: dict[str, dict[str, str]] = {}  # stem -> metadata of its newest file
    for stem in schemas.OUTPUTS:
        paths = sinks.stream_files(folder, stem)
        if not paths:
            tables[stem] = None
            continue
        partial = 0
        rows = 0
        pieces = []
        for path in paths:
            try:
                table, info = sinks.read_arrow_file_report(path)
            except (sinks.ArrowFileError, OSError) as exc:  # OSError: rotated away meanwhile
                notes.append(f"{path.name} skipped: {exc}")
                continue
            partial += not info.complete
            rows += table.num_rows
            if stem != "archive":
                pieces.append(table)
            newest[stem] = _metadata_of(table.schema)
        files[stem] = {"files": len(paths), "rows": rows, "partial": partial}
        if stem == "archive":
            tables[stem] = None
        else:
            tables[stem] = pa.concat_tables(pieces, promote_options="permissive") \
                if pieces else schemas.OUTPUTS[stem].empty_table()
    for stem in reversed(schemas.OUTPUTS):  # the archive's provenance wins
        metadata.update(newest.get(stem, {}))
    archive_files = sinks.stream_files(folder, "archive")
    mode = "service"
    if not archive_files and not any(files.get(s) for s in schemas.OUTPUTS):
        archive_files, extra_rejects = [], []
        for path in sorted([*folder.glob("*.arrow"), *folder.glob("*.parquet")]):
            if path.name.startswith("."):
                continue
            try:
                table = _read_any(path)
            except (sinks.ArrowFileError, OSError, pa.ArrowException) as exc:
                notes.append(f"{path.name} skipped: {exc}")
                continue
            if _is_schema(table, schemas.ARCHIVE):
                archive_files.append(path)
                metadata = metadata or _metadata_of(table.schema)
                entry = files.setdefault("archive", {"files": 0, "rows": 0, "partial": 0})
                entry["files"] += 1
                entry["rows"] += table.num_rows
            elif _is_schema(table, schemas.REJECTS):
                extra_rejects.append(table.select(schemas.REJECTS.names))
        if not archive_files:
            raise ReportError(f"{folder}: no phasetag output here (no stream files and no "
                              "file of archive schema)")
        mode = "tagging"
        if extra_rejects:
            tables["rejects"] = pa.concat_tables(extra_rejects, promote_options="permissive")
            files["rejects"] = {"files": len(extra_rejects),
                                "rows": tables["rejects"].num_rows, "partial": 0}
    status = None
    status_path = folder / "status.json"
    if status_path.exists():
        try:
            status = json.loads(status_path.read_text(encoding="utf-8"))
            if not isinstance(status, dict):
                raise ValueError("not a JSON object")
        except (OSError, ValueError) as exc:
            notes.append(f"status.json unreadable: {exc}")
            status = None
    night = NightFolder(folder, mode, archive_files, metadata, tables, status, files, notes)
    _note_missing(night)
    return night


def _note_missing(night: NightFolder) -> None:
    if night.mode == "tagging":
        night.notes.append(
            "Offline tagging output (one archive-schema file): the profile, phaseogram and "
            "significance curve are computed here from the archive rows (cumulative only, "
            "unweighted unless the recipe says otherwise); there are no sliding windows, "
            "no template fit, no clock-chain check and no ledger of received messages.")
        return
    missing = {"archive": "no phaseogram (and no profile if the profiles stream is missing)",
               "significance": "significance curve computed from the archive (cumulative only)",
               "profiles": "profile computed from the archive phases (no template fit)",
               "clock": "no clock-chain check",
               "ledger": "accounting without the per-message ledger",
               "rejects": "no list of rejected events by reason"}
    for stem, consequence in missing.items():
        if night.tables.get(stem) is None and stem != "archive" or \
                stem == "archive" and not night.archive_files:
            night.notes.append(f"No {stem} stream in the folder: {consequence}.")
    partial = [f"{stem} ({entry['partial']})" for stem, entry in night.files.items()
               if entry.get("partial")]
    if partial:
        night.notes.append("Open or cut-short files read up to their last complete batch: "
                           + ", ".join(partial) + ".")


def _json(text: str | None) -> Any:
    if not text:
        return None
    try:
        return json.loads(text)
    except ValueError:
        return None


def _recipes_from_metadata(meta: dict[str, str]) -> dict[str, list[str]]:
    """Recipe names in bit order per target, from one file's metadata."""
    by_target = _json(meta.get("recipes_by_target"))
    if isinstance(by_target, dict):
        return {str(k): [str(r) for r in (v.split(",") if isinstance(v, str) else v)]
                for k, v in by_target.items()}
    recipes = meta.get("recipes")
    parsed = _json(recipes)
    if isinstance(parsed, dict):
        return {str(k): [str(r) for r in (v.split(",") if isinstance(v, str) else v)]
                for k, v in parsed.items()}
    if recipes and meta.get("target"):
        return {meta["target"]: [r for r in recipes.split(",") if r]}
    config = _json(meta.get("config"))
    if isinstance(config, dict) and isinstance(config.get("targets"), list):
        return {str(t.get("name")): [str(r.get("name")) for r in t.get("recipes") or
                                     [{"name": "all"}]]
                for t in config["targets"] if isinstance(t, dict)}
    return {}


def _config_targets(meta: dict[str, str]) -> dict[str, dict]:
    config = _json(meta.get("config"))
    if isinstance(config, dict) and isinstance(config.get("targets"), list):
        return {str(t.get("name")): t for t in config["targets"] if isinstance(t, dict)}
    return {}


# --------------------------------------------------------------------------------------
# The archive reduced to a time grid
# --------------------------------------------------------------------------------------


@dataclass
class _Grid:
    """Per (target, recipe): phase histograms per time cell, optionally moments."""

    bins: int
    weighted: bool
    cell_ns: int
    hist: dict[int, np.ndarray] = field(default_factory=dict)  # cell -> sum w per bin
    hist_w2: dict[int, np.ndarray] = field(default_factory=dict)
    moments: dict[int, stats.PhaseMoments] | None = None
    rows: int = 0
    sum_w: float = 0.0
    first_ns: int | None = None
    last_ns: int | None = None

    def merge(self, other: _Grid) -> None:
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
    grids: dict[tuple[str, str], _Grid]
    rows_by_target: dict[str, int]
    model_ids: dict[str, set[str]]
    with_moments: bool


_CACHE: dict[tuple[str, int, int, tuple], _FileReduction] = {}


def _dictionary_column(batch: pa.RecordBatch, name: str) -> tuple[np.ndarray, list[str]]:
    column = batch.column(name)
    if not pa.types.is_dictionary(column.type):
        column = pc.dictionary_encode(column)
    return (column.indices.to_numpy(zero_copy_only=False).astype(np.int64),
            [str(v) for v in column.dictionary.to_pylist()])


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
    complete = path.suffix.lower() == ".parquet"
    if not complete:
        table, info = sinks.read_arrow_file_report(path)
        complete = info.complete
    else:
        table = _read_any(path)
    meta = _metadata_of(table.schema)
    recipes = _recipes_from_metadata(meta) or fallback_recipes
    present = [c for c in _ARCHIVE_COLUMNS if c in table.schema.names]
    table = table.select(present)
    reduction = _FileReduction({}, {}, {}, with_moments)
    for batch in table.to_batches(max_chunksize=1 << 20):
        if batch.num_rows == 0:
            continue
        target_index, target_names = _dictionary_column(batch, "target")
        tt = batch.column("site_tt_ns").to_numpy(zero_copy_only=False)
        phase = batch.column("phase").to_numpy(zero_copy_only=False).astype(np.float64)
        weight = batch.column("weight").to_numpy(zero_copy_only=False).astype(np.float64)
        flags = batch.column("recipe_flags").to_numpy(zero_copy_only=False)
        usable = (batch.column("quality_flags").to_numpy(zero_copy_only=False)
                  & np.uint32(Quality.OUTSIDE_MODEL_VALIDITY)) == 0
        if "model_id" in present:
            model_index, model_names = _dictionary_column(batch, "model_id")
        for i, target in enumerate(target_names):
            rows = target_index == i
            count = int(rows.sum())
            if not count:
                continue
            reduction.rows_by_target[target] = reduction.rows_by_target.get(target, 0) + count
            if "model_id" in present:
                used = np.unique(model_index[rows])
                reduction.model_ids.setdefault(target, set()).update(
                    model_names[j] for j in used)
            names = recipes.get(target)
            if not names:
                highest = int(np.max(flags[rows])).bit_length() if count else 0
                names = [f"recipe {b}" for b in range(max(highest, 1))]
            for bit, recipe in enumerate(names):
                chosen = rows & usable & (((flags >> np.uint32(bit)) & 1) == 1)
                if not chosen.any():
                    continue
                key2 = (target, recipe)
                is_weighted = weighted.get(key2, False)
                grid = reduction.grids.setdefault(
                    key2, _Grid(bins.get(key2, stats.DEFAULT_BINS), is_weighted, cell_ns,
                                moments={} if with_moments else None))
                _add_rows(grid, tt[chosen], phase[chosen],
                          weight[chosen] if is_weighted else None)
    if complete:
        for stale in [k for k in _CACHE if k[0] == key[0]]:
            del _CACHE[stale]
        _CACHE[key] = reduction
    return reduction


def _add_rows(grid: _Grid, tt: np.ndarray, phase: np.ndarray, weight: np.ndarray | None):
    w = np.ones(tt.size) if weight is None else weight
    cells = (tt - _GRID_ORIGIN_NS) // grid.cell_ns
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
            m = grid.moments.setdefault(cell, stats.PhaseMoments(stats.MAX_HARMONICS,
                                                                 grid.bins))
            m.update(phase[take], None if weight is None else weight[take])
    grid.rows += tt.size
    grid.sum_w += float(w.sum())
    first, last = int(tt.min()), int(tt.max())
    grid.first_ns = first if grid.first_ns is None else min(grid.first_ns, first)
    grid.last_ns = last if grid.last_ns is None else max(grid.last_ns, last)


@dataclass
class _ArchiveSummary:
    grids: dict[tuple[str, str], _Grid]
    rows_by_target: dict[str, int]
    model_ids: dict[str, set[str]]


def _cell_ns(night: NightFolder) -> int:
    """Grid width for this folder: GRID_S, or a multiple of it for a long span."""
    first, last = None, None
    ledger = night.table("ledger")
    if ledger is not None:
        first, last = pc.min(ledger["first_tt_ns"]).as_py(), pc.max(ledger["last_tt_ns"]).as_py()
    if first is None or last is None:
        for path in night.archive_files:
            with contextlib.suppress(sinks.ArrowFileError, OSError, pa.ArrowException):
                bounds = pc.min_max(_read_any(path)["site_tt_ns"]).as_py()
                if bounds["min"] is not None:
                    first = bounds["min"] if first is None else min(first, bounds["min"])
                    last = bounds["max"] if last is None else max(last, bounds["max"])
    step = GRID_S * NS_PER_S
    if first is None or last is None:
        return step
    return step * max(1, math.ceil((last - first) / (_MAX_CELLS * step)))


def _reduce_archive(night: NightFolder, weighted, bins, with_moments, recipes):
    grids: dict[tuple[str, str], _Grid] = {}
    rows: dict[str, int] = {}
    models: dict[str, set[str]] = {}
    cell_ns = _cell_ns(night)
    for path in night.archive_files:
        try:
            part = _reduce_file(path, weighted, bins, with_moments, recipes, cell_ns)
        except (sinks.ArrowFileError, OSError, pa.ArrowException) as exc:
            night.notes.append(f"{path.name} skipped: {exc}")
            continue
        for key, grid in part.grids.items():
            if key in grids:
                grids[key].merge(grid)
            else:
                fresh = _Grid(grid.bins, grid.weighted, grid.cell_ns,
                              moments={} if grid.moments is not None else None)
                fresh.merge(grid)
                grids[key] = fresh
        for target, count in part.rows_by_target.items():
            rows[target] = rows.get(target, 0) + count
        for target, ids in part.model_ids.items():
            models.setdefault(target, set()).update(ids)
    return _ArchiveSummary(grids, rows, models)


# --------------------------------------------------------------------------------------
# Time axis
# --------------------------------------------------------------------------------------


class _UtcHours:
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


def _first_data_ns(night: NightFolder, archive: _ArchiveSummary) -> int | None:
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


def _last_data_ns(night: NightFolder, archive: _ArchiveSummary) -> int | None:
    ends = [g.last_ns for g in archive.grids.values() if g.last_ns is not None]
    ledger = night.table("ledger")
    if ledger is not None and pc.max(ledger["last_tt_ns"]).as_py() is not None:
        ends.append(int(pc.max(ledger["last_tt_ns"]).as_py()))
    return max(ends) if ends else None


# --------------------------------------------------------------------------------------
# Figure data
# --------------------------------------------------------------------------------------


def _finite(value) -> float | None:
    try:
        value = float(value)
    except (TypeError, ValueError):
        return None
    return value if math.isfinite(value) else None


def _clean(obj):
    """JSON-safe copy: numpy to Python, non-finite floats to None."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _clean(obj.tolist())
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return _finite(obj)
    return obj


def _last_rows(table: pa.Table | None, keys: tuple[str, ...]) -> dict[tuple, dict]:
    """The last row (in file order) for each combination of ``keys``."""
    if table is None:
        return {}
    out: dict[tuple, dict] = {}
    for row in table.to_pylist():
        out[tuple(row[k] for k in keys)] = row
    return out


def _fourier_curve(cos_moments, sin_moments, harmonics: int, sum_w: float, bins: int,
                   phases: np.ndarray) -> np.ndarray:
    """Counts per bin of the harmonic estimate f(φ) = 1 + 2Σ(α cos + β sin)."""
    f = np.ones_like(phases)
    for k in range(1, int(harmonics) + 1):
        if k > len(cos_moments):
            break
        f += 2 * (cos_moments[k - 1] * np.cos(2 * np.pi * k * phases)
                  + sin_moments[k - 1] * np.sin(2 * np.pi * k * phases))
    return sum_w / bins * f


def _profile_data(target, recipe, row: dict | None, grid: _Grid | None, template,
                  weighted: bool) -> dict | None:
    """Profile of one recipe: the last profiles row, or else the archive."""
    from .core import profile as profile_math

    if row is not None and row.get("counts"):
        counts = np.asarray(row["counts"], float)
        data = {
            "source": "profiles stream (last row)", "events": row["events"],
            "sum_weights": row["sum_weights"], "counts": counts,
            "errors": np.asarray(row["errors"], float), "harmonics": row.get("harmonics") or 0,
            "cos_moments": row.get("cos_moments") or [], "sin_moments": row.get("sin_moments")
            or [], "background_per_bin": row.get("background_per_bin"),
            "pulsed_fraction": row.get("pulsed_fraction"), "peak_phase": row.get("peak_phase"),
            "template_shift_cycles": row.get("template_shift_cycles"),
            "template_shift_sigma_cycles": row.get("template_shift_sigma_cycles"),
            "template_shift_us": row.get("template_shift_us"),
            "template_amplitude": row.get("template_amplitude"),
            "data_until_tt_ns": row.get("data_until_tt_ns"), "weighted": weighted,
        }
    elif grid is not None and grid.moments:
        total = stats.PhaseMoments(stats.MAX_HARMONICS, grid.bins)
        for m in grid.moments.values():
            total += m
        if total.sum_w <= 0:
            return None
        summary = profile_math.summarize_profile(total)
        data = {
            "source": "archive rows", "events": total.count, "sum_weights": total.sum_w,
            "counts": total.hist_w.copy(), "errors": np.sqrt(total.hist_w2),
            "harmonics": summary.harmonics,
            "cos_moments": list(total.cos_sums / total.sum_w),
            "sin_moments": list(total.sin_sums / total.sum_w),
            "background_per_bin": summary.background_per_bin,
            "pulsed_fraction": summary.pulsed_fraction_min,
            "peak_phase": summary.peak_phase_cycles, "template_shift_cycles": None,
            "template_amplitude": None, "data_until_tt_ns": grid.last_ns, "weighted": weighted,
        }
    elif grid is not None and grid.hist:
        counts = np.sum(list(grid.hist.values()), axis=0)
        errors = np.sqrt(np.sum(list(grid.hist_w2.values()), axis=0))
        data = {"source": "archive rows (histogram only)", "events": grid.rows,
                "sum_weights": float(counts.sum()), "counts": counts, "errors": errors,
                "harmonics": 0, "cos_moments": [], "sin_moments": [],
                "background_per_bin": None, "template_shift_cycles": None,
                "template_amplitude": None, "data_until_tt_ns": grid.last_ns,
                "weighted": weighted}
    else:
        return None
    bins = len(data["counts"])
    fine = np.linspace(0.0, 2.0, 801)
    data["bins"] = bins
    data["fine_phase"] = fine
    data["fourier"] = (_fourier_curve(data["cos_moments"], data["sin_moments"],
                                      data["harmonics"], data["sum_weights"], bins, fine)
                       if data["harmonics"] else None)
    data["template_curve"] = None
    data["template_note"] = None
    shift, amplitude = _finite(data.get("template_shift_cycles")), \
        _finite(data.get("template_amplitude"))
    if template is not None and shift is not None and amplitude is not None:
        pulsed = np.asarray(template.pulsed_density(fine - shift), float)
        level = (data["sum_weights"] - amplitude) / bins
        data["template_curve"] = level + amplitude * pulsed / bins
        data["template_note"] = (
            f"template '{template.name}' at its fitted offset {shift:+.4f} cycles, pulsed "
            f"shape scaled to the fitted pulsed amplitude b = {amplitude:.1f} (weighted "
            f"counts) on top of the flat level (sum of weights - b)/bins")
    return data


def _significance_data(target, recipe, table: pa.Table | None, grid: _Grid | None,
                       trials: int, hours: _UtcHours | None, start_ns: int | None):
    """Per window: time (TT ns, UTC hours), h_sigma, post-trials σ, and a √t fit."""
    windows: dict[str, dict] = {}
    if table is not None:
        mask = pc.and_(pc.equal(pc.cast(table["target"], pa.string()), target),
                       pc.equal(pc.cast(table["recipe"], pa.string()), recipe))
        rows = table.filter(mask)
        rows = rows.filter(pc.greater(rows["data_until_tt_ns"], 0))
        if rows.num_rows:
            labels = [str(w) for w in rows["window"].to_pylist()]
            for label in dict.fromkeys(labels):
                keep = np.array([w == label for w in labels])
                until = rows["data_until_tt_ns"].to_numpy()[keep]
                windows[label] = {
                    "data_until_tt_ns": until,
                    "h_sigma": rows["h_sigma"].to_numpy()[keep],
                    "h_sigma_post_trials": rows["h_sigma_post_trials"].to_numpy()[keep],
                    "events": rows["events"].to_numpy()[keep],
                    "trials": int(rows["trials"].to_numpy()[keep][-1]),
                }
            source = "significance stream"
    if not windows and grid is not None and grid.moments:
        cells = sorted(grid.moments)
        first = cells[0]
        total = stats.PhaseMoments(stats.MAX_HARMONICS, grid.bins)
        until, sigma, post, events = [], [], [], []
        step = max(1, math.ceil((cells[-1] - first + 1) / 120))
        for index, cell in enumerate(cells):
            total += grid.moments[cell]
            last_in_step = index == len(cells) - 1 or (cells[index + 1] - first) // step \
                != (cell - first) // step
            if not last_in_step:
                continue
            h = stats.h_test(total)
            log_p = min(h.log_p, 0.0)
            until.append(min((cell + 1) * grid.cell_ns + _GRID_ORIGIN_NS - 1, grid.last_ns))
            sigma.append(stats.sigma_from_log_p(log_p))
            post.append(stats.sigma_from_log_p(stats.trials_log_p(log_p, max(trials, 1))))
            events.append(total.count)
        windows["cumulative"] = {"data_until_tt_ns": np.array(until, np.int64),
                                 "h_sigma": np.array(sigma), "h_sigma_post_trials":
                                 np.array(post), "events": np.array(events),
                                 "trials": trials}
        source = "computed from the archive rows"
    if not windows:
        return None
    for series in windows.values():
        series["utc_hours"] = hours(series["data_until_tt_ns"]) if hours else None
        for name in ("h_sigma", "h_sigma_post_trials"):
            values = np.asarray(series[name], float)
            series[name] = np.where(np.isfinite(values), values, np.nan)
    fit = None
    cumulative = windows.get("cumulative")
    if cumulative is not None and start_ns is not None:
        t = (cumulative["data_until_tt_ns"] - start_ns) / NS_PER_S
        y = cumulative["h_sigma"]
        ok = (t > 0) & np.isfinite(y) & (y > 0)
        if ok.sum() >= 2:
            scale = float(np.sum(y[ok] * np.sqrt(t[ok])) / np.sum(t[ok]))
            fit = {"start_tt_ns": start_ns, "sigma_per_sqrt_s": scale}
    return {"source": source, "windows": windows, "sqrt_t_fit": fit}


def _clock_data(row: dict | None, hours: _UtcHours | None) -> dict | None:
    if row is None:
        return None
    verdict = _json(row.get("verdict_json")) or {}
    frequency = _finite(verdict.get("frequency_hz"))
    tolerance_cycles = _finite(row.get("tolerance_cycles"))
    to_us = (1e6 / frequency) if frequency else None
    start = np.asarray(row.get("chunk_start_tt_ns") or [], np.int64)
    end = np.asarray(row.get("chunk_end_tt_ns") or [], np.int64)
    shift = np.asarray([np.nan if v is None else v for v in
                        row.get("chunk_shift_cycles") or []], float)
    sigma = np.asarray([np.nan if v is None else v for v in
                        row.get("chunk_sigma_cycles") or []], float)
    detected = np.asarray(row.get("chunk_detected") or [], bool)
    mid = start + (end - start) // 2
    tolerance_us = _finite(verdict.get("tolerance_us"))
    if tolerance_us is None and tolerance_cycles is not None and to_us:
        tolerance_us = tolerance_cycles * to_us
    return {
        "target": row.get("target"), "recipe": row.get("recipe"),
        "status": str(row.get("status")), "kind": str(row.get("kind")),
        "summary": row.get("summary") or "", "frequency_hz": frequency,
        "tolerance_cycles": tolerance_cycles, "tolerance_us": tolerance_us,
        "chunk_mid_tt_ns": mid, "utc_hours": hours(mid) if hours and mid.size else
        np.zeros(0), "chunk_start_tt_ns": start, "chunk_end_tt_ns": end,
        "offset_us": shift * to_us if to_us else shift * np.nan,
        "sigma_us": sigma * to_us if to_us else sigma * np.nan, "detected": detected,
        "fitted_offset_us": _finite(verdict.get("offset_us")),
        "step_time_ns": verdict.get("step_time_ns"),
        "computed_at_utc_ns": row.get("computed_at_utc_ns"),
    }


def _phaseogram_data(grid: _Grid | None, hours: _UtcHours | None) -> dict | None:
    if grid is None or not grid.hist or hours is None:
        return None
    cells = sorted(grid.hist)
    first, last = cells[0], cells[-1]
    span = last - first + 1
    group = max(1, math.ceil(span / _MAX_PHASEOGRAM_ROWS))
    rows = math.ceil(span / group)
    image = np.zeros((rows, grid.bins))
    for cell in cells:
        image[(cell - first) // group] += grid.hist[cell]
    edges_ns = (first + np.arange(rows + 1) * group) * grid.cell_ns + _GRID_ORIGIN_NS
    return {"counts": image, "time_edges_tt_ns": edges_ns, "time_edges_utc_hours":
            hours(edges_ns), "bins": grid.bins, "total": float(image.sum()),
            "rows": grid.rows, "weighted": grid.weighted,
            "row_seconds": group * grid.cell_ns // NS_PER_S}


# --------------------------------------------------------------------------------------
# Figures
# --------------------------------------------------------------------------------------


def _png(fig) -> bytes:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    buffer = io.BytesIO()
    FigureCanvasAgg(fig).print_png(buffer)  # at the figure's dpi (_DPI)
    return buffer.getvalue()


def _units(weighted: bool) -> str:
    return "weighted counts per bin" if weighted else "events per bin"


def _frame(fig, width_in: float, height_in: float, *, left=0.85, right=0.3, top=0.45,
           bottom=0.65, hgap=None, wgap=None) -> None:
    """Margins in inches (no layout engine: drawing twice for layout costs time)."""
    fig.subplots_adjust(left=left / width_in, right=1 - right / width_in,
                        top=1 - top / height_in, bottom=bottom / height_in,
                        hspace=hgap, wspace=wgap)


def _profile_figure(Figure, target: str, profiles: dict[str, dict]):
    recipes = list(profiles)
    panel, gap = 2.9, 1.0
    width, height = 11.0, len(recipes) * panel + (len(recipes) - 1) * gap + 1.1
    fig = Figure(figsize=(width, height), dpi=_DPI)
    axes = fig.subplots(len(recipes), 1, squeeze=False)[:, 0]
    _frame(fig, width, height, right=3.3, hgap=gap / panel)
    for ax, recipe in zip(axes, recipes, strict=True):
        d = profiles[recipe]
        bins = d["bins"]
        centres = (np.arange(2 * bins) + 0.5) / bins
        counts = np.tile(d["counts"], 2)
        errors = np.tile(d["errors"], 2)
        ax.stairs(counts, np.arange(2 * bins + 1) / bins, baseline=None, color=_SERIES[0],
                  linewidth=1.3, label=f"data, {d['source']}")
        ax.errorbar(centres, counts, yerr=errors, fmt="none", ecolor=_SERIES[0],
                    elinewidth=1, capsize=0, label="±1σ per bin")
        if d["fourier"] is not None:
            ax.plot(d["fine_phase"], d["fourier"], color=_SERIES[1], linewidth=1.6,
                    label=f"harmonic estimate\n({d['harmonics']} harmonics)")
        if d.get("background_per_bin") is not None:
            ax.axhline(d["background_per_bin"], color=OKABE_ITO["black"], linestyle=":",
                       linewidth=1.3, label="background level")
        if d["template_curve"] is not None:
            ax.plot(d["fine_phase"], d["template_curve"], color=_SERIES[2], linewidth=1.4,
                    linestyle="--", label=f"template at fitted offset\n"
                    f"({d['template_shift_cycles']:+.4f} cycles)")
        ax.set_xlim(0, 2)
        ax.set_xlabel("rotational phase (cycles; two cycles shown)")
        ax.set_ylabel(_units(d["weighted"]))
        weighting = "weighted" if d["weighted"] else "unweighted"
        ax.set_title(f"{target} / {recipe}: pulse profile ({weighting}, {d['events']:,} "
                     f"events, sum of weights {d['sum_weights']:,.1f})")
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
        ax.grid(alpha=0.25)
    return fig


def _phaseogram_figure(Figure, target: str, grams: dict[str, dict], hours: _UtcHours):
    recipes = list(grams)
    width, height = 5.5 * len(recipes) + 0.5, 5.2
    fig = Figure(figsize=(width, height), dpi=_DPI)
    axes = fig.subplots(1, len(recipes), squeeze=False)[0]
    _frame(fig, width, height, left=0.95, right=0.95, wgap=0.42)
    for ax, recipe in zip(axes, recipes, strict=True):
        d = grams[recipe]
        image = np.tile(d["counts"], (1, 2))
        phase_edges = np.arange(2 * d["bins"] + 1) / d["bins"]
        mesh = ax.pcolormesh(phase_edges, hours.plot(d["time_edges_utc_hours"]), image,
                             cmap="viridis",
                             shading="flat")
        bar = fig.colorbar(mesh, ax=ax, fraction=0.08, pad=0.03)
        bar.set_label(f"{_units(d['weighted'])} per {d['row_seconds']} s")
        ax.set_xlabel("rotational phase (cycles)")
        ax.set_ylabel(hours.axis_label)
        ax.set_title(f"{target} / {recipe}: phaseogram")
    return fig


def _significance_figure(Figure, target: str, curves: dict[str, dict], hours: _UtcHours):
    recipes = list(curves)
    panel, gap = 3.2, 0.6
    width, height = 11.0, len(recipes) * panel + (len(recipes) - 1) * gap + 1.1
    fig = Figure(figsize=(width, height), dpi=_DPI)
    axes = fig.subplots(len(recipes), 1, squeeze=False, sharex=True)[:, 0]
    _frame(fig, width, height, right=0.55, hgap=gap / panel)
    for ax, recipe in zip(axes, recipes, strict=True):
        d = curves[recipe]
        top = 7.0
        for index, (label, series) in enumerate(d["windows"].items()):
            colour = _SERIES[index % len(_SERIES)]
            x, y = hours.plot(series["utc_hours"]), series["h_sigma"]
            ax.plot(x, y, color=colour, linewidth=1.6, marker="o", markersize=3,
                    label=f"{label}" + (" (H-test)" if index == 0 else ""))
            if np.isfinite(y).any():
                top = max(top, float(np.nanmax(y)) * 1.15)
            if label == "cumulative":
                post = series["h_sigma_post_trials"]
                trials = series["trials"]
                ax.plot(x, post, color=colour, linewidth=1.2, linestyle=":",
                        label=f"cumulative after {trials} trial{'s' if trials != 1 else ''}")
                if np.isfinite(y[-1]):
                    ax.annotate(f"{y[-1]:.1f}σ ({post[-1]:.1f}σ after trials)",
                                xy=(x[-1], y[-1]), xytext=(-8, 8), textcoords="offset points",
                                ha="right", fontsize=10, color=colour)
                fit = d.get("sqrt_t_fit")
                if fit is not None:
                    t_ns = np.linspace(fit["start_tt_ns"], series["data_until_tt_ns"][-1], 200)
                    seconds = (t_ns - fit["start_tt_ns"]) / NS_PER_S
                    ax.plot(hours.plot(hours(t_ns.astype(np.int64))),
                            fit["sigma_per_sqrt_s"] * np.sqrt(seconds),
                            color=OKABE_ITO["reddish_purple"], linestyle="--", linewidth=1.2,
                            label=f"√t reference ({fit['sigma_per_sqrt_s'] * 60:.3g} σ/√h)")
        labelled = (3, 4, 5) if top <= 25 else (3, 5) if top <= 50 else (5,)
        for level in (3, 4, 5):
            ax.axhline(level, color="#777777", linewidth=0.9, linestyle=(0, (4, 3)))
            if level in labelled:
                ax.annotate(f"{level}σ", xy=(1.0, level), xycoords=("axes fraction", "data"),
                            xytext=(3, 0), textcoords="offset points", va="center",
                            fontsize=10, color="#555555")
        ax.set_ylim(bottom=min(0.0, ax.get_ylim()[0]), top=top)
        ax.set_ylabel("significance (σ, one-sided)")
        ax.set_title(f"{target} / {recipe}: significance against time ({d['source']})")
        ax.legend(loc="best", frameon=True, framealpha=0.9, edgecolor="none", ncol=2)
        ax.grid(alpha=0.25)
    axes[-1].set_xlabel(hours.axis_label)
    return fig


def _clock_figure(Figure, target: str, d: dict, hours: _UtcHours):
    import textwrap

    lines = []
    for line in d["summary"].splitlines()[:8]:
        lines.extend(textwrap.wrap(line, 118) or [""])
    lines = lines[:12]
    plot, text = 4.0, 0.2 * len(lines) + 0.25
    width, height = 11.0, plot + text + 1.1
    fig = Figure(figsize=(width, height), dpi=_DPI)
    ax = fig.subplots()
    _frame(fig, width, height, bottom=0.65 + text)
    x, y, e = hours.plot(d["utc_hours"]), d["offset_us"], d["sigma_us"]
    detected = d["detected"]
    if d["tolerance_us"] is not None:
        ax.axhspan(-d["tolerance_us"], d["tolerance_us"], color=OKABE_ITO["sky_blue"],
                   alpha=0.22, label=f"tolerance ±{d['tolerance_us']:.1f} µs")
    ax.axhline(0.0, color="#777777", linewidth=0.8)
    e_plot = np.where(np.isfinite(e), e, np.nan)
    if detected.size and detected.any():
        ax.errorbar(x[detected], y[detected], yerr=e_plot[detected], fmt="o", markersize=4,
                    color=_SERIES[0], elinewidth=1.2, label="chunk offset (pulse detected)")
    if detected.size and (~detected).any():
        ax.errorbar(x[~detected], y[~detected], yerr=e_plot[~detected], fmt="o",
                    markersize=4, markerfacecolor="white", color="#888888",
                    label="chunk offset (not detected)")
    if d["fitted_offset_us"] is not None:
        ax.axhline(d["fitted_offset_us"], color=OKABE_ITO["vermillion"], linestyle="--",
                   linewidth=1.2, label=f"fitted offset {d['fitted_offset_us']:+.1f} µs")
    ax.set_xlabel(hours.axis_label)
    ax.set_ylabel("offset from template (µs)")
    colour = _STATUS_COLOUR.get(d["status"], OKABE_ITO["black"])
    ax.set_title(f"{target} / {d['recipe']}: clock-chain check — {d['status']} "
                 f"({d['kind']})", color=colour)
    ax.legend(loc="upper right", frameon=True, framealpha=0.85, ncol=2)
    ax.grid(alpha=0.25)
    fig.text(0.85 / width, (text + 0.05) / height, "\n".join(lines), va="top", ha="left",
             fontsize=10, family="monospace")
    return fig


# --------------------------------------------------------------------------------------
# Accounting and provenance
# --------------------------------------------------------------------------------------


_LEDGER_COLUMNS = ("events", "tagged", "filtered", "rejected", "missing_before")


def _accounting(night: NightFolder, archive: _ArchiveSummary) -> dict:
    sources: dict[str, dict[str, int]] = {}
    ledger = night.table("ledger")
    refused: dict[str, int] = {}
    if ledger is not None:
        names = ["(header unreadable)" if s is None else str(s)
                 for s in ledger["source"].to_pylist()]
        outcomes = ([str(o) for o in ledger["outcome"].to_pylist()]
                    if "outcome" in ledger.schema.names else ["accepted"] * ledger.num_rows)
        values = {c: ledger[c].fill_null(0).to_numpy() for c in _LEDGER_COLUMNS}
        for index, name in enumerate(names):
            entry = sources.setdefault(name, {"messages": 0, "refused_messages": 0,
                                              **dict.fromkeys(_LEDGER_COLUMNS, 0)})
            entry["messages"] += 1
            if outcomes[index] != "accepted":
                entry["refused_messages"] += 1
                refused[outcomes[index]] = refused.get(outcomes[index], 0) + 1
            for c in _LEDGER_COLUMNS:
                entry[c] += int(values[c][index])
    total = {"messages": sum(s["messages"] for s in sources.values()),
             "refused_messages": sum(s["refused_messages"] for s in sources.values())}
    for c in _LEDGER_COLUMNS:
        total[c] = sum(s[c] for s in sources.values())
    reasons: dict[str, dict[str, int]] = {}
    event_rejects = 0
    message_rejects = 0
    rejects = night.table("rejects")
    if rejects is not None:
        for row in rejects.select(["source", "reason", "event_id", "events"]).to_pylist():
            key = f"{row['source'] or '(unknown)'}\t{row['reason']}"
            entry = reasons.setdefault(key, {"rows": 0, "events": 0})
            entry["rows"] += 1
            entry["events"] += int(row["events"] or 0)
            if row["event_id"] is not None:
                event_rejects += int(row["events"] or 0)
            else:
                message_rejects += int(row["events"] or 0)
    by_reason = [{"source": k.split("\t")[0], "reason": k.split("\t")[1], **v}
                 for k, v in sorted(reasons.items())]
    checks = []
    running = (night.status or {}).get("state") == "running"
    if ledger is not None:
        parts = total["tagged"] + total["filtered"] + total["rejected"]
        checks.append({"name": "ledger: received = tagged + filtered + rejected",
                       "ok": total["events"] == parts,
                       "detail": f"{total['events']:,} = {total['tagged']:,} + "
                                 f"{total['filtered']:,} + {total['rejected']:,}"
                                 + ("" if total["events"] == parts else
                                    f" (sum {parts:,})")})
        if rejects is not None or total["rejected"]:
            ok = total["rejected"] in (event_rejects, event_rejects + message_rejects)
            checks.append({"name": "ledger rejected = events in the rejects stream",
                           "ok": ok, "detail": f"ledger {total['rejected']:,}, rejects "
                           f"stream {event_rejects:,} single events"
                           + (f" + {message_rejects:,} in refused messages"
                              if message_rejects else "")})
        if len(archive.rows_by_target) == 1:
            rows = next(iter(archive.rows_by_target.values()))
            checks.append({"name": "archive rows = ledger tagged (one target)",
                           "ok": rows == total["tagged"] or running,
                           "detail": f"archive {rows:,}, ledger {total['tagged']:,}"
                           + (" (live folder: streams read at slightly different moments)"
                              if running and rows != total["tagged"] else "")})
    counters = (night.status or {}).get("counters") or {}
    status_numbers = {}
    if counters:
        status_numbers = {k: counters.get(k) for k in (
            "messages_received", "messages_rejected", "events_received", "events_tagged",
            "events_filtered", "events_rejected", "missing_messages", "duplicate_messages")}
        got = [counters.get(k) for k in ("events_received", "events_tagged",
                                         "events_filtered", "events_rejected")]
        if all(isinstance(v, int) for v in got):
            checks.append({"name": "status.json: received = tagged + filtered + rejected",
                           "ok": got[0] == got[1] + got[2] + got[3],
                           "detail": f"{got[0]:,} = {got[1]:,} + {got[2]:,} + {got[3]:,}"})
        if ledger is not None and not running and isinstance(got[1], int):
            checks.append({"name": "status.json tagged = ledger tagged (stopped service)",
                           "ok": got[1] == total["tagged"],
                           "detail": f"status {got[1]:,}, ledger {total['tagged']:,}"})
    return {"sources": sources, "total": total, "refused_messages_by_reason": refused,
            "rejected_by_reason": by_reason,
            "rejected_single_events": event_rejects, "rejected_in_messages": message_rejects,
            "status_counters": status_numbers,
            "status_rejected_by_reason": (night.status or {}).get("rejected_by_reason") or {},
            "archive_rows_by_target": dict(archive.rows_by_target), "checks": checks,
            "reconciles": all(c["ok"] for c in checks)}


def _site_text(text: str | None) -> str | None:
    site = _json(text)
    if not isinstance(site, dict):
        return text
    if site.get("orbit_file"):
        return f"{site.get('name')}: orbit table {site['orbit_file']}"
    return (f"{site.get('name')}: latitude {site.get('latitude_deg')}°, longitude "
            f"{site.get('longitude_deg')}°, height {site.get('height_m')} m")


def _table_text(text: str | None) -> str | None:
    table = _json(text)
    if not isinstance(table, dict):
        return text
    pieces = table if "segment_ns" not in table and all(isinstance(v, dict) for v in
                                                          table.values()) else {"": table}
    out = []
    for name, p in pieces.items():
        try:
            minutes = int(p["segment_ns"]) / 60e9
            accuracy = f"Chebyshev segments of {minutes:g} min, degree {p.get('degree')}"
        except (KeyError, TypeError, ValueError):
            accuracy = "segment and degree not recorded"
        extra = f"; Shapiro delay of {p['shapiro_bodies']}" if p.get("shapiro_bodies") else ""
        out.append((f"{name}: " if name else "") + accuracy + extra)
    return "; ".join(out)


def _model_lines(night: NightFolder, archive: _ArchiveSummary, targets) -> list[str]:
    from .io.files import load_spin_model

    meta = night.metadata
    listed = _json(meta.get("models"))
    config = _config_targets(meta)
    lines = []
    for target in targets:
        ids: list[str] = []
        if isinstance(listed, dict) and target in listed:
            value = listed[target]
            ids = value.split(",") if isinstance(value, str) else [str(v) for v in value]
        elif isinstance(meta.get("models"), str) and listed is None and \
                (meta.get("target") in (None, target)):
            ids = [m for m in meta["models"].split(",") if m]
        for m in sorted(archive.model_ids.get(target, ())):
            if m not in ids:
                ids.append(m)
        validity = {}
        for path in (config.get(target) or {}).get("models") or []:
            with contextlib.suppress(Exception):
                model = load_spin_model(path)
                validity[model.model_id] = (f"valid MJD {model.validity.start_mjd_tdb} to "
                                            f"{model.validity.end_mjd_tdb} (TDB)")
        parts = [f"{m} ({validity.get(m, 'validity not recorded in the output')})"
                 for m in ids] or ["none recorded"]
        lines.append(f"{target}: " + ", ".join(parts))
    return lines


def _provenance(night: NightFolder, archive: _ArchiveSummary, targets) -> list[tuple[str, str]]:
    meta = night.metadata
    rows = [
        ("software", meta.get("software") or "not recorded"),
        ("site", _site_text(meta.get("site")) or "not recorded"),
        ("spin models", "\n".join(_model_lines(night, archive, targets))),
        ("ephemeris", meta.get("ephemeris") or "not recorded"),
        ("Earth orientation", meta.get("earth_orientation") or "not recorded"),
        ("leap seconds", meta.get("leap_seconds") or "not recorded"),
        ("clock chain", meta.get("clock_chain") or "not recorded"),
        ("barycentre table", _table_text(meta.get("table")) or "not recorded"),
        ("report", f"phasetag {__version__} report of {night.folder} ({night.mode} output)"),
    ]
    if meta.get("phasetag.recovered"):
        rows.append(("recovered files", meta["phasetag.recovered"]))
    return rows


# --------------------------------------------------------------------------------------
# HTML
# --------------------------------------------------------------------------------------


_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", "DejaVu Sans", sans-serif;
       margin: 1.5em auto; max-width: 1180px; color: #1a1a1a; line-height: 1.4; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; } h2 { border-bottom: 2px solid #0072B2;
     padding-bottom: 0.2em; margin-top: 2em; } h3 { margin-top: 1.4em; }
.meta { color: #444; } figure { margin: 1em 0; } figure img { max-width: 100%;
     height: auto; border: 1px solid #ddd; } figcaption { color: #444; font-size: 0.92em; }
.notes { background: #fff8e1; border-left: 4px solid #E69F00; padding: 0.5em 1em; }
.bad { color: #fff; background: #D55E00; padding: 0.4em 0.8em; font-weight: bold; }
.good { color: #006b4f; font-weight: bold; }
table { border-collapse: collapse; margin: 0.6em 0; font-size: 0.95em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.6em; text-align: right; }
th { background: #eef4fa; } td.text, th.text { text-align: left; }
.verdict { border-left: 4px solid #ccc; padding-left: 1em; }
.verdict pre, details pre { white-space: pre-wrap; font-size: 0.88em; background: #f6f6f6;
     padding: 0.6em; } .status { font-size: 1.3em; font-weight: bold; }
.OK { color: #009E73; } .WARN { color: #B07A00; } .FAIL { color: #D55E00; }
"""

# Counts the images the browser decoded, after load, into data attributes of <html>:
# a check that every embedded picture opens (used by the headless-browser test).
_IMAGE_CHECK = """<script>
window.addEventListener("load", function () {
  var images = Array.prototype.slice.call(document.images);
  var loaded = images.filter(function (i) { return i.complete && i.naturalWidth > 0; });
  document.documentElement.setAttribute("data-images-total", String(images.length));
  document.documentElement.setAttribute("data-images-loaded", String(loaded.length));
});
</script>"""


def _e(value) -> str:
    return html.escape(str(value))


def _number(value) -> str:
    if value is None:
        return "–"
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    return f"{float(value):,.2f}"


def _figure_html(figure: dict) -> str:
    encoded = base64.b64encode(figure["png"]).decode("ascii")
    return (f'<figure><img src="data:image/png;base64,{encoded}" alt="{_e(figure["alt"])}">'
            f"<figcaption>{_e(figure['caption'])} (also saved as {_e(figure['file'])})"
            "</figcaption></figure>")


def _accounting_html(acc: dict, night: NightFolder) -> str:
    out = ["<h2>Accounting</h2>"]
    if acc["sources"]:
        header = ("<tr><th class=text>source</th><th>messages</th><th>refused messages</th>"
                  "<th>events received</th><th>tagged</th><th>filtered</th><th>rejected</th>"
                  "<th>missing messages</th></tr>")
        body = []
        for name, s in [*sorted(acc["sources"].items()), ("total", acc["total"])]:
            cells = "".join(f"<td>{_number(s[c])}</td>" for c in (
                "messages", "refused_messages", "events", "tagged", "filtered", "rejected",
                "missing_before"))
            tag = "th" if name == "total" else "td"
            body.append(f"<tr><{tag} class=text>{_e(name)}</{tag}>{cells}</tr>")
        out.append(f'<table id="accounting-ledger">{header}{"".join(body)}</table>')
    else:
        out.append("<p>No ledger: the events received and filtered are not known here.</p>")
    if acc["refused_messages_by_reason"]:
        rows = "".join(f"<tr><td class=text>{_e(k)}</td><td>{_number(v)}</td></tr>"
                       for k, v in sorted(acc["refused_messages_by_reason"].items()))
        out.append("<table><tr><th class=text>messages refused whole, by reason</th>"
                   f"<th>messages</th></tr>{rows}</table>")
    if acc["archive_rows_by_target"]:
        rows = "".join(f"<tr><td class=text>{_e(t)}</td><td>{_number(n)}</td></tr>"
                       for t, n in sorted(acc["archive_rows_by_target"].items()))
        out.append("<table><tr><th class=text>target</th><th>archive rows</th></tr>"
                   f"{rows}</table>")
    if acc["rejected_by_reason"]:
        rows = "".join(f"<tr><td class=text>{_e(r['source'])}</td><td class=text>"
                       f"{_e(r['reason'])}</td><td>{_number(r['events'])}</td>"
                       f"<td>{_number(r['rows'])}</td></tr>" for r in acc["rejected_by_reason"])
        out.append('<table id="accounting-rejects"><tr><th class=text>source</th>'
                   "<th class=text>reason</th><th>events</th><th>rows</th></tr>"
                   f"{rows}</table>")
    elif night.table("rejects") is None:
        out.append("<p>No rejects stream.</p>")
    if acc["status_counters"]:
        rows = "".join(f"<tr><td class=text>{_e(k.replace('_', ' '))}</td>"
                       f"<td>{_number(v)}</td></tr>" for k, v in acc["status_counters"].items())
        reasons = "".join(f"<tr><td class=text>rejected: {_e(k)}</td><td>{_number(v)}</td>"
                          "</tr>" for k, v in acc["status_rejected_by_reason"].items())
        out.append("<h3>Service counters (status.json)</h3><table id=accounting-status>"
                   f"<tr><th class=text>counter</th><th>value</th></tr>{rows}{reasons}"
                   "</table>")
    if acc["checks"]:
        items = "".join(
            f"<li><span class={'good' if c['ok'] else 'bad'}>{'OK' if c['ok'] else 'MISMATCH'}"
            f"</span> {_e(c['name'])}: {_e(c['detail'])}</li>" for c in acc["checks"])
        if not acc["reconciles"]:
            out.append('<p class="bad">The numbers do not reconcile: see the checks below.'
                       "</p>")
        out.append(f"<ul>{items}</ul>")
    return "\n".join(out)


def _provenance_html(rows, night: NightFolder) -> str:
    body = "".join(f"<tr><th class=text>{_e(k)}</th><td class=text>"
                   f"{_e(v).replace(chr(10), '<br>')}</td></tr>" for k, v in rows)
    files = "".join(f"<tr><td class=text>{_e(stem)}</td><td>{_number(e['files'])}</td>"
                    f"<td>{_number(e['rows'])}</td><td>{_number(e['partial'])}</td></tr>"
                    for stem, e in night.files.items())
    config = _json(night.metadata.get("config"))
    config_text = json.dumps(config, indent=2) if config is not None else \
        night.metadata.get("config") or "not recorded"
    other = {k: v for k, v in night.metadata.items() if k not in {
        "software", "site", "ephemeris", "earth_orientation", "leap_seconds", "clock_chain",
        "table", "config"}}
    other_text = "\n".join(f"{k}: {v}" for k, v in sorted(other.items()))
    return ("<h2>Provenance</h2><table id=provenance>" + body + "</table>"
            "<table><tr><th class=text>stream</th><th>files</th><th>rows</th>"
            f"<th>open or cut short</th></tr>{files}</table>"
            f"<details><summary>configuration</summary><pre>{_e(config_text)}</pre></details>"
            f"<details><summary>all file metadata</summary><pre>{_e(other_text)}</pre>"
            "</details>")


def _page(title: str, header: str, body: list[str], refresh: float | None) -> str:
    refresh_tag = (f'<meta http-equiv="refresh" content="{refresh:g}">'
                   if refresh else "")
    return (f"<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f"<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"{refresh_tag}<title>{_e(title)}</title><style>{_CSS}</style></head>"
            f"<body>{header}\n" + "\n".join(body) + f"\n{_IMAGE_CHECK}</body></html>\n")


# --------------------------------------------------------------------------------------
# Assembly
# --------------------------------------------------------------------------------------


def _weighted_flags(night: NightFolder, targets: dict[str, list[str]]):
    """Whether each recipe's statistics use weights (config, then rows, then status)."""
    out: dict[tuple[str, str], bool] = {}
    for name, target in _config_targets(night.metadata).items():
        for recipe in target.get("recipes") or []:
            if isinstance(recipe, dict) and "use_weights" in recipe:
                out[(name, str(recipe.get("name")))] = bool(recipe["use_weights"])
    significance = night.table("significance")
    if significance is not None:
        for (target, recipe), row in _last_rows(significance, ("target", "recipe")).items():
            if row.get("events"):
                out[(str(target), str(recipe))] = bool(row["weighted"])
    for target in (night.status or {}).get("targets") or []:
        for recipe in target.get("recipes") or []:
            if isinstance(recipe, dict) and "weighted" in recipe:
                out.setdefault((str(target.get("name")), str(recipe.get("name"))),
                               bool(recipe["weighted"]))
    return out


def _targets(night: NightFolder) -> dict[str, list[str]]:
    targets = dict(_recipes_from_metadata(night.metadata))
    for stem in ("significance", "profiles", "clock"):
        table = night.table(stem)
        if table is None:
            continue
        for target, recipe in zip(table["target"].to_pylist(), table["recipe"].to_pylist(),
                                  strict=True):
            names = targets.setdefault(str(target), [])
            if str(recipe) not in names:
                names.append(str(recipe))
    for target in (night.status or {}).get("targets") or []:
        names = targets.setdefault(str(target.get("name")), [])
        for recipe in target.get("recipes") or []:
            if str(recipe.get("name")) not in names:
                names.append(str(recipe.get("name")))
    return targets


def _template_for(night: NightFolder, target: str):
    from .io.files import load_template

    path = (_config_targets(night.metadata).get(target) or {}).get("template")
    if not path:
        return None, None
    try:
        return load_template(path), None
    except Exception as exc:  # noqa: BLE001 - the report goes on without the overlay
        return None, f"template {path} could not be read ({exc}); no overlay"


def _write_bytes(path: Path, data: bytes) -> None:
    temp = path.parent / f".{path.name}.{uuid.uuid4().hex}.tmp"
    try:
        temp.write_bytes(data)
        os.replace(temp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            temp.unlink()
        raise


def _safe(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_." else "_" for c in name)


def build_report(output_dir: Path, report_dir: Path | None = None, *,
                 refresh_seconds: float | None = None) -> Path:
    """Write the night report of an output folder.

    Parameters
    ----------
    output_dir : Path
        Service output folder (live or finished) or offline tagging output.
    report_dir : Path, optional
        Where to write (default ``output_dir/report``).
    refresh_seconds : float, optional
        Make the page reload itself this often (``--every``).

    Returns
    -------
    Path
        ``index.html``: one self-contained page (figures embedded as base64 PNG).
        Beside it: every figure as a PNG file and ``report-data.json``, the
        numbers behind each figure.

    Raises
    ------
    FileNotFoundError
        No such folder.
    ReportError
        matplotlib is missing, or the folder holds no phasetag output.
    """
    matplotlib, Figure = _matplotlib()
    from .io.tables import bundled_leap_seconds

    output_dir = Path(output_dir)
    report_dir = Path(report_dir) if report_dir is not None else output_dir / "report"
    night = load_night(output_dir)
    report_dir.mkdir(parents=True, exist_ok=True)
    targets = _targets(night)
    weighted = _weighted_flags(night, targets)
    profile_rows = _last_rows(night.table("profiles"), ("target", "recipe"))
    bins = {(str(t), str(r)): len(row["counts"]) for (t, r), row in profile_rows.items()
            if row.get("counts")}
    with_moments = night.table("significance") is None or night.table("profiles") is None
    archive = _reduce_archive(night, weighted, bins, with_moments, targets)
    for target, recipe in archive.grids:
        names = targets.setdefault(target, [])
        if recipe not in names:
            names.append(recipe)
    start_ns = _first_data_ns(night, archive)
    leaps = bundled_leap_seconds()
    hours = _UtcHours(leaps, start_ns) if start_ns is not None else None
    end_ns = _last_data_ns(night, archive)
    if hours is not None and end_ns is not None:
        hours.use_days_beyond(end_ns - start_ns)
    trials = max(1, sum(len(r) for r in targets.values()))
    clock_rows = _last_rows(night.table("clock"), ("target",))

    figures: list[dict] = []
    data: dict[str, Any] = {"format": "phasetag.report-data", "version": 1,
                            "folder": str(output_dir), "mode": night.mode, "targets": {}}
    sections = []
    with matplotlib.rc_context(_RC):
        for target, recipes in targets.items():
            template, template_note = _template_for(night, target)
            if template_note:
                night.notes.append(template_note)
            profiles, grams, curves = {}, {}, {}
            for recipe in recipes:
                key = (target, recipe)
                grid = archive.grids.get(key)
                is_weighted = weighted.get(key, grid.weighted if grid else False)
                p = _profile_data(target, recipe, profile_rows.get(key), grid, template,
                                  is_weighted)
                if p is not None:
                    profiles[recipe] = p
                g = _phaseogram_data(grid, hours)
                if g is not None:
                    grams[recipe] = g
                s = _significance_data(target, recipe, night.table("significance"), grid,
                                       trials, hours, start_ns)
                if s is not None:
                    curves[recipe] = s
            clock = _clock_data(clock_rows.get((target,)), hours)
            target_figures = []
            stem = _safe(target)
            if profiles:
                fig = _profile_figure(Figure, target, profiles)
                notes = [p["template_note"] for p in profiles.values() if p["template_note"]]
                target_figures.append({
                    "png": _png(fig), "file": f"{stem}-profile.png",
                    "alt": f"{target} pulse profiles",
                    "caption": f"{target}: pulse profile over two cycles per recipe, with "
                               "errors sqrt(sum of squared weights), the harmonic estimate "
                               "and the background level. " + ("Overlay: " + notes[0] + "."
                                                               if notes else "")})
            if grams:
                fig = _phaseogram_figure(Figure, target, grams, hours)
                target_figures.append({
                    "png": _png(fig), "file": f"{stem}-phaseogram.png",
                    "alt": f"{target} phaseogram",
                    "caption": f"{target}: phase against time from the archive rows "
                               "(weights as in each recipe's statistics; events outside the "
                               "spin model's validity left out)."})
            if curves and hours is not None:
                fig = _significance_figure(Figure, target, curves, hours)
                target_figures.append({
                    "png": _png(fig), "file": f"{stem}-significance.png",
                    "alt": f"{target} significance against time",
                    "caption": f"{target}: H-test significance per window; dotted: after the "
                               "trials correction; dashed: σ ∝ √t fitted to the cumulative "
                               "curve (a steady pulsar's significance grows as the square "
                               "root of exposure)."})
            clock_figure = None
            if clock is not None and clock["chunk_mid_tt_ns"].size and hours is not None:
                fig = _clock_figure(Figure, target, clock, hours)
                clock_figure = {"png": _png(fig), "file": f"{stem}-clock.png",
                                "alt": f"{target} clock-chain check",
                                "caption": f"{target}: template offset per chunk with 1σ "
                                           "errors and the tolerance band."}
                target_figures.append(clock_figure)
            figures.extend(target_figures)
            data["targets"][target] = {
                "recipes": recipes,
                "profile": {r: {k: p[k] for k in (
                    "source", "events", "sum_weights", "counts", "errors", "harmonics",
                    "background_per_bin", "template_shift_cycles", "template_amplitude",
                    "weighted", "bins", "data_until_tt_ns")} for r, p in profiles.items()},
                "phaseogram": {r: {k: g[k] for k in (
                    "counts", "time_edges_tt_ns", "time_edges_utc_hours", "bins", "total",
                    "rows", "weighted", "row_seconds")} for r, g in grams.items()},
                "significance": {r: {"source": s["source"], "sqrt_t_fit": s["sqrt_t_fit"],
                                     "windows": s["windows"]} for r, s in curves.items()},
                "clock": clock,
            }
            sections.append(_target_html(target, recipes, target_figures, clock_figure, clock,
                                         profiles, curves))
        accounting = _accounting(night, archive)
        data["accounting"] = accounting
        provenance = _provenance(night, archive, list(targets))
        data["provenance"] = dict(provenance)
        data["notes"] = night.notes
        data["figures"] = [f["file"] for f in figures]

    for figure in figures:
        _write_bytes(report_dir / figure["file"], figure["png"])
    sinks.atomic_write_text(report_dir / "report-data.json",
                            json.dumps(_clean(data), indent=1) + "\n")
    generated = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M:%S UTC")
    span = ""
    if start_ns is not None and hours is not None and end_ns is not None:
        span = f" Data from {hours.text(start_ns)} to {hours.text(end_ns)}."
    state = (night.status or {}).get("state")
    header = (f"<h1>phasetag night report</h1><p class=meta>{_e(output_dir)} — "
              f"{_e(night.mode)} output{', service ' + _e(state) if state else ''}."
              f"{_e(span)} Generated {generated}"
              + (f", refreshed every {refresh_seconds:g} s" if refresh_seconds else "")
              + ".</p>")
    warnings = [str(w) for w in (night.status or {}).get("warnings") or []]
    notes = night.notes + [f"Service warning: {w}" for w in warnings]
    if notes:
        header += ("<div class=notes><strong>What this report could not show, and notes"
                   "</strong><ul>" + "".join(f"<li>{_e(n)}</li>" for n in notes)
                   + "</ul></div>")
    body = [*sections, _accounting_html(accounting, night),
            _provenance_html(provenance, night)]
    page = _page(f"phasetag night report: {output_dir.name}", header, body, refresh_seconds)
    index = report_dir / "index.html"
    sinks.atomic_write_text(index, page)
    return index


def _target_html(target, recipes, figures, clock_figure, clock, profiles, curves) -> str:
    out = [f'<h2 id="target-{_e(_safe(target))}">Target {_e(target)}</h2>',
           f"<p>Recipes: {_e(', '.join(recipes))}.</p>"]
    rows = []
    for recipe in recipes:
        s = curves.get(recipe)
        p = profiles.get(recipe)
        cumulative = (s or {}).get("windows", {}).get("cumulative")
        sigma = post = None
        if cumulative is not None and len(cumulative["h_sigma"]):
            sigma, post = cumulative["h_sigma"][-1], cumulative["h_sigma_post_trials"][-1]
        shift = _finite((p or {}).get("template_shift_us"))
        rows.append(f"<tr><td class=text>{_e(recipe)}</td>"
                    f"<td>{_number(p['events'] if p else None)}</td>"
                    f"<td>{_number(p['sum_weights'] if p else None)}</td>"
                    f"<td>{'–' if sigma is None or not np.isfinite(sigma) else f'{sigma:.2f}'}"
                    f"</td><td>{'–' if post is None or not np.isfinite(post) else f'{post:.2f}'}"
                    f"</td><td>{'–' if shift is None else f'{shift:+.1f}'}</td></tr>")
    out.append("<table><tr><th class=text>recipe</th><th>events</th><th>sum of weights</th>"
               "<th>σ (cumulative)</th><th>σ after trials</th><th>template offset (µs)</th>"
               f"</tr>{''.join(rows)}</table>")
    for figure in figures:
        if figure is clock_figure:
            continue
        out.append(_figure_html(figure))
    if clock is not None:
        verdict = (f'<div class=verdict><div class="status {_e(clock["status"])}">'
                   f'{_e(clock["status"])} ({_e(clock["kind"])})</div>'
                   f"<p>Recipe {_e(clock['recipe'])}; tolerance "
                   + (f"{clock['tolerance_us']:.1f} µs" if clock["tolerance_us"] else "?")
                   + (f" at {clock['frequency_hz']:.6f} Hz" if clock["frequency_hz"] else "")
                   + f"</p><pre>{_e(clock['summary'])}</pre></div>")
        figure_part = _figure_html(clock_figure) if clock_figure else \
            "<p>No chunk offsets yet.</p>"
        out.append(f"<h3>Clock-chain check</h3><div class=clock>{figure_part}{verdict}</div>")
    return "\n".join(out)


# --------------------------------------------------------------------------------------
# Command line
# --------------------------------------------------------------------------------------


def report_main(args) -> int:
    """``phasetag report OUTPUT_DIR [--to DIR] [--every SECONDS]``.

    Without ``--every``: build once and print the page's path. With it: rebuild
    every SECONDS until Ctrl-C (the page reloads itself at the same pace).
    """
    try:
        _matplotlib()
    except ReportError as exc:
        print(f"phasetag report: {exc}", file=sys.stderr)
        return 2
    folder = Path(args.output_dir)
    report_dir = Path(args.to) if getattr(args, "to", None) else None
    every = getattr(args, "every", None)
    if every is not None and not every > 0:
        print(f"phasetag report: --every {every}: must be a positive number of seconds",
              file=sys.stderr)
        return 2
    if not folder.is_dir():
        print(f"phasetag report: {folder}: no such output folder", file=sys.stderr)
        return 2
    if every is None:
        try:
            path = build_report(folder, report_dir)
        except ReportError as exc:
            print(f"phasetag report: {exc}", file=sys.stderr)
            return 2
        print(path)
        return 0
    try:
        while True:
            started = time.monotonic()
            try:
                path = build_report(folder, report_dir, refresh_seconds=every)
                print(f"{dt.datetime.now(dt.UTC):%H:%M:%S} UTC  wrote {path}", flush=True)
            except (ReportError, sinks.ArrowFileError, OSError) as exc:
                print(f"{dt.datetime.now(dt.UTC):%H:%M:%S} UTC  not yet: {exc}",
                      file=sys.stderr, flush=True)
            time.sleep(max(0.0, every - (time.monotonic() - started)))
    except KeyboardInterrupt:
        return 0
