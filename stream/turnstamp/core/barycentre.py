"""Arrival time at the observatory (TT) to arrival time at the solar-system barycentre (TDB).

Theory of operation
-------------------
Every term is a *delay*: positive means the signal reaches the observatory later
than it would reach the barycentre (Backer & Hellings 1986, ARA&A 24, 537; the
textbook treatment of Lorimer & Kramer 2005, *Handbook of Pulsar Astronomy*, ch. 8,
from memory). TDB is the scale defined by IAU 2006 Resolution B3; its relation to TT
at a site follows the IERS Conventions (2010, IERS Technical Note 36), chapter 10.
With r the vector from the barycentre to the observatory, n the unit vector towards
the source and d its distance::

    t_SSB(TDB) = t_site(TT) + correction
    correction = (TDB - TT)            Einstein delay, Fairhead & Bretagnon 1990
                                       series of ERFA incl. the topocentric term
               + r.n / c               Roemer delay (sign: the delay is -r.n/c)
               - (|r|^2 - (r.n)^2)/(2cd)   wave-front curvature (parallax)
               - sum_b -2 GM_b/c^3 ln(1 + cos theta_b)
                                       Shapiro delay of the Sun (and optionally
                                       Jupiter); theta_b is the angle at body b
                                       between the observatory and the source

r is the Earth's barycentric position from the planetary ephemeris (at TDB)
plus the observatory's GCRS position (``earth.GroundSite`` or ``OrbitTrack``);
we do not use astropy's ``Time.light_travel_time``, which omits parallax and
Shapiro and differed here from direct computation by 0.5-2.1 µs. Neglected:
the GCRS-to-BCRS Lorentz terms on the site vector, of order (v/c)^2 R_E and
L_B R_E, together below 0.5 ns.

This direct computation gives the node values of the interpolating tables of
:mod:`turnstamp.core.correctiontable`, which the hot path evaluates.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Protocol

import erfa
import numpy as np

from .earth import EarthOrientation, GroundSite, OrbitTrack, tt_julian_date

__all__ = [
    "SPEED_OF_LIGHT",
    "GM",
    "Ephemeris",
    "SkyPosition",
    "BarycentreCalculator",
]

SPEED_OF_LIGHT = 299_792_458.0  # m/s, exact (SI)
GM = {
    "sun": 1.3271244e20,  # m^3/s^2, IAU 2015 Resolution B3 nominal
    "jupiter": 1.2668653e17,  # m^3/s^2, IAU 2015 Resolution B3 nominal
}
JULIAN_YEAR_S = 365.25 * 86_400.0
MAS = np.pi / 648_000_000.0  # one milliarcsecond in radians


class Ephemeris(Protocol):
    """Barycentric positions and velocities of solar-system bodies (ICRS)."""

    name: str
    flags: int  # Quality bits attached to every event using it

    def posvel(self, body: str, tdb_jd1, tdb_jd2) -> tuple[np.ndarray, np.ndarray]:
        """Position (m) and velocity (m/s) of ``body`` at TDB, each of shape (N, 3)."""
        ...


@dataclass(frozen=True)
class SkyPosition:
    """Source direction with proper motion and parallax (ICRS).

    Parameters
    ----------
    right_ascension_deg, declination_deg : float
        Position at ``position_epoch_s``.
    position_epoch_s : float
        TDB seconds since 2000-01-01T12:00:00 of the catalogue position.
    proper_motion_ra_mas_per_yr : float
        mu_alpha * cos(delta), milliarcseconds per Julian year.
    proper_motion_dec_mas_per_yr : float
    parallax_mas : float
        0 means "unknown, very far": no wave-front curvature term.
    """

    right_ascension_deg: float
    declination_deg: float
    position_epoch_s: float = 0.0
    proper_motion_ra_mas_per_yr: float = 0.0
    proper_motion_dec_mas_per_yr: float = 0.0
    parallax_mas: float = 0.0
    _basis: np.ndarray = field(init=False, repr=False)

    def __post_init__(self):
        if not -90 <= self.declination_deg <= 90:
            raise ValueError(f"declination_deg = {self.declination_deg}: outside [-90, 90]")
        if self.parallax_mas < 0:
            raise ValueError(f"parallax_mas = {self.parallax_mas}: must be >= 0")
        a, d = np.radians(self.right_ascension_deg), np.radians(self.declination_deg)
        basis = np.array([
            [np.cos(d) * np.cos(a), np.cos(d) * np.sin(a), np.sin(d)],  # towards the source
            [-np.sin(a), np.cos(a), 0.0],  # east
            [-np.sin(d) * np.cos(a), -np.sin(d) * np.sin(a), np.cos(d)],  # north
        ])
        object.__setattr__(self, "_basis", basis)

    @property
    def distance_m(self) -> float:
        """Distance to the source (m) from the parallax; inf when the parallax is 0."""
        if self.parallax_mas == 0:
            return np.inf
        return erfa.DAU / (self.parallax_mas * MAS)

    def unit_vector(self, tdb_s) -> np.ndarray:
        """Unit vectors towards the source at TDB seconds since J2000, shape (N, 3)."""
        years = (np.asarray(tdb_s, dtype=np.float64) - self.position_epoch_s) / JULIAN_YEAR_S
        east = self.proper_motion_ra_mas_per_yr * MAS * years
        north = self.proper_motion_dec_mas_per_yr * MAS * years
        n = (self._basis[0] + east[:, None] * self._basis[1] + north[:, None] * self._basis[2])
        return n / np.linalg.norm(n, axis=1, keepdims=True)


@dataclass(frozen=True)
class BarycentreCalculator:
    """Direct (node-by-node) computation of the barycentric correction."""

    observer: GroundSite | OrbitTrack
    target: SkyPosition
    ephemeris: Ephemeris
    orientation: EarthOrientation
    shapiro_bodies: tuple[str, ...] = ("sun",)

    def __post_init__(self):
        unknown = set(self.shapiro_bodies) - set(GM)
        if unknown:
            raise ValueError(f"shapiro_bodies {sorted(unknown)}: allowed {sorted(GM)}")

    def terms(self, tt_ns) -> dict[str, np.ndarray]:
        """Each term of the correction (seconds) at TT instants, plus ``flags``."""
        tt_ns = np.asarray(tt_ns, dtype=np.int64)
        tt1, tt2 = tt_julian_date(tt_ns)
        if isinstance(self.observer, GroundSite):
            site, earth, einstein, flags = self._ground_site(tt_ns, tt1, tt2)
        else:
            site, earth, einstein, flags = self._orbiting_site(tt_ns, tt1, tt2)
        tdb2 = tt2 + einstein / 86_400.0
        r = earth + site
        n = self.target.unit_vector((tt1 - 2_451_545.0 + tdb2) * 86_400.0)
        r_dot_n = np.einsum("ij,ij->i", r, n)
        out = {
            "einstein": einstein,
            "roemer": r_dot_n / SPEED_OF_LIGHT,
            "parallax": (np.einsum("ij,ij->i", r, r) - r_dot_n**2)
            / (2 * SPEED_OF_LIGHT * self.target.distance_m),
        }
        shapiro = self._shapiro(r, n, tt1, tdb2)
        out["shapiro"] = shapiro
        out["total"] = out["einstein"] + out["roemer"] - out["parallax"] - shapiro
        out["flags"] = flags | np.uint32(self.ephemeris.flags)
        return out

    def _ground_site(self, tt_ns, tt1, tt2):
        """Site (GCRS, m), Earth (barycentric, m), TDB − TT (s) and flags for a ground site."""
        site, (_, ut1_2), flags = self.observer.gcrs_position(tt_ns, self.orientation)
        x, y, z = self.observer.itrs_m
        ut_fraction = (ut1_2 + 0.5) % 1.0
        einstein = erfa.dtdb(tt1, tt2, ut_fraction, np.arctan2(y, x),
                             np.hypot(x, y) / 1000.0, z / 1000.0)
        earth, _ = self.ephemeris.posvel("earth", tt1, tt2 + einstein / 86_400.0)
        return site, earth, einstein, flags

    def _orbiting_site(self, tt_ns, tt1, tt2):
        """As ``_ground_site`` for an observer given by an orbit table."""
        site, flags = self.observer.gcrs_position(tt_ns)
        geocentric = erfa.dtdb(tt1, tt2, 0.0, 0.0, 0.0, 0.0)
        earth, earth_velocity = self.ephemeris.posvel(
            "earth", tt1, tt2 + geocentric / 86_400.0)
        # topocentric term (v_E . r_obs)/c^2 (Moyer 1981), as ERFA does for ground sites
        einstein = geocentric + np.einsum("ij,ij->i", earth_velocity, site) / SPEED_OF_LIGHT**2
        return site, earth, einstein, flags

    def _shapiro(self, r, n, tt1, tdb2) -> np.ndarray:
        """Shapiro delay (s) of the listed bodies for observer r (m) and direction n."""
        shapiro = np.zeros(r.shape[0])
        for body in self.shapiro_bodies:
            body_position, _ = self.ephemeris.posvel(body, tt1, tdb2)
            from_body = r - body_position
            cos_theta = np.einsum("ij,ij->i", from_body, n) / np.linalg.norm(from_body, axis=1)
            shapiro += -2 * GM[body] / SPEED_OF_LIGHT**3 * np.log1p(cos_theta)
        return shapiro

    def correction(self, tt_ns) -> tuple[np.ndarray, np.ndarray]:
        """TDB(SSB) - TT(site) in seconds, and Quality flags."""
        terms = self.terms(tt_ns)
        return terms["total"], terms["flags"]

    def provenance(self) -> dict[str, str]:
        """Observer, target, ephemeris and Earth-orientation source, as text for metadata."""
        observer = self.observer
        if isinstance(observer, GroundSite):
            where = (f"ground site {observer.name}: lat {observer.latitude_deg} deg, "
                     f"lon {observer.longitude_deg} deg, h {observer.height_m} m (WGS84)")
        else:
            where = f"orbit table {observer.name}: {observer.tt_ns.size} samples"
        t = self.target
        return {
            "observer": where,
            "target": (f"ra {t.right_ascension_deg} deg, dec {t.declination_deg} deg, "
                       f"pm {t.proper_motion_ra_mas_per_yr}/{t.proper_motion_dec_mas_per_yr} "
                       f"mas/yr, parallax {t.parallax_mas} mas, epoch {t.position_epoch_s} s"),
            "ephemeris": self.ephemeris.name,
            "earth_orientation": self.orientation.source,
            "shapiro_bodies": ",".join(self.shapiro_bodies),
        }
