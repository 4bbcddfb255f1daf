"""The figures, drawn with matplotlib (imported only when a report is built, with the
Agg renderer) in the colour-blind-safe Okabe–Ito palette."""

from __future__ import annotations

import io

import numpy as np

from ...core.timebase import NS_PER_S
from ...errors import ReportError
from .timegrid import UtcHours

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


def draw_profile(Figure, target: str, profiles: dict[str, dict]):
    recipes = list(profiles)
    panel, gap = 2.9, 1.0
    width, height = 11.0, len(recipes) * panel + (len(recipes) - 1) * gap + 1.1
    fig = Figure(figsize=(width, height), dpi=_DPI)
    axes = fig.subplots(len(recipes), 1, squeeze=False)[:, 0]
    _frame(fig, width, height, right=3.3, hgap=gap / panel)
    for ax, recipe in zip(axes, recipes, strict=True):
        d = profiles[recipe]
        bins = d["bins"]
        centres = (np.arange(2 * bins) + 0.5) / bins
        counts = np.tile(d["counts"], 2)
        errors = np.tile(d["errors"], 2)
        ax.stairs(counts, np.arange(2 * bins + 1) / bins, baseline=None, color=_SERIES[0],
                  linewidth=1.3, label=f"data, {d['source']}")
        ax.errorbar(centres, counts, yerr=errors, fmt="none", ecolor=_SERIES[0],
                    elinewidth=1, capsize=0, label="±1σ per bin")
        if d["fourier"] is not None:
            ax.plot(d["fine_phase"], d["fourier"], color=_SERIES[1], linewidth=1.6,
                    label=f"harmonic estimate\n({d['harmonics']} harmonics)")
        if d.get("background_per_bin") is not None:
            ax.axhline(d["background_per_bin"], color=OKABE_ITO["black"], linestyle=":",
                       linewidth=1.3, label="background level")
        if d["template_curve"] is not None:
            ax.plot(d["fine_phase"], d["template_curve"], color=_SERIES[2], linewidth=1.4,
                    linestyle="--", label=f"template at fitted offset\n"
                    f"({d['template_shift_cycles']:+.4f} cycles)")
        ax.set_xlim(0, 2)
        ax.set_xlabel("rotational phase (cycles; two cycles shown)")
        ax.set_ylabel(_units(d["weighted"]))
        weighting = "weighted" if d["weighted"] else "unweighted"
        ax.set_title(f"{target} / {recipe}: pulse profile ({weighting}, {d['events']:,} "
                     f"events, sum of weights {d['sum_weights']:,.1f})")
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
        ax.grid(alpha=0.25)
    return fig


def draw_phase_time_map(Figure, target: str, time_maps: dict[str, dict], hours: UtcHours):
    recipes = list(time_maps)
    width, height = 5.5 * len(recipes) + 0.5, 5.2
    fig = Figure(figsize=(width, height), dpi=_DPI)
    axes = fig.subplots(1, len(recipes), squeeze=False)[0]
    _frame(fig, width, height, left=0.95, right=0.95, wgap=0.42)
    for ax, recipe in zip(axes, recipes, strict=True):
        d = time_maps[recipe]
        image = np.tile(d["counts"], (1, 2))
        phase_edges = np.arange(2 * d["bins"] + 1) / d["bins"]
        mesh = ax.pcolormesh(phase_edges, hours.plot(d["time_edges_utc_hours"]), image,
                             cmap="viridis",
                             shading="flat")
        bar = fig.colorbar(mesh, ax=ax, fraction=0.08, pad=0.03)
        bar.set_label(f"{_units(d['weighted'])} per {d['row_seconds']} s")
        ax.set_xlabel("rotational phase (cycles)")
        ax.set_ylabel(hours.axis_label)
        ax.set_title(f"{target} / {recipe}: phase-time map")
    return fig


def draw_significance(Figure, target: str, curves: dict[str, dict], hours: UtcHours):
    recipes = list(curves)
    panel, gap = 3.2, 0.6
    width, height = 11.0, len(recipes) * panel + (len(recipes) - 1) * gap + 1.1
    fig = Figure(figsize=(width, height), dpi=_DPI)
    axes = fig.subplots(len(recipes), 1, squeeze=False, sharex=True)[:, 0]
    _frame(fig, width, height, right=0.55, hgap=gap / panel)
    for ax, recipe in zip(axes, recipes, strict=True):
        d = curves[recipe]
        top = 7.0
        for index, (label, series) in enumerate(d["windows"].items()):
            colour = _SERIES[index % len(_SERIES)]
            x, y = hours.plot(series["utc_hours"]), series["h_sigma"]
            ax.plot(x, y, color=colour, linewidth=1.6, marker="o", markersize=3,
                    label=f"{label}" + (" (H-test)" if index == 0 else ""))
            if np.isfinite(y).any():
                top = max(top, float(np.nanmax(y)) * 1.15)
            if label == "cumulative":
                post = series["h_sigma_post_trials"]
                trials = series["trials"]
                ax.plot(x, post, color=colour, linewidth=1.2, linestyle=":",
                        label=f"cumulative after {trials} trial{'s' if trials != 1 else ''}")
                if np.isfinite(y[-1]):
                    ax.annotate(f"{y[-1]:.1f}σ ({post[-1]:.1f}σ after trials)",
                                xy=(x[-1], y[-1]), xytext=(-8, 8), textcoords="offset points",
                                ha="right", fontsize=10, color=colour)
                fit = d.get("sqrt_t_fit")
                if fit is not None:
                    t_ns = np.linspace(fit["start_tt_ns"], series["data_until_tt_ns"][-1], 200)
                    seconds = (t_ns - fit["start_tt_ns"]) / NS_PER_S
                    ax.plot(hours.plot(hours(t_ns.astype(np.int64))),
                            fit["sigma_per_sqrt_s"] * np.sqrt(seconds),
                            color=OKABE_ITO["reddish_purple"], linestyle="--", linewidth=1.2,
                            label=f"√t reference ({fit['sigma_per_sqrt_s'] * 60:.3g} σ/√h)")
        labelled = (3, 4, 5) if top <= 25 else (3, 5) if top <= 50 else (5,)
        for level in (3, 4, 5):
            ax.axhline(level, color="#777777", linewidth=0.9, linestyle=(0, (4, 3)))
            if level in labelled:
                ax.annotate(f"{level}σ", xy=(1.0, level), xycoords=("axes fraction", "data"),
                            xytext=(3, 0), textcoords="offset points", va="center",
                            fontsize=10, color="#555555")
        ax.set_ylim(bottom=min(0.0, ax.get_ylim()[0]), top=top)
        ax.set_ylabel("significance (σ, one-sided)")
        ax.set_title(f"{target} / {recipe}: significance against time ({d['source']})")
        ax.legend(loc="best", frameon=True, framealpha=0.9, edgecolor="none", ncol=2)
        ax.grid(alpha=0.25)
    axes[-1].set_xlabel(hours.axis_label)
    return fig


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
    _frame(fig, width, height, bottom=0.65 + text)
    x, y, e = hours.plot(d["utc_hours"]), d["offset_us"], d["sigma_us"]
    detected = d["detected"]
    if d["tolerance_us"] is not None:
        ax.axhspan(-d["tolerance_us"], d["tolerance_us"], color=OKABE_ITO["sky_blue"],
                   alpha=0.22, label=f"tolerance ±{d['tolerance_us']:.1f} µs")
    ax.axhline(0.0, color="#777777", linewidth=0.8)
    e_plot = np.where(np.isfinite(e), e, np.nan)
    if detected.size and detected.any():
        ax.errorbar(x[detected], y[detected], yerr=e_plot[detected], fmt="o", markersize=4,
                    color=_SERIES[0], elinewidth=1.2, label="chunk offset (pulse detected)")
    if detected.size and (~detected).any():
        ax.errorbar(x[~detected], y[~detected], yerr=e_plot[~detected], fmt="o",
                    markersize=4, markerfacecolor="white", color="#888888",
                    label="chunk offset (not detected)")
    if d["fitted_offset_us"] is not None:
        ax.axhline(d["fitted_offset_us"], color=OKABE_ITO["vermillion"], linestyle="--",
                   linewidth=1.2, label=f"fitted offset {d['fitted_offset_us']:+.1f} µs")
    ax.set_xlabel(hours.axis_label)
    ax.set_ylabel("offset from template (µs)")
    colour = _STATUS_COLOUR.get(d["status"], OKABE_ITO["black"])
    ax.set_title(f"{target} / {d['recipe']}: clock-chain check — {d['status']} "
                 f"({d['kind']})", color=colour)
    ax.legend(loc="upper right", frameon=True, framealpha=0.85, ncol=2)
    ax.grid(alpha=0.25)
    fig.text(0.85 / width, (text + 0.05) / height, "\n".join(lines), va="top", ha="left",
             fontsize=10, family="monospace")
    return fig
