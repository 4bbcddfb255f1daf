"""Building the night report: read the folder, gather the night, one section per
target, then the accounting and provenance; write the figures, ``report-data.json``
and the page (each file replaced atomically, so a browser never sees half a page)."""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import os
import uuid
from collections.abc import Callable
from pathlib import Path

from ...files.durable import atomic_write_text
from .accounting import accounting_data, provenance_rows
from .content import NightContent, gather
from .figuredata import json_safe
from .figures import RC_PARAMS, import_matplotlib
from .night import load_night
from .page import accounting_html, escape, page_html, provenance_html
from .section import target_section

__all__ = ["build_report"]


def _no_progress(steps: float = 1, *, total: float | None = None) -> None:
    """The ``advance`` of a report built without a progress display."""


def build_report(output_dir: Path, report_dir: Path | None = None, *,
                 refresh_seconds: float | None = None,
                 advance: Callable[..., None] | None = None) -> Path:
    """Write the night report of an output folder.

    Parameters
    ----------
    output_dir : Path
        Service output folder (live or finished) or offline tagging output.
    report_dir : Path, optional
        Where to write (default ``output_dir/report``).
    refresh_seconds : float, optional
        Make the page reload itself this often, seconds (``--every``).
    advance : callable, optional
        Told of progress as ``advance(steps, total=...)``, as the ``advance`` of
        ``views.progress.progress``: one step for reading the folder, one per
        target, one for the page.

    Returns
    -------
    Path
        ``index.html``: one self-contained page (figures embedded as base64 PNG).
        Beside it: every figure as a PNG file and ``report-data.json``, the
        numbers behind each figure.

    Raises
    ------
    FileNotFoundError
        No such folder.
    ReportError
        matplotlib is missing, or the folder holds no turnstamp output.
    """
    matplotlib, Figure = import_matplotlib()
    advance = advance or _no_progress
    output_dir = Path(output_dir)
    report_dir = Path(report_dir) if report_dir is not None else output_dir / "report"
    night = load_night(output_dir)
    report_dir.mkdir(parents=True, exist_ok=True)
    content = gather(night)
    for target in content.targets:
        excluded = content.archive.quality.excluded(target)
        if excluded:
            night.notes.append(f"{target}: {excluded:,} events were tagged outside the validity "
                               "window of its spin model: they are left out of the profile, "
                               "the phase-time map, the significance and the clock check.")
    advance(1, total=len(content.targets) + 2)
    figures: list[dict] = []
    sections: list[str] = []
    data: dict = {"format": "turnstamp.report-data", "version": 1,
                  "folder": str(output_dir), "mode": night.mode, "targets": {}}
    with matplotlib.rc_context(RC_PARAMS):
        for target, recipes in content.targets.items():
            section = target_section(Figure, content, target, recipes)
            figures.extend(section.figures)
            sections.append(section.html)
            data["targets"][target] = section.data
            advance(1)
    accounting = accounting_data(night, content.archive)
    provenance = provenance_rows(night, content.archive, list(content.targets))
    data.update(accounting=accounting, provenance=dict(provenance), notes=night.notes,
                figures=[f["file"] for f in figures])
    _write_files(report_dir, figures, data)
    body = [*sections, accounting_html(accounting, night), provenance_html(provenance, night)]
    page = page_html(f"turnstamp night report: {output_dir.name}",
                     _header_html(output_dir, content, refresh_seconds), body, refresh_seconds)
    index = report_dir / "index.html"
    atomic_write_text(index, page)
    advance(1)
    return index


def _write_files(report_dir: Path, figures: list[dict], data: dict) -> None:
    for figure in figures:
        _write_bytes(report_dir / figure["file"], figure["png"])
    atomic_write_text(report_dir / "report-data.json",
                            json.dumps(json_safe(data), indent=1) + "\n")


def _write_bytes(path: Path, data: bytes) -> None:
    temp = path.parent / f".{path.name}.{uuid.uuid4().hex}.tmp"
    try:
        temp.write_bytes(data)
        os.replace(temp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            temp.unlink()
        raise


def _header_html(output_dir: Path, content: NightContent,
                 refresh_seconds: float | None) -> str:
    """Title, what was read, the span of the data, and the notes of what is missing."""
    night, hours = content.night, content.hours
    generated = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M:%S UTC")
    span = ""
    if content.start_ns is not None and hours is not None and content.end_ns is not None:
        span = f" Data from {hours.text(content.start_ns)} to {hours.text(content.end_ns)}."
    state = (night.status or {}).get("state")
    header = (f"<h1>turnstamp night report</h1><p class=meta>{escape(output_dir)} — "
              f"{escape(night.mode)} output{', service ' + escape(state) if state else ''}."
              f"{escape(span)} Generated {generated}"
              + (f", refreshed every {refresh_seconds:g} s" if refresh_seconds else "")
              + ".</p>")
    warnings = [str(w) for w in (night.status or {}).get("warnings") or []]
    notes = night.notes + [f"Service warning: {w}" for w in warnings]
    if notes:
        header += ("<div class=notes><strong>What this report could not show, and notes"
                   "</strong><ul>" + "".join(f"<li>{escape(n)}</li>" for n in notes)
                   + "</ul></div>")
    return header
