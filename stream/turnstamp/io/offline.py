"""Keep astropy from ever reaching for the network.

Both settings are needed: with ``auto_download`` off alone, astropy still
raises about 30 days after its bundled data were released (``auto_max_age``).
"""

from __future__ import annotations

__all__ = ["ensure_offline"]

_done = False


def ensure_offline() -> None:
    """Configure astropy to use only the tables bundled in installed packages."""
    global _done
    if _done:
        return
    from astropy.utils import data, iers

    iers.conf.auto_download = False
    iers.conf.auto_max_age = None
    iers.conf.iers_degraded_accuracy = "warn"
    data.conf.allow_internet = False
    _done = True
