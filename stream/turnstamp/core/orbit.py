"""Binary-orbit delays: the light-travel and relativistic delays across a pulsar's orbit.

Theory of operation
-------------------
A pulsar in a binary system moves around the binary's centre of mass. A pulse emitted
at time t (TDB seconds since the orbit's epoch, in the frame of the binary's centre of
mass, i.e. after the solar-system barycentric correction) reaches that centre later by

    Δ(t) = Δ_R + Δ_E + Δ_S            t_arrival = t_emission + Δ(t_emission)

    Δ_R   Roemer delay: light-travel time across the orbit; amplitude x = a₁ sin i / c (s)
    Δ_E   Einstein delay: gravitational redshift and time dilation; amplitude γ (s)
    Δ_S   Shapiro delay in the companion's field; r = T⊙ m₂ (s), s = sin i

A positive delay means the pulse arrives later. Three orbit kinds are supported:

    keplerian          Blandford & Teukolsky (1976, ApJ 205, 580): a Keplerian ellipse,
                       Δ = x sin ω (cos E − e) + (x cos ω √(1−e²) + γ) sin E,
                       M = 2π[t/P_b − ½ Ṗ_b (t/P_b)²], E − e sin E = M, ω = ω₀ + ω̇ t.
    low_eccentricity   Lange et al. (2001, MNRAS 326, 274): first order in e, with the
                       Laplace–Lagrange parameters ε₁ = e sin ω, ε₂ = e cos ω and the
                       ascending-node epoch; Φ = 2π[t/P_b − ½ Ṗ_b (t/P_b)²],
                       Δ_R = x [sin Φ + (ε₂/2) sin 2Φ − (ε₁/2) cos 2Φ],
                       Δ_S = −2r ln(1 − s sin Φ). Neglected terms are of order x e².
    relativistic       Damour & Deruelle (1985, AIHP 43, 107; 1986, AIHP 44, 263):
                       u the eccentric anomaly, A_e(u) the true anomaly accumulated over
                       orbits, ω = ω₀ + k A_e(u), k = ω̇ P_b / (2π),
                       Δ_R = x sin ω [cos u − e(1 + δ_r)] + x [1 − e²(1 + δ_θ)²]^½ cos ω sin u,
                       Δ_E = γ sin u,
                       Δ_S = −2r ln{1 − e cos u − s [sin ω (cos u − e) + √(1−e²) cos ω sin u]}.

Conventions: angles are degrees in the parameter models and radians inside; a year is
the Julian year of 365.25 days; T⊙ = GM⊙/c³ from the IAU 2015 nominal solar mass
parameter. Each model's epoch (periastron, or ascending node) is an exact ``Decimal``
MJD in TDB; ``epoch_tdb_seconds`` gives it as seconds since 2000-01-01T12:00:00 TDB, and
the evaluation functions take times as float64 seconds since that epoch.

Numerics. The orbital phase is formed from ``fmod(t, P_b)``, which is exact, so phase
precision is set by the time argument, not by the number of orbits elapsed. Kepler's
equation is solved by vectorised Newton iteration on |M| in [0, π] (E is odd in M).
There f(E) = E − e sin E − M is increasing and convex, so Newton's method started right
of the root decreases monotonically onto it for any e < 1. The cold start is the
smallest of three points known to lie right of the root: one Newton step from E = M,
M + e, and π. The root stays bracketed by [M, min(M + e, π)], narrowed at each step;
a step leaving the bracket is replaced by bisection, which makes warm starts from a
nearby solved point (used between emission-time iterations) safe as well. Iteration
stops once the largest step is below min(1e-8, √(2e-16 (1−e)/e)) rad, after which the
quadratic-convergence error is at rounding level (~1e-16 rad, growing as 1/(1 − e cos E)
near periastron of very eccentric orbits, as the problem's own conditioning does).

Emission time. Photon arrival times are known, the delay is a function of the emission
time, so ``emission_delay`` solves t_e + Δ(t_e) = t_a by fixed-point iteration on the
delay d ← Δ(t_a − d). Each step shrinks the error by about the orbital speed v/c, so a
few steps reach 1e-12 s. Iterating on the (small) delay rather than on t_e keeps the
stopping test free of the rounding of large time values. Elements that have not settled
after 12 steps (orbital speeds near c, non-finite times, or a Shapiro delay diverging at
an exact conjunction with sin i = 1) are returned flagged, never raised.
"""

from __future__ import annotations

import math
from decimal import Decimal, localcontext
from functools import lru_cache
from typing import Annotated, Literal, NamedTuple

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, model_validator

__all__ = [
    "SOLAR_MASS_PARAMETER_M3_S2",
    "SPEED_OF_LIGHT_M_S",
    "SOLAR_MASS_TIME_S",
    "LOW_ECCENTRICITY_LIMIT",
    "EMISSION_TOLERANCE_S",
    "EMISSION_MAX_ITERATIONS",
    "KeplerianOrbit",
    "LowEccentricityOrbit",
    "RelativisticOrbit",
    "BinaryParameters",
    "DelayComponents",
    "BinaryDelay",
    "solve_kepler",
    "delay",
    "delay_components",
    "emission_delay",
]

# IAU 2015 Resolution B3 nominal solar mass parameter, and the defined speed of light.
SOLAR_MASS_PARAMETER_M3_S2 = 1.3271244e20
SPEED_OF_LIGHT_M_S = 299792458.0
#: T⊙ = GM⊙/c³ ≈ 4.925490947e-6 s: the Shapiro amplitude per solar mass is r = T⊙ m₂.
SOLAR_MASS_TIME_S = SOLAR_MASS_PARAMETER_M3_S2 / SPEED_OF_LIGHT_M_S**3

#: Largest eccentricity accepted by the low_eccentricity kind (dropped terms ~ x e²).
LOW_ECCENTRICITY_LIMIT = 0.1
#: The emission-time iteration stops for an element once its delay changes by less.
EMISSION_TOLERANCE_S = 1e-12
#: At most this many delay evaluations per element in ``emission_delay``.
EMISSION_MAX_ITERATIONS = 12

_SECONDS_PER_DAY = 86400.0
_SECONDS_PER_JULIAN_YEAR = 365.25 * 86400.0
_J2000_MJD = Decimal("51544.5")
_TWO_PI = 2.0 * math.pi
_KEPLER_MAX_ITERATIONS = 60
_ZERO = np.zeros(())  # an absent delay term, broadcast against the others (read-only)
_ZERO.flags.writeable = False


def _mjd_to_tdb_seconds(mjd: Decimal) -> Decimal:
    with localcontext() as context:
        context.prec = 60  # exact for any MJD written with up to ~50 digits
        return (mjd - _J2000_MJD) * 86400


# --------------------------------------------------------------------------------------
# Parameter models
# --------------------------------------------------------------------------------------


class _OrbitModel(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)


class _EccentricOrbitFields(_OrbitModel):
    """Fields shared by the keplerian and relativistic kinds."""

    orbital_period_days: float = Field(gt=0, description="Orbital period P_b (days).")
    orbital_period_derivative: float = Field(
        default=0.0, description="Orbital period derivative Ṗ_b (dimensionless, s/s)."
    )
    projected_semi_major_axis_lt_s: float = Field(
        ge=0, description="Projected semi-major axis x = a₁ sin i / c (light-seconds)."
    )
    eccentricity: float = Field(ge=0, lt=1, description="Orbital eccentricity e.")
    periastron_longitude_deg: float = Field(
        description="Longitude of periastron ω₀ at the periastron epoch (degrees)."
    )
    periastron_advance_deg_per_yr: float = Field(
        default=0.0, description="Periastron advance ω̇ (degrees per Julian year)."
    )
    periastron_epoch_mjd_tdb: Decimal = Field(
        description="Epoch of periastron T₀ (MJD, TDB), exact."
    )
    einstein_delay_s: float = Field(
        default=0.0, description="Einstein delay amplitude γ (seconds)."
    )

    @property
    def epoch_tdb_seconds(self) -> Decimal:
        """Periastron epoch as exact seconds since 2000-01-01T12:00:00 TDB."""
        return _mjd_to_tdb_seconds(self.periastron_epoch_mjd_tdb)


class KeplerianOrbit(_EccentricOrbitFields):
    """A Keplerian orbit with the Blandford & Teukolsky (1976) delay.

    Delay = Roemer + Einstein (γ sin E); no Shapiro term. The periastron longitude
    advances linearly in time, ω = ω₀ + ω̇ t.
    """

    kind: Literal["keplerian"] = "keplerian"


class LowEccentricityOrbit(_OrbitModel):
    """A nearly circular orbit, Lange et al. (2001), first order in the eccentricity.

    Delay = Roemer + binary Shapiro. Refuses e = √(ε₁² + ε₂²) > 0.1.
    """

    kind: Literal["low_eccentricity"] = "low_eccentricity"
    orbital_period_days: float = Field(gt=0, description="Orbital period P_b (days).")
    orbital_period_derivative: float = Field(
        default=0.0, description="Orbital period derivative Ṗ_b (dimensionless, s/s)."
    )
    projected_semi_major_axis_lt_s: float = Field(
        ge=0, description="Projected semi-major axis x = a₁ sin i / c (light-seconds)."
    )
    ascending_node_epoch_mjd_tdb: Decimal = Field(
        description="Epoch of the ascending node T_asc (MJD, TDB), exact."
    )
    eccentricity_sine: float = Field(description="ε₁ = e sin ω (dimensionless).")
    eccentricity_cosine: float = Field(description="ε₂ = e cos ω (dimensionless).")
    companion_mass_msun: float = Field(
        default=0.0, ge=0, description="Companion mass m₂ (solar masses)."
    )
    sin_inclination: float = Field(
        default=0.0, ge=0, le=1, description="Sine of the orbital inclination s = sin i."
    )

    @model_validator(mode="after")
    def _eccentricity_small(self) -> LowEccentricityOrbit:
        e = math.hypot(self.eccentricity_sine, self.eccentricity_cosine)
        if e > LOW_ECCENTRICITY_LIMIT:
            raise ValueError(
                f"eccentricity_sine = {self.eccentricity_sine!r}, eccentricity_cosine = "
                f"{self.eccentricity_cosine!r} give eccentricity {e:.6g} > "
                f"{LOW_ECCENTRICITY_LIMIT}: the low_eccentricity kind drops terms of order "
                f"x e²; use kind 'keplerian' (or 'relativistic') for this orbit"
            )
        return self

    @property
    def eccentricity(self) -> float:
        """e = √(ε₁² + ε₂²)."""
        return math.hypot(self.eccentricity_sine, self.eccentricity_cosine)

    @property
    def epoch_tdb_seconds(self) -> Decimal:
        """Ascending-node epoch as exact seconds since 2000-01-01T12:00:00 TDB."""
        return _mjd_to_tdb_seconds(self.ascending_node_epoch_mjd_tdb)


class RelativisticOrbit(_EccentricOrbitFields):
    """A relativistic orbit with the Damour & Deruelle (1985, 1986) delay.

    Delay = Roemer + Einstein + Shapiro. The periastron advances with the true anomaly,
    ω = ω₀ + k A_e(u), k = ω̇ P_b / (2π).
    """

    kind: Literal["relativistic"] = "relativistic"
    companion_mass_msun: float = Field(
        default=0.0, ge=0, description="Companion mass m₂ (solar masses)."
    )
    sin_inclination: float = Field(
        default=0.0, ge=0, le=1, description="Sine of the orbital inclination s = sin i."
    )
    radial_deformation: float = Field(
        default=0.0, description="Relativistic deformation of the radial orbit δ_r."
    )
    angular_deformation: float = Field(
        default=0.0, description="Relativistic deformation of the angular orbit δ_θ."
    )

    @model_validator(mode="after")
    def _deformed_eccentricity_below_one(self) -> RelativisticOrbit:
        e_theta = self.eccentricity * (1.0 + self.angular_deformation)
        if abs(e_theta) >= 1.0:
            raise ValueError(
                f"angular_deformation = {self.angular_deformation!r} with eccentricity = "
                f"{self.eccentricity!r} gives e(1 + δ_θ) = {e_theta:.6g}; it must be below 1"
            )
        return self


BinaryParameters = Annotated[
    KeplerianOrbit | LowEccentricityOrbit | RelativisticOrbit, Field(discriminator="kind")
]


# --------------------------------------------------------------------------------------
# Kepler's equation
# --------------------------------------------------------------------------------------


def _kepler_step_tolerance(e: float) -> float:
    """Newton step (rad) below which the solution is at rounding level.

    After a step δ the error left is at most e δ² / (2(1 − e)) (Newton's error bound with
    |f''| ≤ e and f' ≥ 1 − e), and the first-order update of sin E and cos E is off by
    at most δ²/2. Both are kept below ~1e-16.
    """
    return min(1e-8, math.sqrt(2e-16 * (1.0 - e) / e))


class _KeplerStart(NamedTuple):
    """A previous solution on the half orbit, used as a warm start: |M|, E(|M|), cos E."""

    reduced_mean: np.ndarray
    ecc_anomaly: np.ndarray
    cos_e: np.ndarray


def _kepler_half_orbit(
    mean_anomaly: np.ndarray, e: float, start: _KeplerStart | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Solve E − e sin E = M for M in [0, π] (0 < e < 1); return (E, sin E, cos E).

    Without ``start`` the iteration begins right of the root and Newton's method then
    decreases monotonically onto it (see the theory of operation). With ``start`` (a
    nearby solved point) it begins at the first-order prediction from there. Either
    way the root stays bracketed by [lo, hi], initially [M, min(M + e, π)], and a
    Newton step that would leave the bracket is replaced by bisection.
    """
    lo = mean_anomaly.copy()
    hi = mean_anomaly + e
    np.minimum(hi, math.pi, out=hi)
    if start is None:
        sin_e = np.sin(mean_anomaly)
        cos_e = np.cos(mean_anomaly)
        # One Newton step from E = M: right of the root by convexity (or capped by hi).
        ecc_anomaly = np.multiply(cos_e, -e)
        ecc_anomaly += 1.0
        np.divide(sin_e, ecc_anomaly, out=ecc_anomaly)
        ecc_anomaly *= e
        ecc_anomaly += mean_anomaly
    else:
        sin_e = np.empty_like(mean_anomaly)
        cos_e = np.multiply(start.cos_e, -e)
        cos_e += 1.0
        ecc_anomaly = mean_anomaly - start.reduced_mean
        ecc_anomaly /= cos_e
        ecc_anomaly += start.ecc_anomaly
        np.maximum(ecc_anomaly, lo, out=ecc_anomaly)
    np.minimum(ecc_anomaly, hi, out=ecc_anomaly)
    step, denominator = np.empty_like(ecc_anomaly), np.empty_like(ecc_anomaly)
    candidate, outside = np.empty_like(ecc_anomaly), np.empty(ecc_anomaly.shape, dtype=bool)
    tolerance = _kepler_step_tolerance(e)
    largest = math.nan
    for _ in range(_KEPLER_MAX_ITERATIONS):
        np.sin(ecc_anomaly, out=sin_e)
        np.cos(ecc_anomaly, out=cos_e)
        np.multiply(sin_e, -e, out=step)  # f(E) = E − e sin E − M
        step += ecc_anomaly
        step -= mean_anomaly
        # Shrink the bracket: f > 0 means E is right of the root.
        np.copyto(hi, ecc_anomaly, where=step > 0.0)
        np.copyto(lo, ecc_anomaly, where=step < 0.0)
        np.multiply(cos_e, -e, out=denominator)  # f'(E) = 1 − e cos E > 0
        denominator += 1.0
        step /= denominator
        np.subtract(ecc_anomaly, step, out=candidate)
        # A Newton step leaving [lo, hi] is replaced by bisection (never from a cold start).
        np.less(candidate, lo, out=outside)
        outside |= candidate > hi
        if outside.any():
            np.add(lo, hi, out=denominator)
            denominator *= 0.5
            np.copyto(candidate, denominator, where=outside)
            np.subtract(ecc_anomaly, candidate, out=step)
        ecc_anomaly, candidate = candidate, ecc_anomaly
        largest = max(float(step.max(initial=0.0)), -float(step.min(initial=0.0)))
        if largest < tolerance:
            # sin and cos at the updated E, to first order in the last step.
            np.multiply(step, cos_e, out=denominator)
            step *= sin_e
            sin_e -= denominator
            cos_e += step
            return ecc_anomaly, sin_e, cos_e
        if not math.isfinite(largest):
            break
    raise RuntimeError(f"Kepler iteration did not converge (e = {e!r}, last step {largest!r})")


def _kepler_centred(
    mean_anomaly: np.ndarray, e: float, start: _KeplerStart | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray, _KeplerStart | None]:
    """Solve Kepler's equation for M in [−π, π].

    Returns (E, sin E, cos E, warm start for a nearby M); ``start`` is such a warm
    start from an earlier call on the same elements. Non-finite M gives NaN.
    """
    if e == 0.0:
        return mean_anomaly, np.sin(mean_anomaly), np.cos(mean_anomaly), None
    finite = np.isfinite(mean_anomaly)
    if not finite.all():
        ecc_anomaly = np.full_like(mean_anomaly, np.nan)
        sin_e, cos_e = ecc_anomaly.copy(), ecc_anomaly.copy()
        partial = None if start is None else _KeplerStart(*(a[finite] for a in start))
        solved = _kepler_centred(mean_anomaly[finite], e, partial)
        ecc_anomaly[finite], sin_e[finite], cos_e[finite] = solved[:3]
        warm = _KeplerStart(*(np.full_like(mean_anomaly, np.nan) for _ in range(3)))
        assert solved[3] is not None
        for full, part in zip(warm, solved[3], strict=True):
            full[finite] = part
        return ecc_anomaly, sin_e, cos_e, warm
    # E(−M) = −E(M): solve for |M| in [0, π], then restore the signs of E and sin E.
    reduced = np.abs(mean_anomaly)
    np.minimum(reduced, math.pi, out=reduced)
    ecc_anomaly, sin_e, cos_e = _kepler_half_orbit(reduced, e, start)
    warm = _KeplerStart(reduced, ecc_anomaly.copy(), cos_e.copy())
    np.copysign(ecc_anomaly, mean_anomaly, out=ecc_anomaly)
    np.copysign(sin_e, mean_anomaly, out=sin_e)
    return ecc_anomaly, sin_e, cos_e, warm


def solve_kepler(mean_anomaly_rad: np.ndarray | float, eccentricity: float) -> np.ndarray:
    """Eccentric anomaly E (rad) with E − e sin E = M, for any real M.

    Parameters
    ----------
    mean_anomaly_rad : array_like of float
        Mean anomaly M (radians), any value; whole turns are carried over to E.
    eccentricity : float
        Eccentricity, 0 ≤ e < 1 (tested up to 0.99).

    Returns
    -------
    numpy.ndarray
        Eccentric anomaly E (radians), in the same turn as M, accurate to ~1e-15 rad
        for moderate e (rounding grows as 1/(1 − e cos E) near periastron at high e).
    """
    e = float(eccentricity)
    if not 0.0 <= e < 1.0:
        raise ValueError(f"eccentricity = {eccentricity!r}: must be in [0, 1)")
    mean = np.asarray(mean_anomaly_rad, dtype=float)
    turns = np.round(mean / _TWO_PI)
    reduced = np.clip(mean - _TWO_PI * turns, -math.pi, math.pi)
    ecc_anomaly = _kepler_centred(np.atleast_1d(reduced).astype(float), e)[0]
    return ecc_anomaly.reshape(mean.shape) + _TWO_PI * turns


# --------------------------------------------------------------------------------------
# Delay evaluation
# --------------------------------------------------------------------------------------


class DelayComponents(NamedTuple):
    """The binary delay split into its parts, all float64 arrays shaped like the input.

    Attributes
    ----------
    roemer_s, einstein_s, shapiro_s : numpy.ndarray
        Roemer, Einstein and Shapiro delays (seconds); zero where the kind has none.
    eccentric_anomaly_rad : numpy.ndarray
        E (keplerian) or u (relativistic), in [−π, π] about the nearest periastron;
        for the low_eccentricity kind the orbital phase Φ from the ascending node,
        in [−π, π].
    true_anomaly_rad : numpy.ndarray
        True anomaly in [−π, π] about the nearest periastron (Φ for low_eccentricity).
    orbits_completed : numpy.ndarray
        Whole orbits n (float holding integers) such that the mean anomaly (or Φ) is
        2π n + the angle above; the accumulated true anomaly is 2π n + true_anomaly_rad.
    """

    roemer_s: np.ndarray
    einstein_s: np.ndarray
    shapiro_s: np.ndarray
    eccentric_anomaly_rad: np.ndarray
    true_anomaly_rad: np.ndarray
    orbits_completed: np.ndarray

    @property
    def total_s(self) -> np.ndarray:
        """Total delay Roemer + Einstein + Shapiro (seconds)."""
        return self.roemer_s + self.einstein_s + self.shapiro_s


class BinaryDelay:
    """Binary-orbit delay compiled once from a parameter model.

    Converts the model to seconds and radians once; the methods then evaluate arrays of
    times without Python loops over events.

    Parameters
    ----------
    params : KeplerianOrbit | LowEccentricityOrbit | RelativisticOrbit
        The orbit. Times handed to the methods are TDB seconds since
        ``params.epoch_tdb_seconds``.
    """

    def __init__(self, params: KeplerianOrbit | LowEccentricityOrbit | RelativisticOrbit):
        if not isinstance(params, KeplerianOrbit | LowEccentricityOrbit | RelativisticOrbit):
            raise TypeError(f"expected an orbit parameter model, got {type(params).__name__}")
        self.params = params
        self.kind: str = params.kind
        self.period_s = params.orbital_period_days * _SECONDS_PER_DAY
        self.period_derivative = params.orbital_period_derivative
        self.semi_major_axis_s = params.projected_semi_major_axis_lt_s
        self.eccentricity = params.eccentricity
        if isinstance(params, LowEccentricityOrbit):
            self.eccentricity_sine = params.eccentricity_sine
            self.eccentricity_cosine = params.eccentricity_cosine
        else:
            self.periastron_longitude_rad = math.radians(params.periastron_longitude_deg)
            self.periastron_advance_rad_s = (
                math.radians(params.periastron_advance_deg_per_yr) / _SECONDS_PER_JULIAN_YEAR
            )
            self.einstein_s = params.einstein_delay_s
            self.sqrt_one_minus_e2 = math.sqrt(1.0 - self.eccentricity**2)
        if isinstance(params, LowEccentricityOrbit | RelativisticOrbit):
            self.shapiro_range_s = SOLAR_MASS_TIME_S * params.companion_mass_msun
            self.shapiro_shape = params.sin_inclination
        else:
            self.shapiro_range_s = 0.0
            self.shapiro_shape = 0.0
        if isinstance(params, RelativisticOrbit):
            # k = ω̇ P_b / (2π): periastron advance per radian of true anomaly.
            self.advance_per_anomaly = self.periastron_advance_rad_s * self.period_s / _TWO_PI
            self.radial_eccentricity = self.eccentricity * (1.0 + params.radial_deformation)
            self.angular_factor = math.sqrt(
                1.0 - (self.eccentricity * (1.0 + params.angular_deformation)) ** 2
            )

    # -- orbital phase ---------------------------------------------------------------

    def _orbit_phase(
        self, base: np.ndarray, offset: np.ndarray | None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Orbits since the epoch at t = base + offset, as (whole n, fraction in [−½, ½]).

        The linear term uses fmod(base, P_b), which is exact; the small offset and the
        Ṗ_b term are added to the fraction, which is then re-centred.
        """
        period = self.period_s
        with np.errstate(invalid="ignore"):  # non-finite times give NaN, flagged later
            remainder = np.fmod(base, period)
        whole = base - remainder
        whole /= period
        np.rint(whole, out=whole)
        fraction = remainder
        fraction /= period
        if offset is not None:
            fraction += offset / period
        if self.period_derivative != 0.0:
            orbits = (base if offset is None else base + offset) / period
            orbits *= orbits
            orbits *= 0.5 * self.period_derivative
            fraction -= orbits
        carry = np.rint(fraction)
        fraction -= carry
        whole += carry
        return whole, fraction

    # -- the three kinds -------------------------------------------------------------

    def _components(
        self,
        base: np.ndarray,
        offset: np.ndarray | None,
        *,
        angles: bool = True,
        start: _KeplerStart | None = None,
    ) -> tuple[DelayComponents, _KeplerStart | None]:
        """Delay parts at t = base + offset, and a Kepler warm start for nearby times.

        ``angles=False`` leaves the angle fields empty (and skips the true anomaly where
        the delay does not need it); ``start`` is a warm start from nearby times.
        """
        whole, fraction = self._orbit_phase(base, offset)
        fraction *= _TWO_PI
        if self.kind == "low_eccentricity":
            return self._low_eccentricity(fraction, whole), None
        ecc_anomaly, sin_u, cos_u, warm = _kepler_centred(fraction, self.eccentricity, start)
        true_anomaly = None
        parts: tuple[np.ndarray, np.ndarray, np.ndarray]
        if self.kind == "keplerian":
            omega: float | np.ndarray
            omega_rate = self.periastron_advance_rad_s
            if omega_rate == 0.0:
                omega = self.periastron_longitude_rad
            else:
                t = base if offset is None else base + offset
                omega = self.periastron_longitude_rad + omega_rate * t
            parts = self._keplerian(omega, sin_u, cos_u)
        else:
            if angles or self.advance_per_anomaly != 0.0:
                true_anomaly = self._true_anomaly(sin_u, cos_u)
            parts = self._relativistic(sin_u, cos_u, true_anomaly, whole)
        if not angles:
            nothing = np.empty(0)
            return DelayComponents(*parts, nothing, nothing, nothing), warm
        if true_anomaly is None:
            true_anomaly = self._true_anomaly(sin_u, cos_u)
        return DelayComponents(*parts, ecc_anomaly, true_anomaly, whole), warm

    def _true_anomaly(self, sin_u: np.ndarray, cos_u: np.ndarray) -> np.ndarray:
        """True anomaly in [−π, π] from the eccentric anomaly's sine and cosine."""
        return np.arctan2(self.sqrt_one_minus_e2 * sin_u, cos_u - self.eccentricity)

    def _keplerian(
        self, omega: float | np.ndarray, sin_e: np.ndarray, cos_e: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        x, e = self.semi_major_axis_s, self.eccentricity
        sin_w, cos_w = np.sin(omega), np.cos(omega)
        roemer = x * sin_w * (cos_e - e) + (x * self.sqrt_one_minus_e2 * cos_w) * sin_e
        einstein = _ZERO if self.einstein_s == 0.0 else self.einstein_s * sin_e
        return roemer, einstein, _ZERO

    def _relativistic(
        self,
        sin_u: np.ndarray,
        cos_u: np.ndarray,
        true_anomaly: np.ndarray | None,
        whole: np.ndarray,
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        x, e = self.semi_major_axis_s, self.eccentricity
        k = self.advance_per_anomaly
        omega: float | np.ndarray = self.periastron_longitude_rad
        if k != 0.0:
            assert true_anomaly is not None
            # A_e accumulated over orbits: 2π per completed orbit plus the current anomaly.
            omega = self.periastron_longitude_rad + (k * _TWO_PI) * whole + k * true_anomaly
        sin_w, cos_w = np.sin(omega), np.cos(omega)
        roemer = (
            x * sin_w * (cos_u - self.radial_eccentricity)
            + (x * self.angular_factor * cos_w) * sin_u
        )
        einstein = _ZERO if self.einstein_s == 0.0 else self.einstein_s * sin_u
        if self.shapiro_range_s == 0.0:
            shapiro = _ZERO
        else:
            s = self.shapiro_shape
            bracket = sin_w * (cos_u - e) + self.sqrt_one_minus_e2 * cos_w * sin_u
            shapiro = -2.0 * self.shapiro_range_s * np.log(1.0 - e * cos_u - s * bracket)
        return roemer, einstein, shapiro

    def _low_eccentricity(self, phase: np.ndarray, whole: np.ndarray) -> DelayComponents:
        sin_p, cos_p = np.sin(phase), np.cos(phase)
        sin_2p = 2.0 * sin_p * cos_p
        cos_2p = (cos_p - sin_p) * (cos_p + sin_p)
        x = self.semi_major_axis_s
        roemer = x * (
            sin_p
            + (0.5 * self.eccentricity_cosine) * sin_2p
            - (0.5 * self.eccentricity_sine) * cos_2p
        )
        if self.shapiro_range_s == 0.0:
            shapiro = _ZERO
        else:
            shapiro = -2.0 * self.shapiro_range_s * np.log1p(-self.shapiro_shape * sin_p)
        return DelayComponents(roemer, _ZERO, shapiro, phase, phase, whole)

    # -- public evaluation -----------------------------------------------------------

    def components(self, seconds_since_epoch: np.ndarray | float) -> DelayComponents:
        """Delay parts at emission times (TDB s since the epoch); see `DelayComponents`."""
        t = np.asarray(seconds_since_epoch, dtype=float)
        flat = np.atleast_1d(t).ravel()
        parts, _ = self._components(flat, None)
        return DelayComponents(
            *(np.array(np.broadcast_to(p, flat.shape)).reshape(t.shape) for p in parts)
        )

    def delay(self, seconds_since_epoch: np.ndarray | float) -> np.ndarray:
        """Total binary delay (s) at emission times (TDB s since the epoch)."""
        t = np.asarray(seconds_since_epoch, dtype=float)
        flat = np.atleast_1d(t).ravel()
        parts, _ = self._components(flat, None, angles=False)
        return parts.total_s.reshape(t.shape)

    __call__ = delay

    def emission_delay(
        self,
        arrival_seconds_since_epoch: np.ndarray | float,
        arrival_offset_s: np.ndarray | None = None,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Delay at the emission time of pulses arriving at the given times.

        Solves t_e + Δ(t_e) = t_a by fixed-point iteration d ← Δ(t_a − d), from d = 0,
        until each element's delay changes by less than `EMISSION_TOLERANCE_S` (at most
        `EMISSION_MAX_ITERATIONS` evaluations).

        Parameters
        ----------
        arrival_seconds_since_epoch : array_like of float
            Arrival times t_a at the binary's centre of mass (TDB seconds since the
            orbit's epoch).
        arrival_offset_s : array_like of float, optional
            A small part of t_a kept apart for precision: pass whole seconds as the
            first argument (exact in float64) and the rest here, and the orbital
            phase stays exact however many orbits have passed.

        Returns
        -------
        delay_s : numpy.ndarray
            d = t_a − t_e (seconds). Unconverged elements keep the last iterate.
        converged : numpy.ndarray of bool
            False where the iteration did not settle (including non-finite input).
        """
        t_arrival = np.asarray(arrival_seconds_since_epoch, dtype=float)
        shape = t_arrival.shape
        t_arrival = np.atleast_1d(t_arrival).ravel()
        extra = (np.zeros_like(t_arrival) if arrival_offset_s is None
                 else np.broadcast_to(np.asarray(arrival_offset_s, dtype=float), shape).ravel())
        delay_s = np.zeros_like(t_arrival)
        converged = np.zeros(t_arrival.shape, dtype=bool)
        active: np.ndarray | None = None  # indices still iterating; None means all
        warm: _KeplerStart | None = None  # Kepler solution at the previous iterate
        for _ in range(EMISSION_MAX_ITERATIONS):
            if active is None:
                previous = delay_s
                parts, warm = self._components(t_arrival, extra - previous, angles=False,
                                               start=warm)
            else:
                previous = delay_s[active]
                parts, warm = self._components(
                    t_arrival[active], extra[active] - previous, angles=False, start=warm
                )
            updated = parts.total_s
            going = ~(np.abs(updated - previous) < EMISSION_TOLERANCE_S)  # NaN: not done
            if active is None:
                delay_s = updated
                converged = ~going
                active = np.flatnonzero(going)
            else:
                delay_s[active] = updated
                converged[active[~going]] = True
                active = active[going]
            if active.size == 0:
                break
            if warm is not None and active.size < going.size:
                warm = _KeplerStart(*(a[going] for a in warm))
        return delay_s.reshape(shape), converged.reshape(shape)


@lru_cache(maxsize=64)
def _compiled(params: KeplerianOrbit | LowEccentricityOrbit | RelativisticOrbit) -> BinaryDelay:
    return BinaryDelay(params)


def _as_compiled(params) -> BinaryDelay:
    return params if isinstance(params, BinaryDelay) else _compiled(params)


def delay(
    params: KeplerianOrbit | LowEccentricityOrbit | RelativisticOrbit,
    seconds_since_epoch: np.ndarray,
) -> np.ndarray:
    """Total binary delay at emission times.

    Parameters
    ----------
    params : KeplerianOrbit | LowEccentricityOrbit | RelativisticOrbit
        The orbit (a compiled `BinaryDelay` is accepted too).
    seconds_since_epoch : array_like of float
        Emission time t (TDB seconds since ``params.epoch_tdb_seconds``, in the frame
        of the binary's centre of mass).

    Returns
    -------
    numpy.ndarray
        Δ(t) = Roemer + Einstein + Shapiro (seconds), as applicable to the kind;
        positive means the pulse arrives later, t_arrival = t + Δ(t).
    """
    return _as_compiled(params).delay(seconds_since_epoch)


def delay_components(
    params: KeplerianOrbit | LowEccentricityOrbit | RelativisticOrbit,
    seconds_since_epoch: np.ndarray,
) -> DelayComponents:
    """Delay parts and orbit angles at emission times; see `delay` and `DelayComponents`."""
    return _as_compiled(params).components(seconds_since_epoch)


def emission_delay(
    params: KeplerianOrbit | LowEccentricityOrbit | RelativisticOrbit,
    arrival_seconds_since_epoch: np.ndarray,
    arrival_offset_s: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Binary delay for pulses known by their arrival time.

    Parameters
    ----------
    params : KeplerianOrbit | LowEccentricityOrbit | RelativisticOrbit
        The orbit (a compiled `BinaryDelay` is accepted too).
    arrival_seconds_since_epoch : array_like of float
        Arrival time t_a at the binary's centre of mass (TDB seconds since
        ``params.epoch_tdb_seconds``).
    arrival_offset_s : array_like of float, optional
        Added to t_a; see `BinaryDelay.emission_delay` (keeps orbital phase exact).

    Returns
    -------
    delay_s : numpy.ndarray
        d = t_a − t_e (seconds), where t_e + Δ(t_e) = t_a.
    converged : numpy.ndarray of bool
        True where successive iterates differ by < 1e-12 s within 12 iterations;
        elsewhere the last iterate is returned.
    """
    return _as_compiled(params).emission_delay(arrival_seconds_since_epoch, arrival_offset_s)
