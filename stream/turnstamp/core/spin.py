"""Spin models: the rotational phase of a pulsar at barycentric instants.

Theory of operation
-------------------
The model phase at emission time t (TDB at the solar-system barycentre) is::

    phase(t) = P(t) - P(t_zero)
    P(t)     = sum_k f_(k-1) (t - t_ref)^k / k!           spin polynomial, f_0 = frequency
             + sum_glitches [dphi + df dt + df' dt^2/2 + sum_r df_r tau_r (1 - exp(-dt/tau_r))]
             + sum_j [a_j sin(2 pi j (t - t_ref)/T) + b_j cos(...)]   timing-noise harmonics

with dt = t - t_glitch for t after the glitch (REFERENCES.md §6), and t the
emission time: the barycentric arrival time minus the binary delay (``orbit``).
Phase zero is at ``phase_zero_mjd_tdb`` (default: the reference epoch).

Numerics. Phase reaches 1e12 cycles (1 kHz over 30 years) and must be right to
1e-9 cycles, i.e. to 1 part in 1e21: beyond float64. The polynomial is
re-expanded about *anchors* every ``ANCHOR_S`` = 6 h from the reference epoch.
At an anchor, the value and first derivative come from double-double Horner
sums of the exact decimal coefficients; per event only one double-double
product (frequency at the anchor times the offset from it, |offset| <= 3 h)
and a float64 tail of small terms remain. Glitch and noise terms are small
(<= 1e5 cycles) and evaluated in float64 (error < 1e-11 cycles).
"""

from __future__ import annotations

import hashlib
import json
import math
from decimal import Decimal, localcontext
from typing import Annotated, Literal

import numpy as np
from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, field_validator, model_validator

from .flags import Quality
from .orbit import BinaryParameters, emission_delay
from .timebase import NS_PER_S, mjd_to_ns, seconds_to_ns
from .twofloat import dd_add, dd_from_decimal, dd_to_decimal, floor_and_fraction, two_prod, two_sum

__all__ = [
    "SpinModel",
    "SkyTarget",
    "Glitch",
    "GlitchRecovery",
    "TimingNoise",
    "ValidityWindow",
    "PhasePredictor",
    "derived_quantities",
    "MOMENT_OF_INERTIA_G_CM2",
]

ANCHOR_S = 21_600
MOMENT_OF_INERTIA_G_CM2 = 1e45  # canonical neutron star (Lorimer & Kramer 2005, ch. 3; from memory)
SURFACE_FIELD_CONSTANT_G = 3.2e19  # B_s = 3.2e19 sqrt(P Pdot) gauss, conventional rounding
JULIAN_YEAR_S = 31_557_600.0
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
        t = self.target
        return {
            "right_ascension_deg": t.right_ascension_deg,
            "declination_deg": t.declination_deg,
            "position_epoch_s": float(_mjd_seconds(t.position_epoch_mjd_tdb)),
            "proper_motion_ra_mas_per_yr": t.proper_motion_ra_mas_per_yr,
            "proper_motion_dec_mas_per_yr": t.proper_motion_dec_mas_per_yr,
            "parallax_mas": t.parallax_mas,
        }


def derived_quantities(model: SpinModel) -> dict[str, float | str | None]:
    """Period, period derivative, spin-down power, characteristic age, surface
    dipole field and braking index (Lorimer & Kramer 2005, ch. 3; from memory).

    Conventions: I = 1e45 g cm^2, B_s = 3.2e19 sqrt(P Pdot) G.
    """
    f = float(model.frequency_hz)
    derivatives = [float(d) for d in model.frequency_derivatives]
    fdot = derivatives[0] if derivatives else 0.0
    out: dict[str, float | str | None] = {
        "frequency_hz": f,
        "period_s": 1.0 / f,
        "period_derivative": -fdot / f**2,
        "spin_down_power_erg_per_s": 4 * math.pi**2 * MOMENT_OF_INERTIA_G_CM2 * f * abs(fdot),
        "characteristic_age_yr": (-f / (2 * fdot) / JULIAN_YEAR_S) if fdot < 0 else None,
        "surface_dipole_field_gauss": (SURFACE_FIELD_CONSTANT_G * math.sqrt(-fdot / f**3))
        if fdot < 0 else None,
        "braking_index": (f * derivatives[1] / fdot**2) if len(derivatives) > 1 and fdot else None,
        "valid_from_mjd_tdb": str(model.validity.start_mjd_tdb),
        "valid_until_mjd_tdb": str(model.validity.end_mjd_tdb),
    }
    return out


class PhasePredictor:
    """Compiled, vectorised phase evaluation for one ``SpinModel``."""

    def __init__(self, model: SpinModel):
        self.model = model
        self.model_id = model.model_id
        with localcontext() as ctx:
            ctx.prec = 60
            self._ref_ns, rem = mjd_to_ns(model.reference_epoch_mjd_tdb)
            self._ref_rem_s = float(rem)
            frequencies = [model.frequency_hz, *model.frequency_derivatives]
            # Taylor coefficients of P(t): c_k = f_(k-1) / k!, k = 1..K (exact decimals)
            self._coefficients = [Decimal(0)] + [
                f / math.factorial(k + 1) for k, f in enumerate(frequencies)]
        self._anchor_cache: dict[int, tuple] = {}
        self._glitches = [
            (mjd_to_ns(g.epoch_mjd_tdb), g) for g in model.glitches]
        lo, hi = (mjd_to_ns(model.validity.start_mjd_tdb)[0],
                  mjd_to_ns(model.validity.end_mjd_tdb)[0])
        self.valid_from_ns, self.valid_until_ns = lo, hi
        if model.binary is not None:
            self._binary_ns, binary_rem = seconds_to_ns(model.binary.epoch_tdb_seconds)
            self._binary_rem_s = float(binary_rem)
        # phase zero: evaluate the model there, then fold it into every anchor
        self._zero = Decimal(0)
        zero_ns, zero_rem = mjd_to_ns(model.phase_zero_mjd_tdb or model.reference_epoch_mjd_tdb)
        hi, lo, _ = self._raw_phase(np.array([zero_ns]), np.array([float(zero_rem)]), False)
        self._zero = dd_to_decimal(float(hi[0]), float(lo[0]))
        self._anchor_cache.clear()

    # -- anchors ------------------------------------------------------------------
    def _anchor(self, index: int):
        """Taylor coefficients of the phase about anchor ``index``.

        Returns (a0, a1 per ns, a1 per s, [a2, a3, ...]): a0 = P(anchor) - P(t_zero)
        and the first derivatives as double-doubles, the rest as float64 (per s^m).
        """
        cached = self._anchor_cache.get(index)
        if cached is not None:
            return cached
        with localcontext() as ctx:
            ctx.prec = 60
            t = Decimal(index * ANCHOR_S) - Decimal(self._ref_rem_s)
            c = self._coefficients
            degree = len(c) - 1
            taylor = []
            for m in range(degree + 1):
                total = Decimal(0)
                for k in range(degree, m - 1, -1):  # Horner in t
                    total = total * t + c[k] * math.comb(k, m)
                taylor.append(total)
            a0 = dd_from_decimal(taylor[0] - self._zero)
            a1_per_ns = dd_from_decimal(taylor[1] / NS_PER_S)
        result = (a0, a1_per_ns, dd_from_decimal(taylor[1]),
                  np.array([float(x) for x in taylor[2:]]))
        if len(self._anchor_cache) > 4096:
            self._anchor_cache.clear()
        self._anchor_cache[index] = result
        return result

    # -- evaluation ---------------------------------------------------------------
    def _raw_phase(self, tdb_ns, extra_s, binary=True):
        """Phase as a double-double (hi, lo) and flags at barycentric instants
        tdb_ns + extra_s (emission times after removing the binary delay)."""
        flags = np.zeros(tdb_ns.shape, np.uint32)
        if binary and self.model.binary is not None:
            # whole seconds (exact in float64) apart from the rest keeps the orbital
            # phase exact however many orbits have passed
            whole_s, rest_ns = np.divmod(tdb_ns - self._binary_ns, NS_PER_S)
            delay, converged = emission_delay(
                self.model.binary, whole_s.astype(np.float64),
                rest_ns * 1e-9 + (extra_s - self._binary_rem_s))
            extra_s = extra_s - delay
            flags |= np.where(converged, 0, Quality.BINARY_NOT_CONVERGED).astype(np.uint32)
        anchor_ns = ANCHOR_S * NS_PER_S
        since = tdb_ns - self._ref_ns
        index = (since + anchor_ns // 2) // anchor_ns
        offset_ns = (since - index * anchor_ns).astype(np.float64)  # exact: |offset| < 2**53
        first, last = (int(index.min()), int(index.max())) if index.size else (0, 0)
        if first == last:  # the usual case: a batch within one 6-hour anchor
            a0, a1n, a1, tail = self._anchor(first)
            (a0_hi, a0_lo), (a1n_hi, a1n_lo), (a1_hi, a1_lo) = a0, a1n, a1
        else:
            if last - first > 4 * index.size + 16:
                keys, position = np.unique(index, return_inverse=True)
            else:
                keys, position = np.arange(first, last + 1), index - first
            anchors = [self._anchor(int(k)) for k in keys]
            a0_hi, a0_lo, a1n_hi, a1n_lo, a1_hi, a1_lo = (
                np.array([a[i][j] for a in anchors])[position]
                for i in range(3) for j in range(2))
            tail = np.stack([a[3] for a in anchors], axis=1)[:, position]
        # a1 * offset: exactly for the whole-ns part (up to 3 h, 1e7 cycles at 1 kHz);
        # the extra part (|extra| < ~600 s) in float64, good to 7e-11 cycles at 1 kHz
        t1_hi, t1_lo = two_prod(a1n_hi, offset_ns)
        t1_lo += a1n_lo * offset_ns
        t2 = (a1_hi + a1_lo) * extra_s
        # float64 tail: sum_{m>=2} a_m d^m (Horner), plus glitches and noise
        d = offset_ns * 1e-9 + extra_s
        small = np.zeros_like(d)
        for m in range(len(tail) - 1, -1, -1):
            small += tail[m]
            small *= d
        small *= d
        small += self._glitch_phase(tdb_ns, extra_s) + self._noise_phase(since, extra_s)
        hi, lo = two_sum(t1_hi, t2)
        lo += t1_lo + small
        hi, lo = dd_add(a0_hi, a0_lo, hi, lo)
        return hi, lo, flags

    def _glitch_phase(self, tdb_ns, extra_s):
        total = np.zeros(tdb_ns.shape)
        for (epoch_ns, epoch_rem), g in self._glitches:
            dt = (tdb_ns - epoch_ns) * 1e-9 + (extra_s - float(epoch_rem))
            after = dt > 0
            if not after.any():
                continue
            dt = np.where(after, dt, 0.0)
            term = (g.phase_step_cycles + g.frequency_step_hz * dt
                    + 0.5 * g.frequency_derivative_step_hz_per_s * dt * dt)
            for r in g.recoveries:
                tau = r.timescale_days * 86_400.0
                term = term + r.frequency_step_hz * tau * -np.expm1(-dt / tau)
            total += np.where(after, term, 0.0)
        return total

    def _noise_phase(self, since_ns, extra_s):
        noise = self.model.timing_noise
        if noise is None:
            return 0.0
        t = since_ns * 1e-9 + (extra_s - self._ref_rem_s)
        omega = 2 * np.pi / (noise.fundamental_period_days * 86_400.0)
        total = np.zeros(t.shape)
        for j, (a, b) in enumerate(zip(noise.sine_cycles, noise.cosine_cycles, strict=True), 1):
            total += a * np.sin(j * omega * t) + b * np.cos(j * omega * t)
        return total

    def phase(self, tdb_ns, extra_s=None):
        """Rotational phase at barycentric arrival instants.

        Parameters
        ----------
        tdb_ns : int64 array
            Barycentric arrival instants, whole ns since 2000-01-01T12:00:00 TDB.
        extra_s : float64 array, optional
            Sub-nanosecond and not-yet-added parts (seconds), e.g. the
            barycentric correction when ``tdb_ns`` still holds TT at the site.

        Returns
        -------
        pulse_number : int64 array
        phase : float64 array in [0, 1) (cycles)
        flags : uint32 array (OUTSIDE_MODEL_VALIDITY, BINARY_NOT_CONVERGED)
        """
        tdb_ns = np.asarray(tdb_ns, dtype=np.int64)
        extra_s = np.zeros(tdb_ns.shape) if extra_s is None else np.asarray(extra_s, np.float64)
        hi, lo, flags = self._raw_phase(tdb_ns, extra_s)
        outside = (tdb_ns < self.valid_from_ns) | (tdb_ns > self.valid_until_ns)
        flags |= np.where(outside, Quality.OUTSIDE_MODEL_VALIDITY, 0).astype(np.uint32)
        pulse, fraction = floor_and_fraction(hi, lo)
        return pulse, fraction, flags

    def frequency_at(self, tdb_ns) -> np.ndarray:
        """Apparent spin frequency (Hz, float64) at barycentric instants, without
        glitches or the binary Doppler factor (for converting cycles to time)."""
        since = (np.asarray(tdb_ns, dtype=np.int64) - self._ref_ns) * 1e-9
        f = np.zeros(since.shape)
        for k, coefficient in enumerate(self._coefficients[1:], 1):
            f = f + k * float(coefficient) * since ** (k - 1)
        return f
