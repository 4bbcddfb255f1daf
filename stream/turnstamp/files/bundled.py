"""Tables the core needs, read from files that installed packages ship.

Leap seconds and Earth orientation come from ``astropy-iers-data``; the
planetary ephemeris from the JPL kernel in ``skyfield-data``. Nothing here
downloads: a site with newer tables on disk points to them by path, and
:func:`ensure_offline` keeps astropy from ever reaching for the network.

Parsing the text tables with astropy costs seconds (its import alone over one),
so the parsed arrays are kept in a binary cache (``.npz``) keyed by the SHA-256 of
the source files' contents: a changed file is parsed afresh, an unchanged one is
read in milliseconds without importing astropy. The cache lives in
``$TURNSTAMP_CACHE_DIR``, else ``$XDG_CACHE_HOME/turnstamp``, else
``~/.cache/turnstamp``; when it cannot be written (a read-only home, a container)
the tables are parsed each time, with no error.
"""

from __future__ import annotations

import hashlib
import logging
import os
import warnings
from collections.abc import Callable
from pathlib import Path

import numpy as np

from ..core.earth import EarthOrientation
from ..core.flags import Quality
from ..core.timebase import NS_PER_S, LeapSecondTable

__all__ = [
    "ensure_offline",
    "bundled_leap_seconds",
    "load_earth_orientation",
    "default_kernel_path",
    "JplKernel",
    "ErfaBuiltinEphemeris",
    "open_ephemeris",
    "file_fingerprint",
    "cache_directory",
]

log = logging.getLogger(__name__)
_CACHE_FORMAT = "turnstamp parsed tables 1"  # part of every key: bump when the layout changes

KM = 1000.0
DAY_S = 86_400.0
# chains of kernel segments (centre, target) from the barycentre to each body
_CHAINS = {
    "earth": ((0, 3), (3, 399)),
    "moon": ((0, 3), (3, 301)),
    "sun": ((0, 10),),
    "jupiter": ((0, 5),),
}

_offline = False


def ensure_offline() -> None:
    """Configure astropy to use only the tables bundled in installed packages.

    Both settings are needed: with ``auto_download`` off alone, astropy still
    raises about 30 days after its bundled data were released (``auto_max_age``).
    """
    global _offline
    if _offline:
        return
    from astropy.utils import data, iers

    iers.conf.auto_download = False
    iers.conf.auto_max_age = None
    iers.conf.iers_degraded_accuracy = "warn"
    data.conf.allow_internet = False
    _offline = True


def file_fingerprint(path: str | os.PathLike) -> str:
    """``name size sha256-prefix`` of a file, for provenance and cache keys."""
    path = Path(path)
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return f"{path.name} {path.stat().st_size} bytes sha256:{digest.hexdigest()[:16]}"


def cache_directory() -> Path:
    """Folder of the parsed-table cache (see the module docstring)."""
    explicit = os.environ.get("TURNSTAMP_CACHE_DIR")
    if explicit:
        return Path(explicit)
    base = os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache"
    return Path(base) / "turnstamp"


def _content_key(*parts: bytes) -> str:
    digest = hashlib.sha256(_CACHE_FORMAT.encode())
    for part in parts:
        digest.update(hashlib.sha256(part).digest())
    return digest.hexdigest()[:24]


def _cached_arrays(name: str, key: str, parse: Callable[[], dict]) -> dict:
    """The arrays ``parse()`` returns, from the cache when it holds ``name-key``."""
    path = cache_directory() / f"{name}-{key}.npz"
    try:
        with np.load(path, allow_pickle=False) as stored:
            return {k: stored[k] for k in stored.files}
    except (OSError, ValueError, KeyError):
        pass  # absent, unreadable or cut short: parse afresh
    arrays = parse()
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        temporary = path.with_name(f".{path.name}.{os.getpid()}.tmp")
        with temporary.open("wb") as handle:
            np.savez(handle, **arrays)
        temporary.replace(path)
    except OSError as exc:
        log.info("parsed tables not cached (%s): %s", path.parent, exc)
    return arrays


def _parse_leap_seconds(path: str, version: str) -> dict:
    ensure_offline()
    from astropy.utils import iers

    table = iers.LeapSeconds.from_iers_leap_seconds(path)
    expires = int(table.expires.utc.mjd)
    return {"start_mjd": np.asarray(table["mjd"], dtype=np.int64),
            "tai_minus_utc_s": np.asarray(table["tai_utc"], dtype=np.int64),
            "expires_mjd": np.array(expires),
            "source": np.array(f"astropy-iers-data {version} Leap_Second.dat, "
                               f"expires MJD {expires}")}


def bundled_leap_seconds() -> LeapSecondTable:
    """TAI - UTC from the leap-second file bundled with astropy-iers-data (parsed once,
    then read from the binary cache)."""
    import astropy_iers_data

    path = astropy_iers_data.IERS_LEAP_SECOND_FILE
    arrays = _cached_arrays("leap-seconds", _content_key(Path(path).read_bytes()),
                            lambda: _parse_leap_seconds(path, astropy_iers_data.__version__))
    return LeapSecondTable(start_mjd=arrays["start_mjd"],
                           tai_minus_utc_s=arrays["tai_minus_utc_s"],
                           expires_mjd=int(arrays["expires_mjd"]), source=str(arrays["source"]))


def _parse_earth_orientation(path: Path, leaps: LeapSecondTable) -> dict:
    ensure_offline()
    from astropy.utils import iers

    table = iers.IERS_A.read(str(path))

    def column(name):
        col = table[name]
        values = col.filled(np.nan) if hasattr(col, "filled") else col
        return np.asarray(getattr(values, "value", values), dtype=np.float64)

    mjd = column("MJD")
    ut1_utc = column("UT1_UTC_A")
    keep = np.isfinite(ut1_utc)
    mjd, ut1_utc = mjd[keep], ut1_utc[keep]
    utc_ns = np.round((mjd - 51_544.5) * 86_400).astype(np.int64) * NS_PER_S
    flags = np.asarray(table["UT1Flag_A"])[keep]
    predicted = mjd[flags == "P"]
    return {
        "mjd": mjd,
        "ut1_minus_tai_s": ut1_utc - leaps.tai_minus_utc_ns(utc_ns) / NS_PER_S,
        "polar_x_arcsec": column("PM_x_A")[keep],
        "polar_y_arcsec": column("PM_y_A")[keep],
        "pole_dx_mas": column("dX_2000A_A")[keep],
        "pole_dy_mas": column("dY_2000A_A")[keep],
        "predicted_from_mjd": np.array(float(predicted[0]) if predicted.size
                                       else float(mjd[-1]) + 1),
        "source": np.array(f"{path.name} MJD {mjd[0]:.0f}-{mjd[-1]:.0f}, predictions from "
                           f"{predicted[0] if predicted.size else 'none'}"),
    }


def load_earth_orientation(path: str | os.PathLike | None = None,
                           leaps: LeapSecondTable | None = None) -> EarthOrientation:
    """Earth orientation from an IERS ``finals2000A`` file (default: the bundled one),
    parsed once, then read from the binary cache.

    Rows with no UT1 value are dropped; missing pole offsets count as zero.
    """
    if path is None:
        import astropy_iers_data

        path = astropy_iers_data.IERS_A_FILE
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"earth_orientation_file = {str(path)!r}: no such file")
    leaps = leaps or bundled_leap_seconds()
    key = _content_key(path.read_bytes(), leaps.start_mjd.tobytes(),
                       leaps.tai_minus_utc_s.tobytes())
    arrays = _cached_arrays("earth-orientation", key,
                            lambda: _parse_earth_orientation(path, leaps))
    return EarthOrientation(
        mjd=arrays["mjd"], ut1_minus_tai_s=arrays["ut1_minus_tai_s"],
        polar_x_arcsec=arrays["polar_x_arcsec"], polar_y_arcsec=arrays["polar_y_arcsec"],
        pole_dx_mas=arrays["pole_dx_mas"], pole_dy_mas=arrays["pole_dy_mas"],
        predicted_from_mjd=float(arrays["predicted_from_mjd"]), source=str(arrays["source"]))


def default_kernel_path() -> Path:
    """The JPL DE421 kernel shipped by the skyfield-data package."""
    import skyfield_data  # its own path helper warns about an unrelated bundled file

    return Path(skyfield_data.__file__).parent / "data" / "de421.bsp"


class JplKernel:
    """Barycentric positions from a JPL SPK kernel (read with jplephem)."""

    flags = 0

    def __init__(self, path: str | os.PathLike):
        from jplephem.spk import SPK

        self.path = Path(path)
        if not self.path.is_file():
            raise FileNotFoundError(f"ephemeris = {str(self.path)!r}: no such file")
        self._kernel = SPK.open(str(self.path))
        self.name = f"JPL kernel {file_fingerprint(self.path)}"
        available = {(s.center, s.target) for s in self._kernel.segments}
        self.bodies = {b for b, chain in _CHAINS.items() if set(chain) <= available}
        used = [s for s in self._kernel.segments if (s.center, s.target) in
                {link for b in self.bodies for link in _CHAINS[b]}]
        self.span_jd = (max(s.start_jd for s in used), min(s.end_jd for s in used))
        """TDB Julian dates the kernel covers for every body it serves."""

    def posvel(self, body, tdb_jd1, tdb_jd2):
        if body not in self.bodies:
            raise ValueError(f"body {body!r} not in kernel {self.path.name}: {sorted(self.bodies)}")
        jd1 = np.atleast_1d(np.asarray(tdb_jd1, dtype=np.float64))
        jd2 = np.atleast_1d(np.asarray(tdb_jd2, dtype=np.float64))
        jd1, jd2 = np.broadcast_arrays(jd1, jd2)
        position = np.zeros((3, jd1.size))
        velocity = np.zeros((3, jd1.size))
        for centre, target in _CHAINS[body]:
            p, v = self._kernel[centre, target].compute_and_differentiate(jd1, jd2)
            position += p
            velocity += v
        return position.T * KM, velocity.T * (KM / DAY_S)


class ErfaBuiltinEphemeris:
    """erfa's analytic Earth ephemeris (epv00): no file needed; per its documentation the
    barycentric Earth position is off by 4.6 km rms, 13.4 km max (1900-2100)."""

    name = ("erfa epv00 built-in analytic ephemeris (Earth position error 4.6 km rms, "
            "13.4 km max: Roemer delay good to ~15 µs rms, 45 µs max)")
    flags = int(Quality.BUILTIN_EPHEMERIS)
    bodies = {"earth", "sun"}
    span_jd = (2_415_020.5, 2_488_069.5)  # 1900-2100, the range its documentation gives

    def posvel(self, body, tdb_jd1, tdb_jd2):
        import erfa

        heliocentric, barycentric = erfa.epv00(np.atleast_1d(tdb_jd1), np.atleast_1d(tdb_jd2))
        au, au_per_day = erfa.DAU, erfa.DAU / DAY_S
        if body == "earth":
            return barycentric["p"] * au, barycentric["v"] * au_per_day
        if body == "sun":
            return ((barycentric["p"] - heliocentric["p"]) * au,
                    (barycentric["v"] - heliocentric["v"]) * au_per_day)
        raise ValueError(f"body {body!r} not in the built-in ephemeris: {sorted(self.bodies)}")


def open_ephemeris(path: str | os.PathLike | None = None):
    """The JPL kernel at ``path`` (default: the packaged DE421), or, failing that,
    erfa's built-in ephemeris with a loud warning."""
    try:
        return JplKernel(path or default_kernel_path())
    except (ImportError, FileNotFoundError) as exc:
        if path is not None:
            raise
        warnings.warn(
            f"JPL planetary kernel unavailable ({exc}); falling back to erfa's built-in "
            "ephemeris: barycentric corrections good to ~15 µs rms (45 µs max) only, "
            "events flagged BUILTIN_EPHEMERIS", RuntimeWarning, stacklevel=2)
        return ErfaBuiltinEphemeris()
