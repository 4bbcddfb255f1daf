"""Invented binary orbits shared by the orbit, delay and emission tests, and an mpmath
oracle of the relativistic delay."""

from __future__ import annotations

import mpmath

from turnstamp.core.orbit import KeplerianOrbit, RelativisticOrbit

__all__ = ["DAY_S", "EPOCH", "keplerian", "relativistic", "damour_deruelle_oracle"]

DAY_S = 86400.0
EPOCH = "51544.5"  # MJD of 2000-01-01T12:00:00 TDB: the epoch is then t = 0


def keplerian(**fields) -> KeplerianOrbit:
    """An invented Keplerian orbit (P_b = 1 d, x = 2 lt-s, e = 0.1, ω = 30°)."""
    base = dict(
        orbital_period_days=1.0,
        projected_semi_major_axis_lt_s=2.0,
        eccentricity=0.1,
        periastron_longitude_deg=30.0,
        periastron_epoch_mjd_tdb=EPOCH,
    )
    return KeplerianOrbit(**{**base, **fields})


def relativistic(**fields) -> RelativisticOrbit:
    """An invented relativistic orbit (P_b = 1.83 d, x = 5.7 lt-s, e = 0.27, γ = 1.1 ms)."""
    base = dict(
        orbital_period_days=1.83,
        projected_semi_major_axis_lt_s=5.7,
        eccentricity=0.27,
        periastron_longitude_deg=113.0,
        einstein_delay_s=1.1e-3,
        companion_mass_msun=0.87,
        sin_inclination=0.83,
        periastron_epoch_mjd_tdb=EPOCH,
    )
    return RelativisticOrbit(**{**base, **fields})


def damour_deruelle_oracle(orbit: RelativisticOrbit, t: float):
    """(u, A_e, Δ_R, Δ_E, Δ_S, r) at t s after periastron with mpmath at 40 digits.

    Written straight from the formulas of Damour & Deruelle (1986, AIHP 44, 263; quoted
    from memory) with δ_r = δ_θ = k = 0 and Ṗ_b = 0: M = 2πt/P_b, u − e sin u = M (mpmath
    findroot), A_e = 2 atan(√((1+e)/(1−e)) tan(u/2)), Δ_R = x sin ω (cos u − e) +
    x √(1−e²) cos ω sin u, Δ_E = γ sin u, Δ_S = −2r ln{1 − e cos u − s[sin ω (cos u − e)
    + √(1−e²) cos ω sin u]}, r = T⊙ m₂ with T⊙ = GM⊙/c³ (IAU 2015 Resolution B3; SI c).
    """
    mpmath.mp.dps = 40
    e, x = mpmath.mpf(orbit.eccentricity), mpmath.mpf(orbit.projected_semi_major_axis_lt_s)
    mean = 2 * mpmath.pi * mpmath.mpf(t) / (mpmath.mpf(str(orbit.orbital_period_days)) * 86400)
    u = mpmath.findroot(lambda v: v - e * mpmath.sin(v) - mean, mean)
    true_anomaly = 2 * mpmath.atan(mpmath.sqrt((1 + e) / (1 - e)) * mpmath.tan(u / 2))
    w = mpmath.radians(mpmath.mpf(orbit.periastron_longitude_deg))
    root = mpmath.sqrt(1 - e * e)
    shape = mpmath.sin(w) * (mpmath.cos(u) - e) + root * mpmath.cos(w) * mpmath.sin(u)
    roemer = x * shape
    einstein = mpmath.mpf(orbit.einstein_delay_s) * mpmath.sin(u)
    r = mpmath.mpf(1.3271244e20) / mpmath.mpf(299792458) ** 3 \
        * mpmath.mpf(orbit.companion_mass_msun)
    shapiro = -2 * r * mpmath.log(1 - e * mpmath.cos(u)
                                  - mpmath.mpf(orbit.sin_inclination) * shape)
    return tuple(float(v) for v in (u, true_anomaly, roemer, einstein, shapiro, r))
