"""The clock check of a finished night: the library behind ``turnstamp clock``.

Theory of operation: an archive (one offline-tagged file, Arrow IPC or Parquet, or a
service output folder of ``archive-*.arrows`` files) holds per event the site TT
instant and the barycentric correction applied. Each target's events of the chosen
recipe are folded again with the given spin models (so a newer model can be tried on
an old night), the moments binned by site time as the service does, and the same
check runs (:func:`turnstamp.core.clock.check.check_target`), with one difference:
the phases are at hand, so each offset is fitted to the events themselves
(:mod:`turnstamp.core.eventfit`) rather than to their 20 harmonics. Chunks, the whole
night, the diagnosis with the apparent spin from the site's barycentre tables, and
a refold of the archive's own corrections under alternative hypotheses. Several
targets are then judged together (:mod:`turnstamp.core.clock.joint`).
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from .assemble import Environment, TableCache, load_phase_calculators, target_setup
from .config import BarycentreConfig
from .core.clock.apparent import SiteSpin
from .core.clock.check import CheckSettings, check_target
from .core.clock.joint import JointVerdict, attribute, joint_check, target_series
from .core.clock.wording import utc_text
from .core.correctiontable import TableSet
from .core.flags import Quality
from .core.moments import MAX_HARMONICS, PhaseMoments
from .core.refold import refold_scores
from .core.targets import TargetSetup
from .core.timebase import NS_PER_DAY, NS_PER_S
from .core.timebinned import TimeBinnedMoments
from .errors import InputError
from .files.inputs import load_template
from .files.reader import read_arrow_file, read_stream

__all__ = ["TargetFiles", "ArchiveCheck", "check_archive", "read_archive"]

COLUMNS = ("target", "site_tt_ns", "barycentric_correction_s", "weight", "recipe_flags")
INTERVAL_NS = 10 * NS_PER_S  # moments are binned as the service bins them
REFOLD_EVENTS = 1 << 20  # the latest events refolded under each hypothesis


@dataclass(frozen=True)
class TargetFiles:
    """A target's spin-model files and template file."""

    models: tuple[Path, ...]
    template: Path


@dataclass
class ArchiveCheck:
    """Per target (target, recipe, verdict, chunks), and the joint verdict of several."""

    results: list
    joint: JointVerdict | None

    def to_dict(self) -> dict:
        """JSON: ``targets`` (status, kind, size with σ and unit, named mistake in s, what
        the offsets were fitted to) and ``clock`` (what all targets share, with two or
        more)."""
        rows = []
        for target, recipe, verdict, chunks in self.results:
            rows.append({
                "target": target, "recipe": recipe, "status": verdict.status,
                "kind": verdict.kind, "size": {"value": verdict.size,
                                               "sigma": verdict.size_sigma,
                                               "unit": verdict.size_unit},
                "mistake_s": verdict.mistake_s, "attribution": verdict.attribution,
                "minutes_needed": verdict.minutes_needed, "lines": verdict.lines,
                "offsets_fitted_to": "event phases",
                "chunks": [{"start_tt_ns": c.start_ns, "end_tt_ns": c.end_ns,
                            "shift_cycles": _number(c.shift_cycles),
                            "sigma_cycles": _number(c.sigma_cycles),
                            "detected": c.detected, "arrival_tdb_ns": c.arrival_tdb_ns,
                            "arrival_sigma_us": c.arrival_sigma_us} for c in chunks],
                "verdict": verdict.to_dict()})
        joint = None if self.joint is None else {
            "status": self.joint.status, "kind": self.joint.kind, "shared": self.joint.shared,
            "size": {"value": self.joint.size, "sigma": self.joint.size_sigma,
                     "unit": self.joint.size_unit},
            "own_model": self.joint.own_model, "lines": self.joint.lines}
        return {"targets": rows, "clock": joint}


def _number(x: float) -> float | None:
    return float(x) if np.isfinite(x) else None


def read_archive(path: Path) -> pa.Table:
    """The archive rows of a file (Arrow IPC or Parquet) or of a service output folder."""
    if path.is_dir():
        table = read_stream(path, "archive")
        if table.num_rows == 0:
            raise InputError("archive", str(path), "no archive-*.arrows rows in this folder")
    elif path.is_file():
        try:
            table = pq.read_table(path) if path.suffix.lower() == ".parquet" \
                else read_arrow_file(path)
        except (OSError, pa.ArrowException) as exc:
            raise InputError("archive", str(path), f"cannot read as an archive: {exc}") \
                from None
    else:
        raise InputError("archive", str(path), "no such file or folder")
    missing = [c for c in COLUMNS if c not in table.column_names]
    if missing:
        raise InputError("archive", str(path), f"not an archive: columns {missing} missing")
    return table


def _recipes(table: pa.Table, target: str) -> list[str]:
    """Recipe names in bit order, from the archive's metadata (offline or service)."""
    meta = {k.decode(): v.decode() for k, v in (table.schema.metadata or {}).items()}
    if "recipes_by_target" in meta:
        return json.loads(meta["recipes_by_target"]).get(target, ["all"])
    return meta.get("recipes", "all").split(",")


def _setup(name: str, files: TargetFiles, env: Environment, cache_dir: Path | None,
           tt_ns: np.ndarray) -> TargetSetup:
    """The target's tagger over barycentre tables for the days its events span."""
    setup = target_setup(name, load_phase_calculators(files.models),
                         template=load_template(files.template))
    cache = TableCache(cache_dir, env, BarycentreConfig())
    first, last = int(tt_ns.min()) - 600 * NS_PER_S, int(tt_ns.max()) + 600 * NS_PER_S
    days = range(first // NS_PER_DAY, last // NS_PER_DAY + 1)
    setup.tagger.table = TableSet(cache.table(setup.position, d * NS_PER_DAY,
                                              (d + 1) * NS_PER_DAY) for d in days)
    return setup


def _events(table: pa.Table, name: str, bit: int):
    """(tt_ns, correction_s, weight) of a target's events in recipe ``bit``, time-ordered."""
    rows = table.filter(pc.equal(table["target"].cast(pa.string()), name))
    flags = rows["recipe_flags"].to_numpy()
    chosen = ((flags >> np.uint32(bit)) & 1).astype(bool)
    tt = rows["site_tt_ns"].to_numpy()[chosen]
    order = np.argsort(tt, kind="stable")
    return (tt[order], rows["barycentric_correction_s"].to_numpy()[chosen][order],
            rows["weight"].to_numpy()[chosen][order])


class _Folded:
    """The events of one target folded with its models: moments by site time, and the
    phases themselves by time range (``EventPhases``), so each offset is fitted to them."""

    def __init__(self, setup: TargetSetup, tt, correction, weight, weighted: bool,
                 advance: Callable[[int], None] | None):
        self.binned = TimeBinnedMoments(INTERVAL_NS)
        tagger, kept = setup.tagger, []
        step = 1 << 20
        for lo in range(0, tt.size, step):
            part = slice(lo, lo + step)
            index = tagger.choose_models(tt[part])
            for i in np.unique(index):
                rows = index == i
                _, phase, flags = tagger.calculators[i].phase(tt[part][rows],
                                                              correction[part][rows])
                # events outside every model's validity are left out, as the service does
                usable = (flags & Quality.OUTSIDE_MODEL_VALIDITY) == 0
                chosen = (tt[part][rows][usable], phase[usable],
                          weight[part][rows][usable] if weighted else None)
                self.binned.update(*chosen)
                kept.append(chosen)
            if advance is not None:
                advance(int(tt[part].size))
        self.tt = np.concatenate([k[0] for k in kept]) if kept else np.zeros(0, np.int64)
        order = np.argsort(self.tt, kind="stable")
        self.tt = self.tt[order]
        self.phase = np.concatenate([k[1] for k in kept])[order] if kept else np.zeros(0)
        self.weight = np.concatenate([k[2] for k in kept])[order] if kept and weighted \
            else None

    def __call__(self, start_ns: int, end_ns: int):
        lo, hi = np.searchsorted(self.tt, [start_ns, end_ns], side="left")
        return self.phase[lo:hi], None if self.weight is None else self.weight[lo:hi]


def check_archive(path: Path, targets: dict[str, TargetFiles], env: Environment, *,
                  recipe: str | None = None, settings: CheckSettings | None = None,
                  table_cache: Path | None = None, weighted: bool | None = None,
                  advance: Callable[[int], None] | None = None,
                  table: pa.Table | None = None) -> ArchiveCheck:
    """The clock check of each target of an archive (see the module notes).

    Parameters
    ----------
    path : Path
        Archive file or service output folder.
    targets : dict of str to TargetFiles
        Models and template per target name (as written in the archive).
    env : Environment
        The site (its barycentre tables give the apparent spin).
    recipe : str, optional
        Recipe whose events are checked (default: the archive's first).
    settings : CheckSettings, optional
        Chunk length and tolerance (default: 60-s chunks, 0.02 cycles).
    table_cache : Path, optional
        Folder of cached barycentre tables.
    weighted : bool, optional
        Use the photon weights (default: when any weight differs from 1).
    advance : callable, optional
        Called with the number of events folded (progress).
    table : pyarrow.Table, optional
        The archive's rows when already read (``read_archive(path)``).
    """
    settings = settings or CheckSettings()
    table = read_archive(path) if table is None else table
    present = set(pc.unique(table["target"].cast(pa.string())).to_pylist())
    unknown = sorted(set(targets) - present)
    if unknown:
        raise InputError("target", unknown[0], f"not in the archive; it holds {sorted(present)}")
    results, spins = [], {}
    text = utc_text(env.leaps)
    for name, files in targets.items():
        names = _recipes(table, name)
        chosen = recipe or names[0]
        if chosen not in names:
            raise InputError("recipe", chosen, f"not a recipe of {name}: {names}")
        tt, correction, weight = _events(table, name, names.index(chosen))
        if tt.size == 0:
            raise InputError("archive", str(path), f"no events of {name} in recipe {chosen}")
        setup = _setup(name, files, env, table_cache, tt)
        use = bool(np.any(weight != 1.0)) if weighted is None else weighted
        folded = _Folded(setup, tt, correction, weight, use, advance)
        spins[name] = spin = SiteSpin(setup.tagger)
        recent = slice(max(0, tt.size - REFOLD_EVENTS), None)

        def refold(setup=setup, tt=tt[recent], c=correction[recent], w=weight[recent],
                   use=use):
            return refold_scores(setup.tagger, tt, c, w, use, MAX_HARMONICS,
                                 PhaseMoments().bins), int(tt.size)

        assert setup.template is not None
        verdict, chunks = check_target(folded.binned, setup.template, spin, settings,
                                       refold=refold, time_text=text, events=folded)
        results.append((name, chosen, verdict, chunks))
    series = [s for name, _, v, c in results
              if (s := target_series(name, v, c, spins[name])) is not None]
    joint = joint_check(series, min(v.tolerance_us for _, _, v, _ in results), text) \
        if len(results) > 1 else None
    return ArchiveCheck(attribute(results, spins, text), joint)
