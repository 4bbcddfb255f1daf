"""turnstamp: barycentric phase tagging and live periodicity monitoring.

A small API for scripts sits here; ``import turnstamp`` stays light because each
function imports what it needs when called::

    import turnstamp

    model = turnstamp.load_model("lantern.toml")
    site = turnstamp.load_site("site.toml")
    archive = turnstamp.tag_events({"event_id": ids, "time_ns": times_ns}, model, site)
    offset = turnstamp.fit_offset(archive["phase"].to_numpy(),
                                  turnstamp.load_template("lantern-template.toml"))
    print(offset.offset_cycles, "+/-", offset.sigma_cycles)

Where things live: ``core/`` the pure numerics (no I/O), ``wire/`` the format of
the event stream, ``files/`` the Arrow files and the input files, ``service/`` the
live service, ``views/`` the night report and the live view, ``commands/`` one
module per command of the ``turnstamp`` program, ``tagging`` offline tagging,
``config`` and ``assemble`` the configuration and what it builds, ``demo/`` the
invented demo scenario, ``bench/`` the benchmarks (DEVELOPERS.md draws the map).
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import numpy as np
    import pyarrow as pa

    from .config import SiteConfig
    from .core.spin import SpinModel
    from .core.template import PulseTemplate
    from .core.templatefit import OffsetFit

__version__ = "0.1.0"

__all__ = ["load_model", "load_site", "load_template", "tag_events", "fit_offset",
           "TemplateOffset", "__version__"]

_PathLike = str | os.PathLike


def load_model(path: _PathLike) -> SpinModel:
    """Read a spin model (our own TOML/JSON format, ``schemas/spin-model.schema.json``).

    Parameters
    ----------
    path : str or path-like
        Model file; frequencies, derivatives and epochs are read as exact decimals.

    Returns
    -------
    turnstamp.core.spin.SpinModel
        The validated model (frequency in Hz, epochs as MJD in TDB).

    Raises
    ------
    turnstamp.errors.ModelError
        The file is unreadable or invalid; the message names the field and value.
    """
    from .files.inputs import load_spin_model

    return load_spin_model(path)


def load_site(path: _PathLike) -> SiteConfig:
    """Read where the instrument is from the [site] table of a TOML file.

    Parameters
    ----------
    path : str or path-like
        A file with a [site] table: a site-only file or a whole service
        configuration (its other tables are ignored).

    Returns
    -------
    turnstamp.config.SiteConfig
        Geodetic site (latitude and longitude in degrees, height in metres above the
        ellipsoid) or an orbit table, with the site's clock-correction chain.

    Raises
    ------
    turnstamp.errors.ConfigError
        The file is unreadable or invalid; the message names the field and value.
    """
    from .config import load_site as load

    return load(path)


def load_template(path: _PathLike) -> PulseTemplate:
    """Read a pulse template (our own TOML/JSON format, ``schemas/template.schema.json``).

    Parameters
    ----------
    path : str or path-like
        Template file: peaks (positions and widths in cycles) or a binned profile.

    Returns
    -------
    turnstamp.core.template.PulseTemplate

    Raises
    ------
    turnstamp.errors.ModelError
        The file is unreadable or invalid; the message names the field and value.
    """
    from .files.inputs import load_template as load

    return load(path)


def tag_events(events: pa.Table | Mapping[str, np.ndarray],
               models: SpinModel | _PathLike | Sequence[SpinModel | _PathLike],
               site: SiteConfig | _PathLike, *, time_scale: str = "UTC",
               time_origin: str = "2000-01-01T12:00:00", time_unit: str | None = None,
               target: str | None = None, source: str = "events",
               table_cache: _PathLike | None = None) -> pa.Table:
    """Barycentric time and rotational phase of every event, as ``turnstamp tag`` gives.

    The same code path as the ``tag`` command (``turnstamp.tagging``): for the same
    events, models and site, the same archive rows.

    Parameters
    ----------
    events : pyarrow.Table or mapping of str to numpy.ndarray
        ``event_id`` (uint64) and ``time_ns`` (by default int64 ns since
        2000-01-01T12:00:00 in ``time_scale``), and optionally the other columns of
        the wire format (``energy_kev``, ``ra_deg``, ``dec_deg``, ``score``,
        ``weight``, ...).
    models : SpinModel, path, or a sequence of them
        The target's spin models (several: one per validity window).
    site : SiteConfig or path
        The site, or a file with a [site] table (see ``load_site``).
    time_scale : {"UTC", "TAI", "GPS", "TT"}
        Scale of ``time_ns`` (for UTC, a count of labels of 86 400 s a day).
    time_origin : str
        What ``time_ns`` counts from: "2000-01-01T12:00:00" (default), "unix"
        (1970-01-01T00:00:00), "gps" (1980-01-06T00:00:00) or any instant
        ``YYYY-MM-DDTHH:MM:SS``, in ``time_scale``.
    time_unit : {"ns", "us", "ms", "s"}, optional
        Unit of ``time_ns`` (default ns; floating-point columns are accepted in the
        other units and rounded to the nearest ns). Saying "ns" explicitly also
        accepts times within 40 days of the origin, which otherwise look like
        seconds read as nanoseconds.
    target : str, optional
        Target name written to the archive's ``target`` column (default: the
        models' target name).
    source : str
        Written to the archive's ``source`` column.
    table_cache : path, optional
        Folder of cached barycentre tables (default: built in memory).

    Returns
    -------
    pyarrow.Table
        One row per tagged event in the archive schema (``schemas/archive.arrow.json``):
        ``site_tt_ns`` (ns TT), ``barycentric_tdb_ns`` (ns TDB), ``phase`` (cycles in
        [0, 1)), ``pulse_number``, ``model_id``, ``quality_flags``, ...; provenance in
        the schema metadata. Rejected events (duplicate ids, bad values) are left out.

    Raises
    ------
    turnstamp.errors.InputError
        A missing or mistyped column, an unknown time scale, origin or unit, times
        that look like another convention (the error names the likely one), invalid
        models.
    """
    from pathlib import Path

    import pyarrow as pa

    from .assemble import Environment
    from .core.timebase import Scale
    from .errors import InputError
    from .tagging.run import offline_target, tag_table
    from .tagging.times import TimeConvention

    table = events if isinstance(events, pa.Table) else pa.table(dict(events))
    if time_scale not in ("UTC", "TAI", "GPS", "TT"):
        raise InputError("time_scale", time_scale, "must be one of ['UTC', 'TAI', 'GPS', 'TT']")
    convention = TimeConvention(time_origin, time_unit)
    setup = offline_target(_spin_models(models), target)
    env = Environment.from_site(site if not isinstance(site, str | os.PathLike)
                                else load_site(site))
    return tag_table(table, setup, env, Scale(time_scale),
                     None if table_cache is None else Path(table_cache), source=source,
                     convention=convention)


def _spin_models(models) -> list[SpinModel]:
    if isinstance(models, str | os.PathLike) or not isinstance(models, Sequence):
        models = [models]
    return [m if not isinstance(m, str | os.PathLike) else load_model(m) for m in models]


@dataclass(frozen=True)
class TemplateOffset:
    """Phase offset of events against a pulse template (see ``fit_offset``).

    Attributes
    ----------
    offset_cycles : float
        Offset in (-0.5, 0.5] cycles; positive means the data pulse arrives later:
        data ~ template(phase - offset). NaN without events.
    sigma_cycles : float
        1-sigma uncertainty of the offset, cycles (inf when it cannot be estimated).
    amplitude : float
        Pulsed signal in weighted counts (events, for unit weights).
    significance_sigma : float
        One-sided Gaussian significance of the pulse after the search over offsets.
    detected : bool
        The significance reached the detection threshold (3 sigma).
    fit : turnstamp.core.template.OffsetFit
        The core's whole result (harmonics used, coefficients, amplitude error).
    """

    offset_cycles: float
    sigma_cycles: float
    amplitude: float
    significance_sigma: float
    detected: bool
    fit: OffsetFit = field(repr=False)

    def offset_us(self, frequency_hz: float) -> float:
        """The offset in microseconds at spin frequency ``frequency_hz`` (Hz)."""
        return self.fit.shift_us(frequency_hz)

    def sigma_us(self, frequency_hz: float) -> float:
        """The 1-sigma uncertainty in microseconds at spin frequency ``frequency_hz`` (Hz)."""
        return self.fit.sigma_us(frequency_hz)


def fit_offset(phases: Any, template: PulseTemplate | _PathLike, weights: Any = None, *,
               harmonics: int | None = None) -> TemplateOffset:
    """Phase offset of events against a pulse template, with its uncertainty.

    The events' trigonometric moments (``core.stats.PhaseMoments``, 20 harmonics)
    are matched to the template's Fourier coefficients (``core.template.fit_offset``:
    Taylor's Fourier-domain template match on unbinned moments, with photon noise).

    Parameters
    ----------
    phases : array_like of float
        Rotational phases, cycles (reduced modulo 1).
    template : PulseTemplate or path
        The expected pulse shape, or its file (see ``load_template``).
    weights : array_like of float, optional
        Photon weights (>= 0), one per phase; default 1.
    harmonics : int, optional
        Harmonics in the fit (1..20); default: those where the template has power.

    Returns
    -------
    TemplateOffset
        ``offset_cycles`` and ``sigma_cycles`` (cycles), amplitude, significance.

    References
    ----------
    Taylor J.H. 1992, Phil. Trans. R. Soc. Lond. A 341, 117.
    """
    from .core.moments import PhaseMoments
    from .core.template import PulseTemplate
    from .core.templatefit import fit_offset as match_template

    if not isinstance(template, PulseTemplate):
        template = load_template(template)
    fit = match_template(PhaseMoments().update(phases, weights), template, harmonics)
    return TemplateOffset(fit.shift_cycles, fit.sigma_cycles, fit.amplitude,
                          fit.significance_sigma, fit.detected, fit)
