"""Spin models: a pulsar's rotation in turnstamp's own schema (stored as TOML or JSON).

Theory of operation
-------------------
The model phase at emission time t (TDB at the solar-system barycentre) is::

    phase(t) = P(t) - P(t_zero)
    P(t)     = sum_k f_(k-1) (t - t_ref)^k / k!           spin polynomial, f_0 = frequency
             + sum_glitches [dphi + df dt + df' dt^2/2 + sum_r df_r tau_r (1 - exp(-dt/tau_r))]
             + sum_j [a_j sin(2 pi j (t - t_ref)/T) + b_j cos(...)]   timing-noise harmonics

with dt = t - t_glitch for t after the glitch (the usual glitch model of a phase
step, permanent frequency and derivative steps and exponentially recovering
frequency steps; e.g. Yu et al. 2013, MNRAS 429, 688, from memory), and t the
emission time: the barycentric arrival time minus the binary delay (``orbit``).
Phase zero is at ``phase_zero_mjd_tdb`` (default: the reference epoch). Numbers are
read from their text as exact decimals. The phase itself is evaluated by
:class:`turnstamp.core.phase.PhaseCalculator`; ``spin_down_summary`` gives the
quantities astronomers derive from the frequency and its derivatives.
"""

from __future__ import annotations

import hashlib
import json
import math
from decimal import Decimal
from typing import Annotated, Literal

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, field_validator, model_validator

from .orbit import BinaryParameters

__all__ = [
    "SpinModel",
    "SkyTarget",
    "Glitch",
    "GlitchRecovery",
    "TimingNoise",
    "ValidityWindow",
    "ExactDecimal",
    "spin_down_summary",
    "stated_half_unit",
    "digit_warnings",
    "MOMENT_OF_INERTIA_G_CM2",
    "PHASE_DIGITS_LIMIT_CYCLES",
]

MOMENT_OF_INERTIA_G_CM2 = 1e45  # canonical neutron star (Lorimer & Kramer 2005, ch. 3; from memory)
SURFACE_FIELD_CONSTANT_G = 3.2e19  # B_s = 3.2e19 sqrt(P Pdot) gauss, conventional rounding
JULIAN_YEAR_S = 31_557_600.0
PHASE_DIGITS_LIMIT_CYCLES = Decimal("0.01")
"""Phase uncertainty over the validity window (cycles) that the stated digits of the
frequency and of each derivative may leave before ``digit_warnings`` warns."""
_DAY = Decimal(86_400)
_MJD_AT_EPOCH = Decimal("51544.5")


def _exact(value):
    """Accept text, int or Decimal exactly; floats via their shortest repr."""
    if isinstance(value, bool):
        raise ValueError("expected a number")
    if isinstance(value, float):
        value = repr(value)
    try:
        result = Decimal(value) if isinstance(value, str | int | Decimal) else None
    except ArithmeticError:
        result = None
    if result is None or not result.is_finite():
        raise ValueError(f"expected a finite decimal number, got {value!r}")
    return result


ExactDecimal = Annotated[Decimal, BeforeValidator(_exact)]
_FROZEN = ConfigDict(frozen=True, extra="forbid")


def _mjd_seconds(mjd: Decimal) -> Decimal:
    """Exact TDB seconds since 2000-01-01T12:00:00."""
    return (mjd - _MJD_AT_EPOCH) * _DAY


class SkyTarget(BaseModel):
    """Name and ICRS position of the pulsar, with proper motion and parallax."""

    model_config = _FROZEN
    name: str = Field(min_length=1, max_length=64)
    right_ascension_deg: float = Field(ge=0, lt=360)
    declination_deg: float = Field(ge=-90, le=90)
    position_epoch_mjd_tdb: ExactDecimal = Decimal("51544.5")
    proper_motion_ra_mas_per_yr: float = 0.0  # mu_alpha * cos(delta)
    proper_motion_dec_mas_per_yr: float = 0.0
    parallax_mas: float = Field(default=0.0, ge=0)


class GlitchRecovery(BaseModel):
    """An exponentially decaying frequency step."""

    model_config = _FROZEN
    frequency_step_hz: float
    timescale_days: float = Field(gt=0)


class Glitch(BaseModel):
    """A sudden spin-up: phase, frequency and derivative steps plus recoveries."""

    model_config = _FROZEN
    epoch_mjd_tdb: ExactDecimal
    phase_step_cycles: float = 0.0
    frequency_step_hz: float = 0.0
    frequency_derivative_step_hz_per_s: float = 0.0
    recoveries: tuple[GlitchRecovery, ...] = ()


class TimingNoise(BaseModel):
    """Harmonically related sinusoids absorbing slow wander of the phase (cycles)."""

    model_config = _FROZEN
    fundamental_period_days: float = Field(gt=0)
    sine_cycles: tuple[float, ...] = ()
    cosine_cycles: tuple[float, ...] = ()

    @model_validator(mode="after")
    def _same_length(self):
        if len(self.sine_cycles) != len(self.cosine_cycles) or not self.sine_cycles:
            raise ValueError(
                f"sine_cycles ({len(self.sine_cycles)} terms) and cosine_cycles "
                f"({len(self.cosine_cycles)} terms) must have the same, non-zero length")
        return self


class ValidityWindow(BaseModel):
    """Instants (MJD, TDB) between which the model was fitted or is trusted."""

    model_config = _FROZEN
    start_mjd_tdb: ExactDecimal
    end_mjd_tdb: ExactDecimal

    @model_validator(mode="after")
    def _ordered(self):
        if self.end_mjd_tdb <= self.start_mjd_tdb:
            raise ValueError(f"end_mjd_tdb = {self.end_mjd_tdb} must be after "
                             f"start_mjd_tdb = {self.start_mjd_tdb}")
        return self


class SpinModel(BaseModel):
    """A pulsar's spin model in turnstamp's own schema (stored as TOML or JSON)."""

    model_config = _FROZEN
    schema_version: Literal[1] = 1
    model_id: str = Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9._+-]{0,63}$")
    target: SkyTarget
    reference_epoch_mjd_tdb: ExactDecimal
    frequency_hz: ExactDecimal
    frequency_derivatives: tuple[ExactDecimal, ...] = ()
    """d^k f/dt^k for k = 1, 2, ...: Hz/s, Hz/s^2, ..."""
    phase_zero_mjd_tdb: ExactDecimal | None = None
    validity: ValidityWindow
    glitches: tuple[Glitch, ...] = ()
    timing_noise: TimingNoise | None = None
    binary: BinaryParameters | None = None
    provenance: dict[str, str] = Field(default_factory=dict)

    @model_validator(mode="before")
    @classmethod
    def _a_spin_model(cls, data):
        """A file of another kind, said as such rather than as a list of missing fields."""
        if isinstance(data, dict) and "frequency_hz" not in data:
            for table, kind in (("site", "a site file or a service configuration"),
                                ("components", "a pulse template"),
                                ("binned_profile", "a pulse template")):
                if table in data:
                    raise ValueError(f"this is {kind} (it has '{table}'), not a spin model")
        return data

    @field_validator("frequency_hz")
    @classmethod
    def _positive_frequency(cls, value):
        if not Decimal(0) < value <= Decimal(4000):
            raise ValueError(f"must be in (0, 4000] Hz, got {value}")
        return value

    @model_validator(mode="after")
    def _sane(self):
        if len(self.frequency_derivatives) > 12:
            raise ValueError("frequency_derivatives: at most 12 terms")
        if self.frequency_derivatives:
            first = abs(self.frequency_derivatives[0])
            if first > self.frequency_hz * Decimal("1e-6"):
                raise ValueError(f"frequency_derivatives[0] = {self.frequency_derivatives[0]}: "
                                 "implausibly large for the frequency (|fdot|/f > 1e-6 /s)")
        epochs = [g.epoch_mjd_tdb for g in self.glitches]
        if epochs != sorted(epochs):
            raise ValueError("glitches must be listed in time order")
        return self

    def phase_reference_key(self) -> str:
        """A fingerprint of everything that fixes phase; states from models with
        different keys cannot be stacked."""
        fields = self.model_dump(mode="json", exclude={"model_id", "validity", "provenance"})
        fields["target"].pop("name", None)
        blob = json.dumps(fields, sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(blob.encode()).hexdigest()[:20]

    def sky_position_args(self) -> dict:
        """Keyword arguments of ``barycentre.SkyPosition`` for this model's target."""
        t = self.target
        return {
            "right_ascension_deg": t.right_ascension_deg,
            "declination_deg": t.declination_deg,
            "position_epoch_s": float(_mjd_seconds(t.position_epoch_mjd_tdb)),
            "proper_motion_ra_mas_per_yr": t.proper_motion_ra_mas_per_yr,
            "proper_motion_dec_mas_per_yr": t.proper_motion_dec_mas_per_yr,
            "parallax_mas": t.parallax_mas,
        }


def spin_down_summary(model: SpinModel) -> dict[str, float | str | None]:
    """The spin-down summary of a model: period, period derivative, spin-down power,
    characteristic age, surface dipole field and braking index (Lorimer & Kramer 2005,
    ch. 3; from memory), and the validity window.

    Conventions: I = 1e45 g cm^2, B_s = 3.2e19 sqrt(P Pdot) G. The spin-down power
    -4 pi^2 I f fdot is negative for a pulsar spinning up (fdot > 0), which then has
    no characteristic age or dipole field.
    """
    f = float(model.frequency_hz)
    derivatives = [float(d) for d in model.frequency_derivatives]
    fdot = derivatives[0] if derivatives else 0.0
    out: dict[str, float | str | None] = {
        "frequency_hz": f,
        "period_s": 1.0 / f,
        "period_derivative": -fdot / f**2,
        "spin_down_power_erg_per_s": -4 * math.pi**2 * MOMENT_OF_INERTIA_G_CM2 * f * fdot,
        "characteristic_age_yr": (-f / (2 * fdot) / JULIAN_YEAR_S) if fdot < 0 else None,
        "surface_dipole_field_gauss": (SURFACE_FIELD_CONSTANT_G * math.sqrt(-fdot / f**3))
        if fdot < 0 else None,
        "braking_index": (f * derivatives[1] / fdot**2) if len(derivatives) > 1 and fdot else None,
        "valid_from_mjd_tdb": str(model.validity.start_mjd_tdb),
        "valid_until_mjd_tdb": str(model.validity.end_mjd_tdb),
    }
    return out


def stated_half_unit(value: Decimal) -> Decimal:
    """Half a unit in the last stated digit of ``value`` ("87.65" -> 0.005).

    The digits are those written in the model file (an exact decimal keeps them;
    a TOML float keeps its shortest repr, so trailing zeros are not counted).
    """
    return Decimal(5).scaleb(value.as_tuple().exponent - 1)


def digit_warnings(model: SpinModel,
                   limit_cycles: Decimal = PHASE_DIGITS_LIMIT_CYCLES) -> list[str]:
    """Warnings for a frequency or derivative stated with too few digits.

    The k-th derivative of the frequency (k = 0: the frequency itself) known to half
    a unit in its last digit, d_k, moves phase by up to d_k T^(k+1) / (k+1)! over a
    validity window of length T (s). A warning names each term for which that
    exceeds ``limit_cycles`` (0.01 cycles: common practice for folding).

    Returns
    -------
    list of str
        One sentence per term, naming the field, the value as written, the phase
        uncertainty it leaves (cycles) and the window length (days).
    """
    window_s = (model.validity.end_mjd_tdb - model.validity.start_mjd_tdb) * _DAY
    terms = [("frequency_hz", model.frequency_hz)] + [
        (f"frequency_derivatives[{k}]", d) for k, d in enumerate(model.frequency_derivatives)]
    out = []
    for order, (field, value) in enumerate(terms):
        if value.is_zero():
            continue  # a term written as zero is absent, not imprecise
        cycles = stated_half_unit(value) * window_s ** (order + 1) / math.factorial(order + 1)
        if cycles > limit_cycles:
            out.append(
                f"{model.model_id}: {field} = {value} is stated to ±{stated_half_unit(value)} "
                f"(half its last digit): up to {float(cycles):.3g} cycles of phase over the "
                f"{float(window_s / _DAY):g}-day validity window (limit {limit_cycles} cycles); "
                "give more digits, as a string to keep every one")
    return out
