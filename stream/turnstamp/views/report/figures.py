"""The figures, drawn with matplotlib (imported only when a report is built, with the
Agg renderer) in the colour-blind-safe Okabe–Ito palette."""

from __future__ import annotations

import io

import numpy as np

from ...core.timebase import NS_PER_S
from ...errors import ReportError
from .timegrid import UtcHours
from .utcaxis import utc_axis

__all__ = [
    "OKABE_ITO",
    "RC_PARAMS",
    "import_matplotlib",
    "png_bytes",
    "draw_profile",
    "draw_phase_time_map",
    "draw_significance",
    "draw_clock",
]


OKABE_ITO = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky_blue": "#56B4E9",
    "bluish_green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish_purple": "#CC79A7",
}
"""The qualitative colour-blind-safe palette of Okabe & Ito (2008), used throughout."""

_SERIES = [OKABE_ITO[k] for k in ("blue", "orange", "bluish_green", "reddish_purple",
                                  "sky_blue", "vermillion", "black")]
_STATUS_COLOUR = {"OK": OKABE_ITO["bluish_green"], "WARN": OKABE_ITO["orange"],
                  "FAIL": OKABE_ITO["vermillion"]}
_DPI = 100
RC_PARAMS = {"font.size": 11, "axes.titlesize": 12, "axes.labelsize": 11, "xtick.labelsize": 10,
             "ytick.labelsize": 10, "legend.fontsize": 10, "figure.titlesize": 12,
             "axes.spines.top": False, "axes.spines.right": False}


def import_matplotlib():
    """Import matplotlib with the Agg renderer, or say how to install it."""
    try:
        import matplotlib
    except ImportError:
        raise ReportError("the report needs matplotlib, an optional extra: "
                          "pip install 'turnstamp[report]' (or pip install matplotlib)") from None
    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    return matplotlib, Figure


def png_bytes(fig) -> bytes:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    buffer = io.BytesIO()
    FigureCanvasAgg(fig).print_png(buffer)  # at the figure's dpi (_DPI)
    return buffer.getvalue()


def _units(weighted: bool) -> str:
    return "weighted counts per bin" if weighted else "events per bin"


def _frame(fig, width_in: float, height_in: float, *, left=0.85, right=0.3, top=0.45,
           bottom=0.65, hgap=None, wgap=None) -> None:
    """Margins in inches (no layout engine: drawing twice for layout costs time)."""
    fig.subplots_adjust(left=left / width_in, right=1 - right / width_in,
                        top=1 - top / height_in, bottom=bottom / height_in,
                        hspace=hgap, wspace=wgap)


def _harmonics(n: int) -> str:
    return f"{n} harmonic{'s' if n != 1 else ''}"


def _profile_panel(ax, target: str, recipe: str, d: dict) -> None:
    bins = d["bins"]
    centres = (np.arange(2 * bins) + 0.5) / bins
    counts = np.tile(d["counts"], 2)
    errors = np.tile(d["errors"], 2)
    ax.stairs(counts, np.arange(2 * bins + 1) / bins, baseline=None, color=_SERIES[0],
              linewidth=1.3, label="weighted counts" if d["weighted"] else "events")
    ax.errorbar(centres, counts, yerr=errors, fmt="none", ecolor=_SERIES[0],
                elinewidth=1, capsize=0, label="1σ error")
    pulsed = d.get("pulsed", True)
    if d["fourier"] is not None and pulsed:
        ax.plot(d["fine_phase"], d["fourier"], color=_SERIES[1], linewidth=1.6,
                label=f"Fourier estimate\n({_harmonics(d['harmonics'])})")
    if d.get("background_per_bin") is not None and pulsed:
        ax.axhline(d["background_per_bin"], color=OKABE_ITO["black"], linestyle=":",
                   linewidth=1.3, label="unpulsed level")
    if d["template_curve"] is not None and pulsed:
        ax.plot(d["fine_phase"], d["template_curve"], color=_SERIES[2], linewidth=1.4,
                linestyle="--", label=f"template, shifted\n{d['template_shift_cycles']:+.4f} "
                "cycles")
    if not pulsed:
        ax.plot([], [], " ", label=f"no pulsation detected\n(H-test {d['detected_sigma']:.1f}σ"
                                   f" < {d['detection_sigma']:g}σ)")
    ax.set_xlim(0, 2)
    ax.set_xlabel("rotational phase (cycles; two cycles shown)")
    ax.set_ylabel(_units(d["weighted"]))
    weighting = "weighted" if d["weighted"] else "unweighted"
    ax.set_title(f"{target} / {recipe}: pulse profile ({weighting}, {d['events']:,} "
                 f"events, sum of weights {d['sum_weights']:,.1f})")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    ax.grid(alpha=0.25)


def draw_profile(Figure, target: str, profiles: dict[str, dict]):
    recipes = list(profiles)
    panel, gap = 2.9, 1.0
    width, height = 11.0, len(recipes) * panel + (len(recipes) - 1) * gap + 1.1
    fig = Figure(figsize=(width, height), dpi=_DPI)
    axes = fig.subplots(len(recipes), 1, squeeze=False)[:, 0]
    _frame(fig, width, height, right=3.3, hgap=gap / panel)
    for ax, recipe in zip(axes, recipes, strict=True):
        _profile_panel(ax, target, recipe, profiles[recipe])
    return fig


def draw_phase_time_map(Figure, target: str, time_maps: dict[str, dict], hours: UtcHours):
    recipes = list(time_maps)
    width, height = 5.5 * len(recipes) + 0.5, 5.2
    fig = Figure(figsize=(width, height), dpi=_DPI)
    axes = fig.subplots(1, len(recipes), squeeze=False)[0]
    _frame(fig, width, height, left=1.05, right=0.95, wgap=0.45)
    for ax, recipe in zip(axes, recipes, strict=True):
        d = time_maps[recipe]
        exposure = np.asarray(d["row_exposure"], float)[:, None]
        image = np.tile(np.asarray(d["counts"], float)
                        / np.where(exposure > 0, exposure, 1.0), (1, 2))  # per full row
        phase_edges = np.arange(2 * d["bins"] + 1) / d["bins"]
        rows = hours.plot(d["time_edges_utc_hours"])
        low, high = d["colour_range"]
        mesh = ax.pcolormesh(phase_edges, rows, image, cmap="viridis", shading="flat",
                             vmin=low, vmax=high)
        bar = fig.colorbar(mesh, ax=ax, fraction=0.08, pad=0.03, extend="both")
        bar.set_label(f"{_units(d['weighted'])} per {d['row_seconds']} s")
        ax.set_xlabel("rotational phase (cycles)")
        ax.set_ylabel(utc_axis(ax.yaxis, hours, float(rows[0]), float(rows[-1])))
        ax.set_ylim(rows[0], rows[-1])
        ax.set_title(f"{target} / {recipe}: phase-time map")
    return fig


def _significance_panel(ax, target: str, recipe: str, d: dict, hours: UtcHours) -> None:
    top, last = 7.0, None
    for index, (label, series) in enumerate(d["windows"].items()):
        colour = _SERIES[index % len(_SERIES)]
        x, y = hours.plot(series["utc_hours"]), series["h_sigma"]
        name = ("all data so far" if label == "cumulative"
                else "last " + label.replace("min", " min"))
        ax.plot(x, y, color=colour, linewidth=1.6, marker="o", markersize=3,
                label=f"H-test, {name}")
        if np.isfinite(y).any():
            top = max(top, float(np.nanmax(y)) * 1.15)
        if label == "cumulative":
            trials = series["trials"]
            ax.plot(x, series["h_sigma_post_trials"], color=colour, linewidth=1.2,
                    linestyle=":", label=f"all data, after {trials} trial"
                    f"{'s' if trials != 1 else ''}")
            last = (y[-1], series["h_sigma_post_trials"][-1], trials)
            _sqrt_t(ax, d.get("sqrt_t_fit"), series, hours)
    labelled = (3, 4, 5) if top <= 25 else (3, 5) if top <= 50 else (5,)
    for level in (3, 4, 5):
        ax.axhline(level, color="#777777", linewidth=0.9, linestyle=(0, (4, 3)))
        if level in labelled:
            ax.annotate(f"{level}σ", xy=(1.0, level), xycoords=("axes fraction", "data"),
                        xytext=(3, 0), textcoords="offset points", va="center",
                        fontsize=10, color="#555555")
    ax.set_ylim(bottom=min(0.0, ax.get_ylim()[0]), top=top)
    ax.set_ylabel("significance (σ, one-sided)")
    now = ""
    if last is not None and np.isfinite(last[0]):
        now = (f": now {last[0]:.1f}σ, {last[1]:.1f}σ after {last[2]} trials"
               if last[0] >= 0 else ": no excess")
    ax.set_title(f"{target} / {recipe}: significance against time{now}")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    ax.grid(alpha=0.25)


def _sqrt_t(ax, fit: dict | None, series: dict, hours: UtcHours) -> None:
    """The √t growth of a steady pulsar's σ, drawn only for a detected pulsar."""
    if fit is None:
        return
    t_ns = np.linspace(fit["start_tt_ns"], series["data_until_tt_ns"][-1], 200)
    seconds = (t_ns - fit["start_tt_ns"]) / NS_PER_S
    ax.plot(hours.plot(hours(t_ns.astype(np.int64))), fit["sigma_per_sqrt_s"] * np.sqrt(seconds),
            color=OKABE_ITO["reddish_purple"], linestyle="--", linewidth=1.2,
            label=f"steady pulsar: σ ∝ √t\n({fit['sigma_per_sqrt_s'] * 60:.3g} σ/√h)")


def draw_significance(Figure, target: str, curves: dict[str, dict], hours: UtcHours):
    recipes = list(curves)
    panel, gap = 3.2, 0.6
    width, height = 11.0, len(recipes) * panel + (len(recipes) - 1) * gap + 1.1
    fig = Figure(figsize=(width, height), dpi=_DPI)
    axes = fig.subplots(len(recipes), 1, squeeze=False, sharex=True)[:, 0]
    _frame(fig, width, height, right=2.9, hgap=gap / panel)
    for ax, recipe in zip(axes, recipes, strict=True):
        _significance_panel(ax, target, recipe, curves[recipe], hours)
    low, high = axes[-1].get_xlim()
    axes[-1].set_xlabel(utc_axis(axes[-1].xaxis, hours, low, high))
    return fig


def _clock_model(ax, d: dict, x: np.ndarray, hours: UtcHours) -> None:
    """The fitted model of the offsets: a step as a step, else the constant offset."""
    colour = OKABE_ITO["vermillion"]
    levels, at = d.get("step_levels_us"), d.get("step_time_utc_hours")
    if levels is not None and at is not None and x.size:
        step_x = float(hours.plot(at))
        ax.plot([min(x.min(), step_x), step_x, step_x, max(x.max(), step_x)],
                [levels[0], levels[0], levels[1], levels[1]], color=colour, linestyle="--",
                linewidth=1.4, label=f"fitted step {levels[1] - levels[0]:+.1f} µs")
    elif d.get("drift_line") is not None:
        line = d["drift_line"]
        rate = np.diff(line["offset_us"])[0] / max(np.diff(line["utc_hours"])[0], 1e-12)
        ax.plot(hours.plot(line["utc_hours"]), line["offset_us"], color=colour, linestyle="--",
                linewidth=1.4, label=f"fitted drift {rate:+.1f} µs/h")
    elif d["fitted_offset_us"] is not None:
        ax.axhline(d["fitted_offset_us"], color=colour, linestyle="--", linewidth=1.2,
                   label=f"night's offset {d['fitted_offset_us']:+.1f} µs")


def draw_clock(Figure, target: str, d: dict, hours: UtcHours):
    import textwrap

    lines = []
    for line in d["summary"].splitlines()[:8]:
        lines.extend(textwrap.wrap(line, 118) or [""])
    lines = lines[:12]
    plot, text = 4.0, 0.2 * len(lines) + 0.25
    width, height = 11.0, plot + text + 1.1
    fig = Figure(figsize=(width, height), dpi=_DPI)
    ax = fig.subplots()
    _frame(fig, width, height, right=2.9, bottom=0.65 + text)
    x, y, e = hours.plot(d["utc_hours"]), d["offset_us"], d["sigma_us"]
    detected = d["detected"]
    if d["tolerance_us"] is not None:
        ax.axhspan(-d["tolerance_us"], d["tolerance_us"], color=OKABE_ITO["sky_blue"],
                   alpha=0.22, label=f"tolerance ±{d['tolerance_us']:.1f} µs")
    ax.axhline(0.0, color="#777777", linewidth=0.8)
    e_plot = np.where(np.isfinite(e), e, np.nan)
    if detected.size and detected.any():
        ax.errorbar(x[detected], y[detected], yerr=e_plot[detected], fmt="o", markersize=4,
                    color=_SERIES[0], elinewidth=1.2, label="pulse arrival offset\nper chunk")
    if detected.size and (~detected).any():
        ax.errorbar(x[~detected], y[~detected], yerr=e_plot[~detected], fmt="o",
                    markersize=4, markerfacecolor="white", color="#888888",
                    label="chunk without\na detected pulse")
    _clock_model(ax, d, x, hours)
    low, high = ax.get_xlim()
    ax.set_xlabel(utc_axis(ax.xaxis, hours, low, high))
    ax.set_ylabel("offset from template (µs)")
    colour = _STATUS_COLOUR.get(d["status"], OKABE_ITO["black"])
    ax.set_title(f"{target} / {d['recipe']}: clock-chain check — {d['status']} "
                 f"({d['kind']})", color=colour)
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    ax.grid(alpha=0.25)
    fig.text(0.85 / width, (text + 0.05) / height, "\n".join(lines), va="top", ha="left",
             fontsize=10, family="monospace")
    return fig
