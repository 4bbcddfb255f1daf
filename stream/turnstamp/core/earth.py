"""Earth orientation and observer positions in the geocentric celestial frame.

Theory of operation
-------------------
A ground site is fixed in the terrestrial frame (ITRS, from geodetic WGS84
coordinates). Its position in the geocentric celestial frame (GCRS) at an
instant follows the IAU 2006/2000A CIO-based chain of ERFA (the IAU SOFA
routines): CIP coordinates X, Y (plus the IERS celestial-pole offsets dX, dY),
the CIO locator s, the Earth rotation angle from UT1, and polar motion.
Earth-orientation values (UT1 - UTC, x_p, y_p, dX, dY) come from an IERS table
handed in by the shell; they are interpolated linearly in UT1 - TAI, which,
unlike UT1 - UTC, has no one-second jumps at leap seconds.

Errors if the table is wrong or short (worked out from the Earth's equatorial radius
and rotation rate): 1 ms of UT1 moves the site by ~0.46 m (1.55 ns of delay);
ignoring polar motion of 0.3" costs up to 31 ns. Past the end of the table the last
values are held and the events are flagged EARTH_ORIENTATION_HELD (UT1 may then be
off by up to ~1 s: ~1.4 µs).

A space-borne observer gives its GCRS position (and velocity) as an orbit table;
``OrbitTrack`` interpolates it with cubic Hermite polynomials.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import erfa
import numpy as np

from .flags import Quality
from .timebase import NS_PER_DAY, TT_MINUS_TAI_NS

__all__ = ["EarthOrientation", "GroundSite", "OrbitTrack", "tt_julian_date"]

ARCSEC = np.pi / 648_000.0


def tt_julian_date(tt_ns):
    """Split int64 ns since J2000 into two-part Julian dates (jd1 whole, jd2 fraction)."""
    days, rest = np.divmod(np.asarray(tt_ns, dtype=np.int64), NS_PER_DAY)
    return 2_451_545.0 + days.astype(np.float64), rest / NS_PER_DAY


@dataclass(frozen=True)
class EarthOrientation:
    """Daily IERS Earth-orientation values.

    Parameters
    ----------
    mjd : float64 array
        UTC MJD of each row (daily, increasing).
    ut1_minus_tai_s : float64 array
        UT1 - TAI (seconds); continuous across leap seconds.
    polar_x_arcsec, polar_y_arcsec : float64 arrays
        Polar motion x_p, y_p (arcseconds).
    pole_dx_mas, pole_dy_mas : float64 arrays
        Celestial pole offsets dX, dY w.r.t. IAU 2006/2000A (milliarcseconds).
    predicted_from_mjd : float
        First MJD whose values are predictions rather than measurements.
    source : str
        Provenance for output metadata.
    """

    mjd: np.ndarray
    ut1_minus_tai_s: np.ndarray
    polar_x_arcsec: np.ndarray
    polar_y_arcsec: np.ndarray
    pole_dx_mas: np.ndarray
    pole_dy_mas: np.ndarray
    predicted_from_mjd: float
    source: str = "unknown"

    def __post_init__(self):
        columns = [np.asarray(getattr(self, n), dtype=np.float64) for n in self._columns()]
        if any(c.shape != columns[0].shape for c in columns) or columns[0].size < 2:
            raise ValueError("Earth-orientation table needs equal columns of >= 2 rows")
        if np.any(np.diff(columns[0]) <= 0):
            raise ValueError("Earth-orientation table MJDs must increase")
        for name, column in zip(self._columns(), columns, strict=True):
            object.__setattr__(self, name, np.nan_to_num(column, nan=0.0))

    @staticmethod
    def _columns():
        return ("mjd", "ut1_minus_tai_s", "polar_x_arcsec", "polar_y_arcsec",
                "pole_dx_mas", "pole_dy_mas")

    @property
    def last_mjd(self) -> float:
        return float(self.mjd[-1])

    def at(self, mjd):
        """Interpolated values at UTC MJDs (float64 is ample for daily tables).

        Returns
        -------
        dict with ``ut1_minus_tai_s``, ``xp_rad``, ``yp_rad``, ``dx_rad``, ``dy_rad``
        and ``flags`` (uint32 ``Quality`` bits).
        """
        mjd = np.asarray(mjd, dtype=np.float64)

        def interp(column):
            return np.interp(mjd, self.mjd, column)

        flags = np.where(mjd >= self.predicted_from_mjd, Quality.EARTH_ORIENTATION_PREDICTED, 0)
        flags = flags | np.where(
            (mjd > self.mjd[-1]) | (mjd < self.mjd[0]), Quality.EARTH_ORIENTATION_HELD, 0
        )
        return {
            "ut1_minus_tai_s": interp(self.ut1_minus_tai_s),
            "xp_rad": interp(self.polar_x_arcsec) * ARCSEC,
            "yp_rad": interp(self.polar_y_arcsec) * ARCSEC,
            "dx_rad": interp(self.pole_dx_mas) * (ARCSEC / 1000),
            "dy_rad": interp(self.pole_dy_mas) * (ARCSEC / 1000),
            "flags": flags.astype(np.uint32),
        }


@dataclass(frozen=True)
class GroundSite:
    """A fixed site on the ground, geodetic WGS84 coordinates.

    Parameters
    ----------
    name : str
    latitude_deg, longitude_deg : float
        Geodetic latitude (north positive) and longitude (east positive), degrees.
    height_m : float
        Height above the WGS84 ellipsoid, metres.
    """

    name: str
    latitude_deg: float
    longitude_deg: float
    height_m: float
    itrs_m: np.ndarray = field(init=False, repr=False)

    def __post_init__(self):
        if not -90 <= self.latitude_deg <= 90:
            raise ValueError(f"latitude_deg = {self.latitude_deg}: must be within [-90, 90]")
        if not -10_000 < self.height_m < 100_000:
            raise ValueError(f"height_m = {self.height_m}: not a ground site")
        xyz = erfa.gd2gc(1, np.radians(self.longitude_deg), np.radians(self.latitude_deg),
                         self.height_m)
        object.__setattr__(self, "itrs_m", np.asarray(xyz, dtype=np.float64))

    def gcrs_position(self, tt_ns, orientation: EarthOrientation):
        """Site position in the GCRS (m), shape (N, 3), plus UT1 parts and flags.

        Returns
        -------
        position_m : (N, 3) float64
        ut1_jd : tuple of two float64 arrays (two-part UT1 Julian date)
        flags : uint32 array
        """
        tt1, tt2 = tt_julian_date(tt_ns)
        utc_mjd_approx = (tt1 - 2_400_000.5) + tt2  # TT vs UTC (~69 s) is irrelevant here
        eop = orientation.at(utc_mjd_approx)
        ut1_1 = tt1
        ut1_2 = tt2 + (eop["ut1_minus_tai_s"] - TT_MINUS_TAI_NS * 1e-9) / 86_400.0
        x, y = erfa.xy06(tt1, tt2)
        s = erfa.s06(tt1, tt2, x, y)
        rc2i = erfa.c2ixys(x + eop["dx_rad"], y + eop["dy_rad"], s)
        era = erfa.era00(ut1_1, ut1_2)
        rpom = erfa.pom00(eop["xp_rad"], eop["yp_rad"], erfa.sp00(tt1, tt2))
        rc2t = erfa.c2tcio(rc2i, era, rpom)
        # GCRS = transpose(celestial-to-terrestrial) @ ITRS
        position = np.einsum("...ji,j->...i", rc2t, self.itrs_m)
        return position, (ut1_1, ut1_2), eop["flags"]


@dataclass(frozen=True)
class OrbitTrack:
    """Positions (and velocities) of a space-borne observer in the GCRS.

    Parameters
    ----------
    name : str
    tt_ns : int64 array
        Sample instants (TT ns since J2000), increasing.
    position_m : (N, 3) float64
        GCRS position, metres.
    velocity_m_s : (N, 3) float64 or None
        GCRS velocity, m/s. If omitted, estimated by fourth-order finite
        differences of the positions (samples should then be evenly spaced).
    """

    name: str
    tt_ns: np.ndarray
    position_m: np.ndarray
    velocity_m_s: np.ndarray | None = None

    def __post_init__(self):
        t = np.asarray(self.tt_ns, dtype=np.int64)
        p = np.asarray(self.position_m, dtype=np.float64)
        if t.ndim != 1 or t.size < 5 or p.shape != (t.size, 3):
            raise ValueError("orbit table needs >= 5 rows of (time, x, y, z)")
        if np.any(np.diff(t) <= 0):
            raise ValueError("orbit table instants must increase")
        if not np.all(np.isfinite(p)):
            raise ValueError("orbit table positions must be finite")
        v = self.velocity_m_s
        if v is None:
            seconds = (t - t[0]) * 1e-9
            v = np.stack([_derivative(seconds, p[:, i]) for i in range(3)], axis=1)
        v = np.asarray(v, dtype=np.float64)
        if v.shape != p.shape:
            raise ValueError("orbit table velocities must match positions")
        object.__setattr__(self, "tt_ns", t)
        object.__setattr__(self, "position_m", p)
        object.__setattr__(self, "velocity_m_s", v)

    def gcrs_position(self, tt_ns):
        """Cubic-Hermite interpolated GCRS position (m, shape (N, 3)) and flags."""
        tt_ns = np.asarray(tt_ns, dtype=np.int64)
        row = np.clip(np.searchsorted(self.tt_ns, tt_ns, side="right") - 1, 0, self.tt_ns.size - 2)
        t0 = self.tt_ns[row]
        h = (self.tt_ns[row + 1] - t0) * 1e-9
        u = ((tt_ns - t0) * 1e-9 / h)[:, None]
        h = h[:, None]
        p0, p1 = self.position_m[row], self.position_m[row + 1]
        v0, v1 = self.velocity_m_s[row], self.velocity_m_s[row + 1]
        u2, u3 = u * u, u * u * u
        position = ((2 * u3 - 3 * u2 + 1) * p0 + (u3 - 2 * u2 + u) * h * v0
                    + (-2 * u3 + 3 * u2) * p1 + (u3 - u2) * h * v1)
        outside = (tt_ns < self.tt_ns[0]) | (tt_ns > self.tt_ns[-1])
        flags = np.where(outside, Quality.ORBIT_TABLE_EXTRAPOLATED, 0).astype(np.uint32)
        return position, flags


def _derivative(t, y):
    """Fourth-order finite-difference derivative (second order at the ends)."""
    d = np.gradient(y, t, edge_order=2)
    if t.size >= 5:
        h = np.diff(t)
        if np.allclose(h, h[0], rtol=1e-9):
            d[2:-2] = (y[:-4] - 8 * y[1:-3] + 8 * y[3:-1] - y[4:]) / (12 * h[0])
    return d
