"""The numbers behind each figure (profile, significance, clock check, phase-time map),
as the arrays that are drawn and recorded in ``report-data.json``."""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from ...core.moments import MAX_HARMONICS, PhaseMoments
from ...core.periodicity import h_test
from ...core.significance import sigma_from_log_p, trials_log_p
from ...core.timebase import NS_PER_S
from .night import json_or_none
from .timegrid import GRID_ORIGIN_NS, Grid, UtcHours

__all__ = [
    "finite",
    "json_safe",
    "last_rows",
    "profile_data",
    "significance_data",
    "clock_data",
    "phase_time_map_data",
    "final_sigma",
    "DETECTED_SIGMA",
]


_MAX_PHASE_TIME_MAP_ROWS = 64
DETECTED_SIGMA = 3.0
"""From this H-test σ (before trials, all data so far) a target counts as pulsing: its
harmonic estimate, template overlay and √t reference are drawn (3σ: common practice
for "evidence"); below it the figures show the data and say that nothing is detected."""
_FULL_ROW = 0.9
"""Phase-time map rows with at least this fraction of their time covered by data set
the colour scale (the partial first and last rows do not)."""


def finite(value) -> float | None:
    try:
        value = float(value)
    except (TypeError, ValueError):
        return None
    return value if math.isfinite(value) else None


def json_safe(obj):
    """JSON-safe copy: numpy to Python, non-finite floats to None."""
    if isinstance(obj, dict):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return json_safe(obj.tolist())
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return finite(obj)
    return obj


def last_rows(table: pa.Table | None, keys: tuple[str, ...]) -> dict[tuple, dict]:
    """The last row (in file order) for each combination of ``keys``."""
    if table is None:
        return {}
    out: dict[tuple, dict] = {}
    for row in table.to_pylist():
        out[tuple(row[k] for k in keys)] = row
    return out


def _fourier_curve(cos_moments, sin_moments, harmonics: int, sum_w: float, bins: int,
                   phases: np.ndarray) -> np.ndarray:
    """Counts per bin of the harmonic estimate f(φ) = 1 + 2Σ(α cos + β sin)."""
    f = np.ones_like(phases)
    for k in range(1, int(harmonics) + 1):
        if k > len(cos_moments):
            break
        f += 2 * (cos_moments[k - 1] * np.cos(2 * np.pi * k * phases)
                  + sin_moments[k - 1] * np.sin(2 * np.pi * k * phases))
    return sum_w / bins * f


def profile_data(target, recipe, row: dict | None, grid: Grid | None, template,
                 weighted: bool) -> dict | None:
    """Profile of one recipe: the last profiles row, or else the archive."""
    from ...core import profile as profile_math

    if row is not None and row.get("counts"):
        counts = np.asarray(row["counts"], float)
        data = {
            "source": "profiles stream (last row)", "events": row["events"],
            "sum_weights": row["sum_weights"], "counts": counts,
            "errors": np.asarray(row["errors"], float), "harmonics": row.get("harmonics") or 0,
            "cos_moments": row.get("cos_moments") or [], "sin_moments": row.get("sin_moments")
            or [], "background_per_bin": row.get("background_per_bin"),
            "pulsed_fraction": row.get("pulsed_fraction"), "peak_phase": row.get("peak_phase"),
            "template_shift_cycles": row.get("template_shift_cycles"),
            "template_shift_sigma_cycles": row.get("template_shift_sigma_cycles"),
            "template_shift_us": row.get("template_shift_us"),
            "template_amplitude": row.get("template_amplitude"),
            "data_until_tt_ns": row.get("data_until_tt_ns"), "weighted": weighted,
        }
    elif grid is not None and grid.moments:
        total = PhaseMoments(MAX_HARMONICS, grid.bins)
        for m in grid.moments.values():
            total += m
        if total.sum_w <= 0:
            return None
        summary = profile_math.summarize_profile(total)
        data = {
            "source": "archive rows", "events": total.count, "sum_weights": total.sum_w,
            "counts": total.hist_w.copy(), "errors": np.sqrt(total.hist_w2),
            "harmonics": summary.harmonics,
            "cos_moments": list(total.cos_sums / total.sum_w),
            "sin_moments": list(total.sin_sums / total.sum_w),
            "background_per_bin": summary.background_per_bin,
            "pulsed_fraction": summary.pulsed_fraction_min,
            "peak_phase": summary.peak_phase_cycles, "template_shift_cycles": None,
            "template_amplitude": None, "data_until_tt_ns": grid.last_ns, "weighted": weighted,
        }
    elif grid is not None and grid.hist:
        counts = np.sum(list(grid.hist.values()), axis=0)
        errors = np.sqrt(np.sum(list(grid.hist_w2.values()), axis=0))
        data = {"source": "archive rows (histogram only)", "events": grid.rows,
                "sum_weights": float(counts.sum()), "counts": counts, "errors": errors,
                "harmonics": 0, "cos_moments": [], "sin_moments": [],
                "background_per_bin": None, "template_shift_cycles": None,
                "template_amplitude": None, "data_until_tt_ns": grid.last_ns,
                "weighted": weighted}
    else:
        return None
    bins = len(data["counts"])
    fine = np.linspace(0.0, 2.0, 801)
    data["bins"] = bins
    data["fine_phase"] = fine
    data["fourier"] = (_fourier_curve(data["cos_moments"], data["sin_moments"],
                                      data["harmonics"], data["sum_weights"], bins, fine)
                       if data["harmonics"] else None)
    data["template_curve"] = None
    data["template_note"] = None
    shift, amplitude = finite(data.get("template_shift_cycles")), \
        finite(data.get("template_amplitude"))
    if template is not None and shift is not None and amplitude is not None:
        pulsed = np.asarray(template.pulsed_density(fine - shift), float)
        level = (data["sum_weights"] - amplitude) / bins
        data["template_curve"] = level + amplitude * pulsed / bins
        data["template_note"] = (
            f"template '{template.name}' at its fitted offset {shift:+.4f} cycles, pulsed "
            f"shape scaled to the fitted pulsed amplitude b = {amplitude:.1f} (weighted "
            f"counts) on top of the flat level (sum of weights - b)/bins")
    return data


def significance_data(target, recipe, table: pa.Table | None, grid: Grid | None,
                      trials: int, hours: UtcHours | None, start_ns: int | None):
    """Per window: time (TT ns, UTC hours), h_sigma, post-trials σ, and a √t fit."""
    windows: dict[str, dict] = {}
    if table is not None:
        mask = pc.and_(pc.equal(pc.cast(table["target"], pa.string()), target),
                       pc.equal(pc.cast(table["recipe"], pa.string()), recipe))
        rows = table.filter(mask)
        rows = rows.filter(pc.greater(rows["data_until_tt_ns"], 0))
        if rows.num_rows:
            labels = [str(w) for w in rows["window"].to_pylist()]
            for label in dict.fromkeys(labels):
                keep = np.array([w == label for w in labels])
                until = rows["data_until_tt_ns"].to_numpy()[keep]
                windows[label] = {
                    "data_until_tt_ns": until,
                    "h_sigma": rows["h_sigma"].to_numpy()[keep],
                    "h_sigma_post_trials": rows["h_sigma_post_trials"].to_numpy()[keep],
                    "events": rows["events"].to_numpy()[keep],
                    "trials": int(rows["trials"].to_numpy()[keep][-1]),
                }
            source = "significance stream"
    if not windows and grid is not None and grid.moments:
        cells = sorted(grid.moments)
        first = cells[0]
        total = PhaseMoments(MAX_HARMONICS, grid.bins)
        until, sigma, post, events = [], [], [], []
        step = max(1, math.ceil((cells[-1] - first + 1) / 120))
        for index, cell in enumerate(cells):
            total += grid.moments[cell]
            last_in_step = index == len(cells) - 1 or (cells[index + 1] - first) // step \
                != (cell - first) // step
            if not last_in_step:
                continue
            h = h_test(total)
            log_p = min(h.log_p, 0.0)
            until.append(min((cell + 1) * grid.cell_ns + GRID_ORIGIN_NS - 1, grid.last_ns))
            sigma.append(sigma_from_log_p(log_p))
            post.append(sigma_from_log_p(trials_log_p(log_p, max(trials, 1))))
            events.append(total.count)
        windows["cumulative"] = {"data_until_tt_ns": np.array(until, np.int64),
                                 "h_sigma": np.array(sigma), "h_sigma_post_trials":
                                 np.array(post), "events": np.array(events),
                                 "trials": trials}
        source = "computed from the archive rows"
    if not windows:
        return None
    for series in windows.values():
        series["utc_hours"] = hours(series["data_until_tt_ns"]) if hours else None
        for name in ("h_sigma", "h_sigma_post_trials"):
            values = np.asarray(series[name], float)
            series[name] = np.where(np.isfinite(values), values, np.nan)
    fit = None
    cumulative = windows.get("cumulative")
    if cumulative is not None and start_ns is not None:
        t = (cumulative["data_until_tt_ns"] - start_ns) / NS_PER_S
        y = cumulative["h_sigma"]
        ok = (t > 0) & np.isfinite(y) & (y > 0)
        if ok.sum() >= 2 and (final_sigma(cumulative) or 0.0) >= DETECTED_SIGMA:
            scale = float(np.sum(y[ok] * np.sqrt(t[ok])) / np.sum(t[ok]))
            fit = {"start_tt_ns": start_ns, "sigma_per_sqrt_s": scale}
    return {"source": source, "windows": windows, "sqrt_t_fit": fit}


def final_sigma(series: dict | None) -> float | None:
    """The last finite H-test σ (before trials) of a significance series, or None."""
    if not series:
        return None
    values = np.asarray(series.get("h_sigma", []), float)
    values = values[np.isfinite(values)]
    return float(values[-1]) if values.size else None


def clock_data(row: dict | None, hours: UtcHours | None) -> dict | None:
    if row is None:
        return None
    verdict = json_or_none(row.get("verdict_json")) or {}
    frequency = finite(verdict.get("frequency_hz"))
    tolerance_cycles = finite(row.get("tolerance_cycles"))
    to_us = (1e6 / frequency) if frequency else None
    start = np.asarray(row.get("chunk_start_tt_ns") or [], np.int64)
    end = np.asarray(row.get("chunk_end_tt_ns") or [], np.int64)
    shift = np.asarray([np.nan if v is None else v for v in
                        row.get("chunk_shift_cycles") or []], float)
    sigma = np.asarray([np.nan if v is None else v for v in
                        row.get("chunk_sigma_cycles") or []], float)
    detected = np.asarray(row.get("chunk_detected") or [], bool)
    mid = start + (end - start) // 2
    tolerance_us = finite(verdict.get("tolerance_us"))
    if tolerance_us is None and tolerance_cycles is not None and to_us:
        tolerance_us = tolerance_cycles * to_us
    return {
        "target": row.get("target"), "recipe": row.get("recipe"),
        "status": str(row.get("status")), "kind": str(row.get("kind")),
        "summary": row.get("summary") or "", "frequency_hz": frequency,
        "tolerance_cycles": tolerance_cycles, "tolerance_us": tolerance_us,
        "chunk_mid_tt_ns": mid, "utc_hours": hours(mid) if hours and mid.size else
        np.zeros(0), "chunk_start_tt_ns": start, "chunk_end_tt_ns": end,
        "offset_us": shift * to_us if to_us else shift * np.nan,
        "sigma_us": sigma * to_us if to_us else sigma * np.nan, "detected": detected,
        "fitted_offset_us": finite(verdict.get("offset_us")),
        "step_time_ns": verdict.get("step_time_ns"),
        "step_time_utc_hours": (float(hours(np.int64(verdict["step_time_ns"]))[0])
                                if hours and verdict.get("step_time_ns") is not None else None),
        "step_levels_us": _step_levels(verdict, to_us),
        "drift_line": _drift_line(verdict, to_us, mid, hours),
        "computed_at_utc_ns": row.get("computed_at_utc_ns"),
    }


def _step_levels(verdict: dict, to_us: float | None) -> list[float] | None:
    """Offsets before and after a step (µs), when the verdict is a step."""
    step = verdict.get("step") if verdict.get("kind") == "step" else None
    if not isinstance(step, dict) or not to_us:
        return None
    before, after = finite(step.get("before_cycles")), finite(step.get("after_cycles"))
    return None if before is None or after is None else [before * to_us, after * to_us]


def _drift_line(verdict: dict, to_us: float | None, mid: np.ndarray,
                hours: UtcHours | None) -> dict | None:
    """The fitted drift over the chunks' span, when the verdict is a drift: UTC hours and
    offsets (µs) at both ends."""
    drift, reference = verdict.get("drift"), verdict.get("reference_ns")
    if (verdict.get("kind") != "drift" or not isinstance(drift, dict) or reference is None
            or not to_us or hours is None or not mid.size):
        return None
    offset, rate = finite(drift.get("offset_cycles")), finite(drift.get("rate_cycles_per_s"))
    if offset is None or rate is None:
        return None
    ends = np.array([mid.min(), mid.max()], np.int64)
    cycles = offset + rate * (ends - int(reference)) / NS_PER_S
    return {"utc_hours": hours(ends), "offset_us": cycles * to_us}


def phase_time_map_data(grid: Grid | None, hours: UtcHours | None) -> dict | None:
    if grid is None or not grid.hist or hours is None:
        return None
    cells = sorted(grid.hist)
    first, last = cells[0], cells[-1]
    span = last - first + 1
    group = max(1, math.ceil(span / _MAX_PHASE_TIME_MAP_ROWS))
    rows = math.ceil(span / group)
    image = np.zeros((rows, grid.bins))
    for cell in cells:
        image[(cell - first) // group] += grid.hist[cell]
    edges_ns = (first + np.arange(rows + 1) * group) * grid.cell_ns + GRID_ORIGIN_NS
    exposure = _row_exposure(edges_ns, grid.first_ns, grid.last_ns)
    return {"counts": image, "time_edges_tt_ns": edges_ns, "time_edges_utc_hours":
            hours(edges_ns), "bins": grid.bins, "total": float(image.sum()),
            "rows": grid.rows, "weighted": grid.weighted,
            "row_seconds": group * grid.cell_ns // NS_PER_S, "row_exposure": exposure,
            "colour_range": _colour_range(image, exposure)}


def _row_exposure(edges_ns: np.ndarray, first_ns: int | None, last_ns: int | None):
    """Fraction of each row's time between the first and the last event."""
    if first_ns is None or last_ns is None:
        return np.ones(edges_ns.size - 1)
    lo = np.maximum(edges_ns[:-1], first_ns)
    hi = np.minimum(edges_ns[1:], last_ns)
    return np.clip((hi - lo) / np.diff(edges_ns).astype(float), 0.0, 1.0)


def _colour_range(image: np.ndarray, exposure: np.ndarray) -> list[float]:
    """Colour limits from the rows whose time is (nearly) all covered: a partial first
    or last row, with few events, does not stretch the scale."""
    full = image[exposure >= _FULL_ROW]
    values = full if full.size else image
    low, high = (float(v) for v in np.percentile(values, [0.5, 99.5]))
    return [low, high if high > low else low + 1.0]
