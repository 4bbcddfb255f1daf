"""Configuration of the service and of offline tagging: one TOML file, checked once.

Every model is frozen and refuses unknown keys, so a typo is an error at start-up,
not a silently ignored setting. Paths are relative to the configuration file.
Defaults that are not obvious say why they are what they are.
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path
from typing import Annotated, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    WithJsonSchema,
    model_validator,
)

from .endpoints import ControlConfig, CurveConfig, IntakeConfig
from .errors import ConfigError

__all__ = [
    "ServiceConfig",
    "IntakeConfig",
    "CurveConfig",
    "ControlConfig",
    "SiteConfig",
    "TargetConfig",
    "RecipeConfig",
    "ClockCorrectionConfig",
    "SiteFile",
    "load_config",
    "load_site",
    "parse_energy_kev",
]

_FROZEN = ConfigDict(frozen=True, extra="forbid", use_attribute_docstrings=True)
"""Every model: immutable, unknown keys refused, each field's docstring in the schema."""
_ENERGY_PATTERN = r"^\s*([-+0-9.eE]+)\s*(eV|keV|MeV|GeV|TeV|PeV)\s*$"
_ENERGY = re.compile(_ENERGY_PATTERN)
_KEV_PER_UNIT = {"eV": 1e-3, "keV": 1.0, "MeV": 1e3, "GeV": 1e6, "TeV": 1e9, "PeV": 1e12}


def parse_energy_kev(value) -> float | None:
    """'300 GeV' -> 3e8 (keV). A bare number is refused: the unit must be said."""
    if value is None:
        return None
    if isinstance(value, int | float) and not isinstance(value, bool):
        raise ValueError(f"{value!r} has no unit; write e.g. '{value} keV' or '{value} GeV'")
    match = _ENERGY.match(str(value))
    if not match:
        raise ValueError(f"{value!r} is not an energy like '300 GeV' "
                         f"(units: {', '.join(_KEV_PER_UNIT)})")
    return float(match.group(1)) * _KEV_PER_UNIT[match.group(2)]


EnergyKeV = Annotated[
    float | None, BeforeValidator(parse_energy_kev),
    WithJsonSchema({"anyOf": [{"type": "string", "pattern": _ENERGY_PATTERN,
                               "examples": ["500 GeV", "1 TeV", "2.5 keV"]},
                              {"type": "null"}]}, mode="validation")]
"""An energy written with its unit ("500 GeV"); held in keV."""


class ClockCorrectionConfig(BaseModel):
    """One link of the site clock chain: piecewise-linear offsets to add to readings.

    Give either ``file`` (CSV lines ``instant,offset_s``; instant as an ISO label in
    the instrument's scale; ``#`` comments) or ``instants`` and ``offsets_s`` inline.
    """

    model_config = _FROZEN
    name: str = Field(min_length=1)
    """What this link corrects, e.g. "station clock -> GPS" (recorded in the outputs)."""
    file: Path | None = None
    """CSV of ``instant,offset_s`` lines (relative to the configuration file)."""
    instants: tuple[str, ...] = ()
    """Table instants as ISO labels in the instrument's time scale (with ``offsets_s``)."""
    offsets_s: tuple[float, ...] = ()
    """Offset to add at each of ``instants``, seconds."""

    @model_validator(mode="after")
    def _one_source(self):
        if (self.file is None) == (not self.instants):
            raise ValueError("give either file or instants/offsets_s")
        if len(self.instants) != len(self.offsets_s):
            raise ValueError(f"{len(self.instants)} instants but {len(self.offsets_s)} offsets")
        return self


class SiteConfig(BaseModel):
    """Where the instrument is: geodetic coordinates, or an orbit table in space."""

    model_config = _FROZEN
    name: str = Field(min_length=1, max_length=64)
    """Name of the observatory (recorded in the outputs)."""
    latitude_deg: float | None = Field(default=None, ge=-90, le=90)
    """Geodetic latitude (WGS84), degrees north."""
    longitude_deg: float | None = Field(default=None, ge=-180, le=360)
    """Geodetic longitude (WGS84), degrees east (west is negative)."""
    height_m: float | None = Field(default=None, gt=-1000, lt=10_000)
    """Height above the WGS84 ellipsoid, metres."""
    orbit_file: Path | None = None
    """Arrow or CSV with tt_ns, x_m, y_m, z_m (GCRS) and optionally vx/vy/vz_m_s."""
    earth_orientation_file: Path | None = None
    """A newer IERS finals2000A file on disk; default: the one bundled with astropy."""
    ephemeris_file: Path | None = None
    """A JPL SPK kernel; default: DE421 shipped by the skyfield-data package."""
    clock_corrections: tuple[ClockCorrectionConfig, ...] = ()
    """The site clock chain, applied in order to every event time."""

    @model_validator(mode="after")
    def _where(self):
        geodetic = (self.latitude_deg, self.longitude_deg, self.height_m)
        if self.orbit_file is None and any(v is None for v in geodetic):
            raise ValueError("a ground site needs latitude_deg, longitude_deg and height_m "
                             "(or give orbit_file for a space-borne instrument)")
        if self.orbit_file is not None and any(v is not None for v in geodetic):
            raise ValueError("give either geodetic coordinates or orbit_file, not both")
        return self


class RecipeConfig(BaseModel):
    """A selection of events for the statistics of one target. Every cut is optional."""

    model_config = _FROZEN
    name: str = Field(pattern=r"^[A-Za-z0-9_.-]{1,32}$")
    """Recipe name, unique within the target (letters, digits, _ . -)."""
    energy_min: EnergyKeV = None
    """Keep events at or above this energy, with its unit: "500 GeV"."""
    energy_max: EnergyKeV = None
    """Keep events below this energy, with its unit: "10 TeV"."""
    max_distance_deg: float | None = Field(default=None, gt=0, le=180)
    """Keep events reconstructed within this angle of the target, degrees."""
    min_score: float | None = None
    """Keep events whose classification score is at least this."""
    use_weights: bool = False
    """Use the events' weights in the statistics (weighted H-test)."""
    telescopes_any: int | None = Field(default=None, ge=1)
    """Keep events seen by any telescope in this bit mask."""

    @model_validator(mode="after")
    def _ordered(self):
        if (self.energy_min is not None and self.energy_max is not None
                and self.energy_max <= self.energy_min):
            raise ValueError("energy_max must be above energy_min")
        return self


class TargetConfig(BaseModel):
    """A pulsar to watch: its spin models, template and selection recipes."""

    model_config = _FROZEN
    name: str = Field(pattern=r"^[A-Za-z0-9_.+-]{1,32}$")
    """Target name, unique (letters, digits, _ . + -); written to every output row."""
    models: tuple[Path, ...] = Field(min_length=1)
    """Spin-model files (TOML/JSON); several for successive validity windows."""
    template: Path | None = None
    """Pulse template file; without one there is no clock-chain check for the target."""
    region_radius_deg: float | None = Field(default=None, gt=0, le=180)
    """Archive only events within this distance (when the stream has directions)."""
    recipes: tuple[RecipeConfig, ...] = (RecipeConfig(name="all"),)
    """Event selections, each with its own statistics (default: one recipe "all")."""
    clock_check_recipe: str | None = None
    """Recipe whose events feed the clock-chain check (default: the first)."""

    @model_validator(mode="after")
    def _recipes(self):
        names = [r.name for r in self.recipes]
        if len(set(names)) != len(names):
            raise ValueError(f"recipe names must be unique: {names}")
        if len(names) > 32:
            raise ValueError("at most 32 recipes per target (recipe_flags is 32 bits)")
        if self.clock_check_recipe is not None and self.clock_check_recipe not in names:
            raise ValueError(f"clock_check_recipe {self.clock_check_recipe!r} is not one of "
                             f"{names}")
        return self


class StatisticsConfig(BaseModel):
    """The periodicity statistics kept per target, recipe and window."""

    model_config = _FROZEN
    harmonics: int = Field(default=20, ge=1, le=20)
    """Harmonics summed (Z^2_m, H-test search up to this many)."""
    bins: int = Field(default=32, ge=4, le=1024)
    """Phase bins of the pulse profiles."""
    interval_s: float = Field(default=10.0, gt=0)
    """Resolution of sliding windows and of clock-check chunks."""
    windows_minutes: tuple[float, ...] = (5.0, 60.0)
    """Sliding windows besides the cumulative total, minutes (multiples of interval_s)."""
    update_every_s: float = Field(default=1.0, gt=0)
    """Cadence of the significance and profile rows and of the live updates, s."""
    retain_hours: float = Field(default=24.0, gt=0)
    """Per-interval detail kept for windows and the clock check; older data stays in
    the cumulative totals. Bounds memory over long runs."""

    @model_validator(mode="after")
    def _windows(self):
        for minutes in self.windows_minutes:
            steps = minutes * 60 / self.interval_s
            if minutes <= 0 or abs(steps - round(steps)) > 1e-9:
                raise ValueError(f"window {minutes} min is not a positive multiple of "
                                 f"interval_s = {self.interval_s}")
        return self


class ClockCheckConfig(BaseModel):
    """The clock-chain check: per-chunk template offsets and a verdict."""

    model_config = _FROZEN
    chunk_seconds: float | None = 60.0
    """Chunk length for per-chunk offsets; None: close chunks by accumulated signal."""
    tolerance_cycles: float = Field(default=0.02, gt=0, lt=0.5)
    """20 milliperiods: common practice for folding high-energy photons."""
    tolerance_us: float | None = Field(default=None, gt=0)
    """An absolute tolerance in µs as well (the tighter of the two applies)."""
    every_s: float = Field(default=10.0, gt=0)
    """Cadence of the clock check, s."""


class BarycentreConfig(BaseModel):
    """The barycentre correction tables (piecewise Chebyshev)."""

    model_config = _FROZEN
    segment_minutes: float = Field(default=60.0, gt=0)
    """Length of one table segment, minutes."""
    degree: int = Field(default=10, ge=3, le=30)
    """Degree 10 over one hour interpolates to ~1e-4 ns at a ground site."""
    shapiro_bodies: tuple[Literal["sun", "jupiter"], ...] = ("sun",)
    """Bodies whose Shapiro delay is included."""
    hours_before: float = Field(default=12.0, ge=0)
    """Table coverage before the start of the service, hours."""
    hours_after: float = Field(default=36.0, gt=0)
    """Tables cover [now - before, now + after] at start and are extended ahead of
    need in the background, never on the hot path."""
    cover_from: str | None = None
    """UTC start of the table coverage instead of now - hours_before (for replays)."""
    cover_until: str | None = None
    """UTC end of the table coverage instead of now + hours_after."""


class OutputConfig(BaseModel):
    """Where and how results are written."""

    model_config = _FROZEN
    directory: Path = Path("turnstamp-out")
    """Output folder (relative to the configuration file)."""
    rotate_minutes: float = Field(default=60.0, gt=0)
    """Start a new file of each stream after this many minutes."""
    rotate_megabytes: float = Field(default=512.0, gt=0)
    """Start a new file of each stream after this many megabytes."""
    publish_endpoint: str | None = None
    """ZeroMQ PUB endpoint for live viewers (bound, loopback by default)."""
    checkpoint_every_s: float = Field(default=5.0, gt=0)
    """Cadence of the checkpoint a restart resumes from, s."""


class ServiceConfig(BaseModel):
    """The whole configuration of ``turnstamp run``."""

    model_config = _FROZEN
    intake: IntakeConfig = IntakeConfig()
    """Where the event stream comes in."""
    site: SiteConfig
    """The observatory (required: barycentric times depend on it)."""
    targets: tuple[TargetConfig, ...] = Field(min_length=1)
    """The pulsars to watch."""
    statistics: StatisticsConfig = StatisticsConfig()
    """Periodicity statistics."""
    clock_check: ClockCheckConfig = ClockCheckConfig()
    """The clock-chain check."""
    barycentre: BarycentreConfig = BarycentreConfig()
    """Barycentre correction tables."""
    output: OutputConfig = OutputConfig()
    """Output files and live updates."""
    control: ControlConfig = ControlConfig()
    """The control socket."""

    @model_validator(mode="after")
    def _unique_targets(self):
        names = [t.name for t in self.targets]
        if len(set(names)) != len(names):
            raise ValueError(f"target names must be unique: {names}")
        return self


class SiteFile(BaseModel):
    """Any file with a [site] table: a site-only file or a whole service configuration
    (its other tables are ignored)."""

    model_config = ConfigDict(frozen=True, extra="ignore")
    site: SiteConfig

    @model_validator(mode="before")
    @classmethod
    def _has_site(cls, data):
        if isinstance(data, dict) and "site" not in data:
            kind = " (this looks like a spin model)" if "frequency_hz" in data else ""
            raise ValueError(f"no [site] table{kind}: give a site file (a [site] table with "
                             "name, latitude_deg, longitude_deg, height_m) or a service "
                             "configuration")
        return data


def _resolve(data, base: Path):
    """Make relative paths in the known path fields absolute against ``base``."""
    path_keys = {"file", "orbit_file", "earth_orientation_file", "ephemeris_file", "template",
                 "directory", "server_secret_key_file", "authorized_clients_directory"}
    if isinstance(data, dict):
        out = {}
        for key, value in data.items():
            if key in path_keys and isinstance(value, str):
                out[key] = str((base / value).expanduser()) if not Path(value).is_absolute() \
                    else value
            elif key == "models" and isinstance(value, list):
                out[key] = [str(base / v) if not Path(v).is_absolute() else v for v in value]
            else:
                out[key] = _resolve(value, base)
        return out
    if isinstance(data, list):
        return [_resolve(v, base) for v in data]
    return data


def load_config(path: str | Path, model: type[BaseModel] = ServiceConfig):
    """Read and validate a configuration file; errors name the field and value."""
    from .files.inputs import validate

    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ConfigError("config", str(path), f"cannot read: {exc.strerror or exc}") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError("config", str(path), f"not valid TOML: {exc}") from None
    return validate(model, _resolve(data, path.parent.resolve()), str(path), ConfigError)


def load_site(path: str | Path) -> SiteConfig:
    """The [site] table of a TOML file (a site-only file or a service configuration)."""
    return load_config(path, SiteFile).site
