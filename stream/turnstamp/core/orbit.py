"""Binary-orbit parameter models: the three orbit kinds in our spin-model schema.

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

The delays themselves are computed in :mod:`turnstamp.core.binarydelay`.

Conventions: angles are degrees in the parameter models and radians inside; a year is
the Julian year of 365.25 days; T⊙ = GM⊙/c³ from the IAU 2015 nominal solar mass
parameter. Each model's epoch (periastron, or ascending node) is an exact ``Decimal``
MJD in TDB; ``epoch_tdb_seconds`` gives it as seconds since 2000-01-01T12:00:00 TDB, and
the evaluation functions take times as float64 seconds since that epoch. The orbital
period is an exact ``Decimal`` too (``period_seconds``): a float64 period off by one part
in 1e17 moves the orbital phase by N·δP/P after N orbits (1e-11 of an orbit after 30
years of a 0.1-day orbit, i.e. 2e-8 cycles of a 600 Hz pulsar with x = 0.5 lt-s).
"""

from __future__ import annotations

import math
from decimal import Decimal, localcontext
from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator

__all__ = [
    "SOLAR_MASS_PARAMETER_M3_S2",
    "SPEED_OF_LIGHT_M_S",
    "SOLAR_MASS_TIME_S",
    "LOW_ECCENTRICITY_LIMIT",
    "KeplerianOrbit",
    "LowEccentricityOrbit",
    "RelativisticOrbit",
    "OrbitModel",
    "BinaryParameters",
]

# IAU 2015 Resolution B3 nominal solar mass parameter, and the defined speed of light.
SOLAR_MASS_PARAMETER_M3_S2 = 1.3271244e20
SPEED_OF_LIGHT_M_S = 299792458.0
#: T⊙ = GM⊙/c³ ≈ 4.925490947e-6 s: the Shapiro amplitude per solar mass is r = T⊙ m₂.
SOLAR_MASS_TIME_S = SOLAR_MASS_PARAMETER_M3_S2 / SPEED_OF_LIGHT_M_S**3

#: Largest eccentricity accepted by the low_eccentricity kind (dropped terms ~ x e²).
LOW_ECCENTRICITY_LIMIT = 0.1

_J2000_MJD = Decimal("51544.5")


def _mjd_to_tdb_seconds(mjd: Decimal) -> Decimal:
    with localcontext() as context:
        context.prec = 60  # exact for any MJD written with up to ~50 digits
        return (mjd - _J2000_MJD) * 86400


class _OrbitModel(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid", allow_inf_nan=False)

    @property
    def period_seconds(self) -> Decimal:
        """The orbital period P_b in seconds, exact."""
        with localcontext() as context:
            context.prec = 60
            return Decimal(self.orbital_period_days) * 86400  # type: ignore[attr-defined]


class _EccentricOrbitFields(_OrbitModel):
    """Fields shared by the keplerian and relativistic kinds."""

    orbital_period_days: Decimal = Field(
        gt=0, description="Orbital period P_b (days), exact: read from its text."
    )
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
    orbital_period_days: Decimal = Field(
        gt=0, description="Orbital period P_b (days), exact: read from its text."
    )
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

#: Any of the three orbit kinds (the type that the delay computation accepts).
OrbitModel = KeplerianOrbit | LowEccentricityOrbit | RelativisticOrbit
