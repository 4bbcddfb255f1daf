"""Build the core's objects from configuration and files.

This is where files are read (clock tables, orbit tables, Earth orientation, the
planetary kernel, spin models, templates) and where barycentre tables are built
or taken from the on-disk cache; the core receives only data.
"""

from __future__ import annotations

import csv
import hashlib
import json
import logging
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from . import __version__
from .config import BarycentreConfig, RecipeConfig, SiteConfig, TargetConfig
from .core.barycentre import BarycentreCalculator, SkyPosition
from .core.correctiontable import CorrectionTable
from .core.earth import EarthOrientation, GroundSite, OrbitTrack
from .core.phase import PhaseCalculator
from .core.spin import SpinModel
from .core.tagger import TargetTagger
from .core.targets import Recipe, TargetSetup
from .core.timebase import NS_PER_S, ClockCorrection, LeapSecondTable, parse_instant
from .errors import ConfigError, loaded
from .files.bundled import bundled_leap_seconds, load_earth_orientation, open_ephemeris
from .files.columns import to_numpy
from .files.inputs import load_spin_model, load_template

if TYPE_CHECKING:
    from .core.template import PulseTemplate

__all__ = ["Environment", "TableCache", "phase_calculators_for", "load_phase_calculators",
           "target_setup", "build_target", "recipe_from"]

log = logging.getLogger(__name__)


def _read_clock_file(path: Path) -> tuple[list[int], list[float]]:
    instants, offsets = [], []
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except OSError as exc:
        raise ConfigError("site.clock_corrections.file", str(path), f"cannot read: {exc}") from None
    for number, row in enumerate(csv.reader(lines), 1):
        if not row or row[0].lstrip().startswith("#"):
            continue
        try:
            instants.append(parse_instant(row[0]))
            offsets.append(float(row[1]))
        except (ValueError, IndexError) as exc:
            raise ConfigError("site.clock_corrections.file", f"{path}:{number}",
                              f"expected 'instant,offset_s': {exc}") from None
    return instants, offsets


def _read_orbit_file(path: Path, name: str) -> OrbitTrack:
    import pyarrow.csv as pacsv

    from .files.reader import read_arrow_file

    table = pacsv.read_csv(path) if path.suffix.lower() == ".csv" else read_arrow_file(path)
    columns = set(table.column_names)
    need = {"tt_ns", "x_m", "y_m", "z_m"}
    if not need <= columns:
        raise ConfigError("site.orbit_file", str(path), f"needs columns {sorted(need)}")
    position = np.stack([table[c].to_numpy() for c in ("x_m", "y_m", "z_m")], axis=1)
    velocity = None
    if {"vx_m_s", "vy_m_s", "vz_m_s"} <= columns:
        velocity = np.stack([table[c].to_numpy() for c in ("vx_m_s", "vy_m_s", "vz_m_s")], 1)
    return OrbitTrack(name, table["tt_ns"].to_numpy(), position, velocity)


@dataclass
class Environment:
    """Site-level tables shared by every target."""

    site: SiteConfig
    leaps: LeapSecondTable
    orientation: EarthOrientation
    ephemeris: object
    observer: GroundSite | OrbitTrack
    clock_chain: tuple[ClockCorrection, ...]

    @classmethod
    def from_site(cls, site: SiteConfig) -> Environment:
        leaps = bundled_leap_seconds()
        orientation = load_earth_orientation(site.earth_orientation_file, leaps)
        ephemeris = open_ephemeris(site.ephemeris_file)
        if site.orbit_file is not None:
            observer = _read_orbit_file(site.orbit_file, site.name)
        else:
            observer = GroundSite(site.name, site.latitude_deg, site.longitude_deg,
                                  site.height_m)
        chain = []
        for link in site.clock_corrections:
            if link.file is not None:
                instants, offsets = _read_clock_file(link.file)
            else:
                instants = [parse_instant(x) for x in link.instants]
                offsets = list(link.offsets_s)
            chain.append(ClockCorrection(link.name, np.array(instants, np.int64),
                                         np.array(offsets)))
        return cls(site, leaps, orientation, ephemeris, observer, tuple(chain))

    def provenance(self) -> dict[str, str]:
        return {
            "software": f"turnstamp {__version__}",
            "site": self.site.model_dump_json(),
            "leap_seconds": self.leaps.source,
            "earth_orientation": self.orientation.source,
            "ephemeris": self.ephemeris.name,
            "clock_chain": "; ".join(c.name for c in self.clock_chain) or "none",
        }


class TableCache:
    """Barycentre tables per (site, target, window), cached as Arrow files.

    Windows are aligned to whole segments so that repeated runs reuse files. The
    cache key hashes everything that determines the table (provenance).
    """

    def __init__(self, directory: Path | None, env: Environment, settings: BarycentreConfig):
        self.directory = directory
        self.env = env
        self.settings = settings

    def _calculator(self, position: SkyPosition) -> BarycentreCalculator:
        return BarycentreCalculator(self.env.observer, position, self.env.ephemeris,
                                    self.env.orientation, tuple(self.settings.shapiro_bodies))

    def provenance(self, position: SkyPosition) -> dict[str, str]:
        """What determines every table of ``position``, but its time span."""
        return {**self._calculator(position).provenance(),
                "segment_ns": str(int(self.settings.segment_minutes * 60 * NS_PER_S)),
                "degree": str(self.settings.degree), "format": "turnstamp barycentre table 1"}

    def table(self, position: SkyPosition, start_ns: int, stop_ns: int) -> CorrectionTable:
        segment_ns = int(self.settings.segment_minutes * 60 * NS_PER_S)
        start = (start_ns // segment_ns) * segment_ns
        stop = -(-stop_ns // segment_ns) * segment_ns
        calculator = self._calculator(position)
        provenance = {**self.provenance(position), "start_ns": str(start), "stop_ns": str(stop)}
        key = hashlib.sha256(json.dumps(provenance, sort_keys=True).encode()).hexdigest()[:16]
        path = None if self.directory is None else self.directory / f"barycentre-{key}.arrow"
        if path is not None and path.exists():
            cached = _read_table(path, provenance)
            if cached is not None:
                return cached
        log.info("building barycentre table for %.1f h", (stop - start) / 3.6e12)
        table = CorrectionTable.build(calculator.correction, start, stop, segment_ns,
                                      self.settings.degree, provenance)
        if path is not None:
            try:
                _write_table(path, table)
            except OSError as exc:  # a read-only or full cache costs a rebuild next time
                log.warning("barycentre table not cached in %s: %s", path.parent, exc)
        return table


def _write_table(path: Path, table: CorrectionTable) -> None:
    import pyarrow as pa

    columns = table.to_columns()
    coefficients = columns["coefficients_s"]
    arrow = pa.table({
        "segment_start_ns": columns["segment_start_ns"],
        "coefficients_s": pa.FixedSizeListArray.from_arrays(
            pa.array(coefficients.ravel()), coefficients.shape[1]),
        "flags": columns["flags"],
    }).replace_schema_metadata({k: str(v) for k, v in table.provenance.items()})
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_suffix(".tmp")
    with pa.OSFile(str(temporary), "wb") as sink, pa.ipc.new_file(sink, arrow.schema) as writer:
        writer.write_table(arrow)
    temporary.replace(path)


def _read_table(path: Path, provenance: dict[str, str]) -> CorrectionTable | None:
    import pyarrow as pa

    try:
        arrow = pa.ipc.open_file(str(path)).read_all()
    except (OSError, pa.ArrowInvalid) as exc:
        log.warning("ignoring unreadable cached table %s: %s", path, exc)
        return None
    stored = {k.decode(): v.decode() for k, v in (arrow.schema.metadata or {}).items()}
    if stored != provenance:
        log.warning("ignoring cached table %s: provenance differs", path)
        return None
    width = arrow.schema.field("coefficients_s").type.list_size
    arrow = arrow.combine_chunks()
    lists = arrow["coefficients_s"].chunk(0)
    # the child values (not .flatten(), which loads pyarrow.compute: 0.1 s at start-up)
    coefficients = to_numpy(lists.values.slice(lists.offset * width, len(lists) * width))
    return CorrectionTable.from_columns(
        to_numpy(arrow["segment_start_ns"].chunk(0)), coefficients.reshape(-1, width),
        to_numpy(arrow["flags"].chunk(0)), stored)


def phase_calculators_for(models: Sequence[SpinModel]) -> list[PhaseCalculator]:
    """Phase calculators of one target's spin models (their ``model_id`` must differ)."""
    ids = [m.model_id for m in models]
    if len(set(ids)) != len(ids):
        raise ConfigError("models", ids, "model_id must be unique within a target")
    return [PhaseCalculator(m) for m in models]


def load_phase_calculators(paths) -> list[PhaseCalculator]:
    """Phase calculators of the spin-model files ``paths`` (TOML or JSON)."""
    return phase_calculators_for([load_spin_model(p) for p in paths])


def recipe_from(config) -> Recipe:
    return Recipe(config.name, config.energy_min, config.energy_max, config.max_distance_deg,
                  config.min_score, config.use_weights, config.telescopes_any)


def target_setup(name: str, calculators: list[PhaseCalculator],
                 recipes: Sequence[RecipeConfig] = (RecipeConfig(name="all"),),
                 template: PulseTemplate | None = None, region_radius_deg: float | None = None,
                 clock_check_recipe: str | None = None,
                 table: CorrectionTable | None = None) -> TargetSetup:
    """One target from objects already in memory (spin models compiled to phase calculators)."""
    positions = {json.dumps(p.model.sky_position_args(), sort_keys=True) for p in calculators}
    if len(positions) > 1:
        raise ConfigError(f"targets.{name}.models", [p.model_id for p in calculators],
                          "all models of a target must give the same sky position")
    position = SkyPosition(**calculators[0].model.sky_position_args())
    built = [recipe_from(r) for r in recipes]
    names = [r.name for r in built]
    clock = names.index(clock_check_recipe) if clock_check_recipe else 0
    return TargetSetup(
        tagger=TargetTagger(name, calculators, table), position=position, recipes=built,
        template=template, region_radius_deg=region_radius_deg, clock_recipe=clock)


def build_target(config: TargetConfig, table: CorrectionTable | None = None,
                 calculators: list[PhaseCalculator] | None = None) -> TargetSetup:
    """One target from its configuration, reading its model and template files."""
    return target_setup(
        config.name, calculators or loaded(f"targets.{config.name}.models",
                                           load_phase_calculators, config.models),
        config.recipes,
        loaded(f"targets.{config.name}.template", load_template, config.template)
        if config.template else None, config.region_radius_deg,
        config.clock_check_recipe, table)
