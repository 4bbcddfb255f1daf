"""Binary-orbit delays: the Roemer, Einstein and Shapiro delays across a pulsar's orbit.

Theory of operation
-------------------
The formulas of the three orbit kinds are given in :mod:`turnstamp.core.orbit`;
:class:`BinaryDelay` compiles a parameter model once (seconds and radians) and
evaluates arrays of times without Python loops over events.

Numerics. The orbital phase is formed in extended precision: the exact decimal period
is held as a double-double (P_hi + P_lo), the whole orbits n = rint(t/P_hi) and the
remainder t − n·P_hi − n·P_lo is formed with an exact product and sum (Shewchuk 1997;
:mod:`turnstamp.core.twofloat`), so phase precision is set by the time argument, not by
the number of orbits elapsed nor by the period's binary representation. Kepler's
equation is solved in :mod:`turnstamp.core.kepler`.

Emission time. Photon arrival times are known and the delay is a function of the
emission time: ``emission_delay`` solves t_e + Δ(t_e) = t_a (:mod:`turnstamp.core.emission`).
"""

from __future__ import annotations

import math
from functools import lru_cache
from typing import NamedTuple

import numpy as np

from .emission import solve_emission_delay
from .kepler import KeplerStart, kepler_centred
from .orbit import (
    SOLAR_MASS_TIME_S,
    LowEccentricityOrbit,
    OrbitModel,
    RelativisticOrbit,
)
from .twofloat import dd_from_decimal, two_prod, two_sum

__all__ = [
    "DelayComponents",
    "BinaryDelay",
    "delay",
    "delay_components",
    "emission_delay",
]

_SECONDS_PER_DAY = 86400.0
_SECONDS_PER_JULIAN_YEAR = 365.25 * 86400.0
_TWO_PI = 2.0 * math.pi
_ZERO = np.zeros(())  # an absent delay term, broadcast against the others (read-only)
_ZERO.flags.writeable = False


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
    params : OrbitModel
        The orbit. Times handed to the methods are TDB seconds since
        ``params.epoch_tdb_seconds``.
    """

    def __init__(self, params: OrbitModel):
        if not isinstance(params, OrbitModel):
            raise TypeError(f"expected an orbit parameter model, got {type(params).__name__}")
        self.params = params
        self.kind: str = params.kind
        self.period_hi, self.period_lo = dd_from_decimal(params.period_seconds)
        self.period_s = self.period_hi + self.period_lo
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

        The linear term: n = rint(base/P_hi) and the remainder base − n·P_hi − n·P_lo,
        with n·P_hi an exact product and base − (its high part) an exact sum; the small
        offset and the Ṗ_b term are added to the fraction, which is then re-centred.
        """
        period = self.period_s
        with np.errstate(invalid="ignore"):  # non-finite times give NaN, flagged later
            whole = np.rint(base / self.period_hi)
            product_hi, product_lo = two_prod(whole, self.period_hi)
            remainder, rounding = two_sum(base, -product_hi)
            remainder += rounding - product_lo - whole * self.period_lo
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
        start: KeplerStart | None = None,
    ) -> tuple[DelayComponents, KeplerStart | None]:
        """Delay parts at t = base + offset, and a Kepler warm start for nearby times.

        ``angles=False`` leaves the angle fields empty (and skips the true anomaly where
        the delay does not need it); ``start`` is a warm start from nearby times.
        """
        whole, fraction = self._orbit_phase(base, offset)
        fraction *= _TWO_PI
        if self.kind == "low_eccentricity":
            return self._low_eccentricity(fraction, whole), None
        ecc_anomaly, sin_u, cos_u, warm = kepler_centred(fraction, self.eccentricity, start)
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

    def _total(self, base: np.ndarray, offset: np.ndarray,
               start: KeplerStart | None) -> tuple[np.ndarray, KeplerStart | None]:
        """Total delay at t = base + offset, and a Kepler warm start for nearby times."""
        parts, warm = self._components(base, offset, angles=False, start=start)
        return parts.total_s, warm

    def emission_delay(
        self,
        arrival_seconds_since_epoch: np.ndarray | float,
        arrival_offset_s: np.ndarray | None = None,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Delay at the emission time of pulses arriving at the given times.

        Solves t_e + Δ(t_e) = t_a by fixed-point iteration d ← Δ(t_a − d), from d = 0,
        until each element's delay changes by less than ``emission.EMISSION_TOLERANCE_S``
        (at most ``emission.EMISSION_MAX_ITERATIONS`` evaluations).

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
        delay_s, converged = solve_emission_delay(self._total, t_arrival, extra)
        return delay_s.reshape(shape), converged.reshape(shape)


@lru_cache(maxsize=64)
def _compiled(params: OrbitModel) -> BinaryDelay:
    return BinaryDelay(params)


def _as_compiled(params) -> BinaryDelay:
    return params if isinstance(params, BinaryDelay) else _compiled(params)


def delay(
    params: OrbitModel,
    seconds_since_epoch: np.ndarray,
) -> np.ndarray:
    """Total binary delay at emission times.

    Parameters
    ----------
    params : OrbitModel
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
    params: OrbitModel,
    seconds_since_epoch: np.ndarray,
) -> DelayComponents:
    """Delay parts and orbit angles at emission times; see `delay` and `DelayComponents`."""
    return _as_compiled(params).components(seconds_since_epoch)


def emission_delay(
    params: OrbitModel,
    arrival_seconds_since_epoch: np.ndarray,
    arrival_offset_s: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Binary delay for pulses known by their arrival time.

    Parameters
    ----------
    params : OrbitModel
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
