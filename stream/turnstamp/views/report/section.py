"""One target's part of the report: the numbers of every recipe, its figures (pulse
profile, phase-time map, significance against time, clock-chain check), their entry in
``report-data.json`` and the HTML section."""

from __future__ import annotations

from dataclasses import dataclass

from .content import NightContent
from .figuredata import (
    DETECTED_SIGMA,
    clock_data,
    final_sigma,
    phase_time_map_data,
    profile_data,
    significance_data,
)
from .figures import (
    draw_clock,
    draw_phase_time_map,
    draw_profile,
    draw_significance,
    png_bytes,
)
from .night import NightFolder, config_targets
from .page import safe_name, target_html

__all__ = ["TargetSection", "target_section"]


_PROFILE_KEYS = ("source", "events", "sum_weights", "counts", "errors", "harmonics",
                 "background_per_bin", "template_shift_cycles", "template_amplitude",
                 "weighted", "bins", "data_until_tt_ns", "pulsed", "detected_sigma")
_TIME_MAP_KEYS = ("counts", "time_edges_tt_ns", "time_edges_utc_hours", "bins", "total",
                  "rows", "weighted", "row_seconds", "row_exposure", "colour_range")


@dataclass
class TargetSection:
    """A target's figures (PNG and captions), its ``report-data.json`` entry and HTML."""

    figures: list[dict]
    data: dict
    html: str


@dataclass
class _RecipeNumbers:
    profiles: dict[str, dict]
    time_maps: dict[str, dict]
    curves: dict[str, dict]


def target_section(Figure, content: NightContent, target: str,
                   recipes: list[str]) -> TargetSection:
    """Compute, draw and describe one target.

    Parameters
    ----------
    Figure : type
        ``matplotlib.figure.Figure`` (imported by the caller, Agg renderer).
    content : NightContent
        The night; notes about this target are added to ``content.night.notes``.
    target : str
        Target name.
    recipes : list of str
        Its recipes, in bit order.

    Returns
    -------
    TargetSection
    """
    template, note = _template_for(content.night, target)
    if note:
        content.night.notes.append(note)
    numbers = _recipe_numbers(content, target, recipes, template)
    clock = clock_data(content.clock_rows.get((target,)), content.hours)
    stem = safe_name(target)
    clock_figure = _clock_figure(Figure, content, target, stem, clock)
    figures = [f for f in (
        _profile_figure(Figure, target, stem, numbers.profiles),
        _time_map_figure(Figure, content, target, stem, numbers.time_maps),
        _significance_figure(Figure, content, target, stem, numbers.curves),
        clock_figure) if f is not None]
    data = {
        "recipes": recipes,
        "profile": {r: {k: p[k] for k in _PROFILE_KEYS} for r, p in numbers.profiles.items()},
        "phase_time_map": {r: {k: m[k] for k in _TIME_MAP_KEYS}
                           for r, m in numbers.time_maps.items()},
        "significance": {r: {"source": s["source"], "sqrt_t_fit": s["sqrt_t_fit"],
                             "windows": s["windows"]} for r, s in numbers.curves.items()},
        "clock": clock,
    }
    html = target_html(target, recipes, figures, clock_figure, clock, numbers.profiles,
                       numbers.curves)
    return TargetSection(figures, data, html)


def _recipe_numbers(content: NightContent, target: str, recipes: list[str],
                    template) -> _RecipeNumbers:
    numbers = _RecipeNumbers({}, {}, {})
    significance = content.night.table("significance")
    for recipe in recipes:
        key = (target, recipe)
        grid = content.archive.grids.get(key)
        weighted = content.weighted.get(key, grid.weighted if grid else False)
        profile = profile_data(target, recipe, content.profile_rows.get(key), grid, template,
                               weighted)
        time_map = phase_time_map_data(grid, content.hours)
        curve = significance_data(target, recipe, significance, grid, content.trials,
                                  content.hours, content.start_ns)
        if profile is not None:
            _mark_detection(profile, curve)
        for found, into in ((profile, numbers.profiles), (time_map, numbers.time_maps),
                            (curve, numbers.curves)):
            if found is not None:
                into[recipe] = found
    return numbers


def _mark_detection(profile: dict, curve: dict | None) -> None:
    """Whether the profile shows a pulsation (the H-test on all data so far reaches
    ``DETECTED_SIGMA``); without a significance curve it is taken to."""
    sigma = final_sigma((curve or {}).get("windows", {}).get("cumulative"))
    profile["detected_sigma"] = sigma
    profile["detection_sigma"] = DETECTED_SIGMA
    profile["pulsed"] = sigma is None or sigma >= DETECTED_SIGMA
    if not profile["pulsed"]:
        profile["template_note"] = None


def _template_for(night: NightFolder, target: str):
    """The configured pulse template of a target, or (None, a note why not)."""
    from ...files.inputs import load_template

    path = (config_targets(night.metadata).get(target) or {}).get("template")
    if not path:
        return None, None
    try:
        return load_template(path), None
    except Exception as exc:  # noqa: BLE001 - the report goes on without the overlay
        return None, f"template {path} could not be read ({exc}); no overlay"


def _figure(fig, file: str, alt: str, caption: str) -> dict:
    """One figure of the page: PNG bytes, file name, HTML id, alternative text, caption."""
    return {"png": png_bytes(fig), "file": file, "id": file.removesuffix(".png"), "alt": alt,
            "caption": caption}


def _profile_figure(Figure, target, stem, profiles) -> dict | None:
    if not profiles:
        return None
    notes = [p["template_note"] for p in profiles.values() if p["template_note"]]
    source = next(iter(profiles.values()))["source"]
    return _figure(
        draw_profile(Figure, target, profiles), f"{stem}-profile.png",
        f"{target} pulse profiles",
        f"{target}: pulse profile over two cycles per recipe ({source}), with errors "
        "sqrt(sum of squared weights); for a detected pulsation, "
        f"the Fourier estimate and the unpulsed level (H-test at least {DETECTED_SIGMA:g}σ). "
        + ("Overlay: " + notes[0] + "." if notes else ""))


def _time_map_figure(Figure, content, target, stem, time_maps) -> dict | None:
    if not time_maps:
        return None
    return _figure(
        draw_phase_time_map(Figure, target, time_maps, content.hours),
        f"{stem}-phase-time-map.png", f"{target} phase-time map",
        f"{target}: phase against time from the archive rows (weights as in each recipe's "
        "statistics; events outside the spin model's validity left out). A row only partly "
        "covered by data (the first and the last) is scaled to a full row's time; the colour "
        "scale is set by the rows fully covered.")


def _significance_figure(Figure, content, target, stem, curves) -> dict | None:
    if not curves or content.hours is None:
        return None
    return _figure(
        draw_significance(Figure, target, curves, content.hours),
        f"{stem}-significance.png", f"{target} significance against time",
        f"{target}: H-test significance per window; dotted: after the trials correction; "
        "dashed, for a detected pulsar only: σ ∝ √t fitted to the cumulative curve (a steady "
        "pulsar's significance grows as the square root of exposure).")


def _clock_figure(Figure, content, target, stem, clock) -> dict | None:
    if clock is None or not clock["chunk_mid_tt_ns"].size or content.hours is None:
        return None
    return _figure(draw_clock(Figure, target, clock, content.hours), f"{stem}-clock.png",
                   f"{target} clock-chain check",
                   f"{target}: template offset per chunk with 1σ errors, the tolerance band "
                   "and the fitted model (a step drawn as a step).")
