"""``turnstamp report``: a night report as one self-contained HTML page and PNG figures.

The report reads an output folder, never the service: the Arrow streams
(``archive``, ``significance``, ``profiles``, ``clock``, ``ledger``, ``rejects``,
read with ``io.sinks`` so that open files of a live folder count up to their
last complete batch), ``status.json`` when present, and the provenance in the
files' schema metadata. A folder written by ``turnstamp tag`` holds one file of
archive schema under any name (and perhaps its rejects); the report then builds
what the archive alone allows (profile and significance from the tagged phases)
and says what is missing.

Per target the report draws the pulse profile (two cycles), the phaseogram,
significance against time and the clock-chain check; then the accounting of
every event and the provenance. ``report-data.json`` beside the page holds the
numbers behind every figure, so that tests (and people) can check a figure
against the Arrow files without reading pixels.

matplotlib is an optional extra (``pip install 'turnstamp[report]'``); it is
imported only when a report is built, with the Agg renderer (no display).

Modules: ``night`` reads the folder, ``timegrid`` reduces the archive to a time
grid, ``figuredata`` and ``accounting`` compute the numbers, ``figures`` draws
them and ``page`` writes the HTML; this module assembles the report and holds
the command.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import logging
import os
import sys
import time
import uuid
from pathlib import Path
from typing import Any

from ...io import sinks
from .accounting import accounting_data, provenance_rows
from .figuredata import (
    clock_data,
    json_safe,
    last_rows,
    phaseogram_data,
    profile_data,
    significance_data,
)
from .figures import (
    OKABE_ITO,
    RC_PARAMS,
    draw_clock,
    draw_phaseogram,
    draw_profile,
    draw_significance,
    import_matplotlib,
    png_bytes,
)
from .night import NightFolder, ReportError, config_targets, load_night, recipes_from_metadata
from .page import accounting_html, escape, page_html, provenance_html, safe_name, target_html
from .timegrid import GRID_S, UtcHours, first_data_ns, last_data_ns, reduce_archive

__all__ = [
    "OKABE_ITO",
    "GRID_S",
    "ReportError",
    "NightFolder",
    "load_night",
    "build_report",
    "report_main",
]


log = logging.getLogger(__name__)


def _weighted_flags(night: NightFolder, targets: dict[str, list[str]]):
    """Whether each recipe's statistics use weights (config, then rows, then status)."""
    out: dict[tuple[str, str], bool] = {}
    for name, target in config_targets(night.metadata).items():
        for recipe in target.get("recipes") or []:
            if isinstance(recipe, dict) and "use_weights" in recipe:
                out[(name, str(recipe.get("name")))] = bool(recipe["use_weights"])
    significance = night.table("significance")
    if significance is not None:
        for (target, recipe), row in last_rows(significance, ("target", "recipe")).items():
            if row.get("events"):
                out[(str(target), str(recipe))] = bool(row["weighted"])
    for target in (night.status or {}).get("targets") or []:
        for recipe in target.get("recipes") or []:
            if isinstance(recipe, dict) and "weighted" in recipe:
                out.setdefault((str(target.get("name")), str(recipe.get("name"))),
                               bool(recipe["weighted"]))
    return out


def _targets(night: NightFolder) -> dict[str, list[str]]:
    targets = dict(recipes_from_metadata(night.metadata))
    for stem in ("significance", "profiles", "clock"):
        table = night.table(stem)
        if table is None:
            continue
        for target, recipe in zip(table["target"].to_pylist(), table["recipe"].to_pylist(),
                                  strict=True):
            names = targets.setdefault(str(target), [])
            if str(recipe) not in names:
                names.append(str(recipe))
    for target in (night.status or {}).get("targets") or []:
        names = targets.setdefault(str(target.get("name")), [])
        for recipe in target.get("recipes") or []:
            if str(recipe.get("name")) not in names:
                names.append(str(recipe.get("name")))
    return targets


def _template_for(night: NightFolder, target: str):
    from ...io.files import load_template

    path = (config_targets(night.metadata).get(target) or {}).get("template")
    if not path:
        return None, None
    try:
        return load_template(path), None
    except Exception as exc:  # noqa: BLE001 - the report goes on without the overlay
        return None, f"template {path} could not be read ({exc}); no overlay"


def _write_bytes(path: Path, data: bytes) -> None:
    temp = path.parent / f".{path.name}.{uuid.uuid4().hex}.tmp"
    try:
        temp.write_bytes(data)
        os.replace(temp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            temp.unlink()
        raise


def build_report(output_dir: Path, report_dir: Path | None = None, *,
                 refresh_seconds: float | None = None) -> Path:
    """Write the night report of an output folder.

    Parameters
    ----------
    output_dir : Path
        Service output folder (live or finished) or offline tagging output.
    report_dir : Path, optional
        Where to write (default ``output_dir/report``).
    refresh_seconds : float, optional
        Make the page reload itself this often (``--every``).

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
    from ...io.tables import bundled_leap_seconds

    output_dir = Path(output_dir)
    report_dir = Path(report_dir) if report_dir is not None else output_dir / "report"
    night = load_night(output_dir)
    report_dir.mkdir(parents=True, exist_ok=True)
    targets = _targets(night)
    weighted = _weighted_flags(night, targets)
    profile_rows = last_rows(night.table("profiles"), ("target", "recipe"))
    bins = {(str(t), str(r)): len(row["counts"]) for (t, r), row in profile_rows.items()
            if row.get("counts")}
    with_moments = night.table("significance") is None or night.table("profiles") is None
    archive = reduce_archive(night, weighted, bins, with_moments, targets)
    for target, recipe in archive.grids:
        names = targets.setdefault(target, [])
        if recipe not in names:
            names.append(recipe)
    start_ns = first_data_ns(night, archive)
    leaps = bundled_leap_seconds()
    hours = UtcHours(leaps, start_ns) if start_ns is not None else None
    end_ns = last_data_ns(night, archive)
    if hours is not None and end_ns is not None:
        hours.use_days_beyond(end_ns - start_ns)
    trials = max(1, sum(len(r) for r in targets.values()))
    clock_rows = last_rows(night.table("clock"), ("target",))

    figures: list[dict] = []
    data: dict[str, Any] = {"format": "turnstamp.report-data", "version": 1,
                            "folder": str(output_dir), "mode": night.mode, "targets": {}}
    sections = []
    with matplotlib.rc_context(RC_PARAMS):
        for target, recipes in targets.items():
            template, template_note = _template_for(night, target)
            if template_note:
                night.notes.append(template_note)
            profiles, grams, curves = {}, {}, {}
            for recipe in recipes:
                key = (target, recipe)
                grid = archive.grids.get(key)
                is_weighted = weighted.get(key, grid.weighted if grid else False)
                p = profile_data(target, recipe, profile_rows.get(key), grid, template,
                                 is_weighted)
                if p is not None:
                    profiles[recipe] = p
                g = phaseogram_data(grid, hours)
                if g is not None:
                    grams[recipe] = g
                s = significance_data(target, recipe, night.table("significance"), grid,
                                      trials, hours, start_ns)
                if s is not None:
                    curves[recipe] = s
            clock = clock_data(clock_rows.get((target,)), hours)
            target_figures = []
            stem = safe_name(target)
            if profiles:
                fig = draw_profile(Figure, target, profiles)
                notes = [p["template_note"] for p in profiles.values() if p["template_note"]]
                target_figures.append(_figure(
                    fig, f"{stem}-profile.png", f"{target} pulse profiles",
                    f"{target}: pulse profile over two cycles per recipe, with "
                    "errors sqrt(sum of squared weights), the harmonic estimate "
                    "and the background level. " + ("Overlay: " + notes[0] + "."
                                                    if notes else "")))
            if grams:
                fig = draw_phaseogram(Figure, target, grams, hours)
                target_figures.append(_figure(
                    fig, f"{stem}-phaseogram.png", f"{target} phaseogram",
                    f"{target}: phase against time from the archive rows (weights as in "
                    "each recipe's statistics; events outside the spin model's validity "
                    "left out)."))
            if curves and hours is not None:
                fig = draw_significance(Figure, target, curves, hours)
                target_figures.append(_figure(
                    fig, f"{stem}-significance.png", f"{target} significance against time",
                    f"{target}: H-test significance per window; dotted: after the trials "
                    "correction; dashed: σ ∝ √t fitted to the cumulative curve (a steady "
                    "pulsar's significance grows as the square root of exposure)."))
            clock_figure = None
            if clock is not None and clock["chunk_mid_tt_ns"].size and hours is not None:
                fig = draw_clock(Figure, target, clock, hours)
                clock_figure = _figure(fig, f"{stem}-clock.png", f"{target} clock-chain check",
                                       f"{target}: template offset per chunk with 1σ errors "
                                       "and the tolerance band.")
                target_figures.append(clock_figure)
            figures.extend(target_figures)
            data["targets"][target] = {
                "recipes": recipes,
                "profile": {r: {k: p[k] for k in (
                    "source", "events", "sum_weights", "counts", "errors", "harmonics",
                    "background_per_bin", "template_shift_cycles", "template_amplitude",
                    "weighted", "bins", "data_until_tt_ns")} for r, p in profiles.items()},
                "phaseogram": {r: {k: g[k] for k in (
                    "counts", "time_edges_tt_ns", "time_edges_utc_hours", "bins", "total",
                    "rows", "weighted", "row_seconds")} for r, g in grams.items()},
                "significance": {r: {"source": s["source"], "sqrt_t_fit": s["sqrt_t_fit"],
                                     "windows": s["windows"]} for r, s in curves.items()},
                "clock": clock,
            }
            sections.append(target_html(target, recipes, target_figures, clock_figure, clock,
                                        profiles, curves))
        accounting = accounting_data(night, archive)
        data["accounting"] = accounting
        provenance = provenance_rows(night, archive, list(targets))
        data["provenance"] = dict(provenance)
        data["notes"] = night.notes
        data["figures"] = [f["file"] for f in figures]

    for figure in figures:
        _write_bytes(report_dir / figure["file"], figure["png"])
    sinks.atomic_write_text(report_dir / "report-data.json",
                            json.dumps(json_safe(data), indent=1) + "\n")
    generated = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M:%S UTC")
    span = ""
    if start_ns is not None and hours is not None and end_ns is not None:
        span = f" Data from {hours.text(start_ns)} to {hours.text(end_ns)}."
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
    body = [*sections, accounting_html(accounting, night),
            provenance_html(provenance, night)]
    page = page_html(f"turnstamp night report: {output_dir.name}", header, body, refresh_seconds)
    index = report_dir / "index.html"
    sinks.atomic_write_text(index, page)
    return index


def _figure(fig, file: str, alt: str, caption: str) -> dict:
    """One figure of the page: PNG bytes, file name, alternative text, caption."""
    return {"png": png_bytes(fig), "file": file, "alt": alt, "caption": caption}


def report_main(args) -> int:
    """``turnstamp report OUTPUT_DIR [--to DIR] [--every SECONDS]``.

    Without ``--every``: build once and print the page's path. With it: rebuild
    every SECONDS until Ctrl-C (the page reloads itself at the same pace).
    """
    try:
        import_matplotlib()
    except ReportError as exc:
        print(f"turnstamp report: {exc}", file=sys.stderr)
        return 2
    folder = Path(args.output_dir)
    report_dir = Path(args.to) if getattr(args, "to", None) else None
    every = getattr(args, "every", None)
    if every is not None and not every > 0:
        print(f"turnstamp report: --every {every}: must be a positive number of seconds",
              file=sys.stderr)
        return 2
    if not folder.is_dir():
        print(f"turnstamp report: {folder}: no such output folder", file=sys.stderr)
        return 2
    if every is None:
        try:
            path = build_report(folder, report_dir)
        except ReportError as exc:
            print(f"turnstamp report: {exc}", file=sys.stderr)
            return 2
        print(path)
        return 0
    try:
        while True:
            started = time.monotonic()
            try:
                path = build_report(folder, report_dir, refresh_seconds=every)
                print(f"{dt.datetime.now(dt.UTC):%H:%M:%S} UTC  wrote {path}", flush=True)
            except (ReportError, sinks.ArrowFileError, OSError) as exc:
                print(f"{dt.datetime.now(dt.UTC):%H:%M:%S} UTC  not yet: {exc}",
                      file=sys.stderr, flush=True)
            time.sleep(max(0.0, every - (time.monotonic() - started)))
    except KeyboardInterrupt:
        return 0
