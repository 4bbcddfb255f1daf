"""What the report's figures draw (issue 10): clock-time axes in UTC, a phase-time map whose
colour scale the partial first and last rows do not rule, a clock step drawn as a step
with no chunk behind the legend, and no pulsar curves for a target that is not pulsing.
Figures are checked through their matplotlib artists, not their pixels."""

import numpy as np
import pytest

from turnstamp.core.timebase import NS_PER_S, parse_instant
from turnstamp.views.report.figuredata import (
    DETECTED_SIGMA,
    phase_time_map_data,
    profile_data,
    significance_data,
)
from turnstamp.views.report.figures import draw_clock, draw_profile, draw_significance
from turnstamp.views.report.section import _mark_detection
from turnstamp.views.report.timegrid import GRID_ORIGIN_NS, Grid, UtcHours
from turnstamp.views.report.utcaxis import clock_label, tick_step_s

matplotlib = pytest.importorskip("matplotlib")
from matplotlib.figure import Figure  # noqa: E402 - after the importorskip

TT_MINUS_UTC_NS = 69_184_000_000  # 37 s + 32.184 s since 2017 (IERS Bulletin C)


@pytest.fixture
def hours(demo_env):
    return UtcHours(demo_env.leaps, parse_instant("2026-12-02T02:00:00") + TT_MINUS_UTC_NS)


def tt(utc: str) -> int:
    return parse_instant(utc) + TT_MINUS_UTC_NS


def test_clock_labels_read_as_a_clock():
    assert clock_label(2.5, "2026-12-02", False) == "02:30"
    assert clock_label(2.5 + 7 / 3600, "2026-12-02", True) == "02:30:07"
    assert clock_label(25.25, "2026-12-02", False) == "12-03 01:15"  # past midnight
    assert tick_step_s(60) == 10 and tick_step_s(4 * 3600) == 1800 and tick_step_s(3) == 1


def test_significance_axis_in_hh_mm_utc_and_no_sqrt_t_for_an_unpulsed_target(hours):
    until = np.array([tt("2026-12-02T02:00:00") + k * 600 * NS_PER_S for k in range(1, 13)])
    windows = {"cumulative": {"data_until_tt_ns": until,
                              "h_sigma": np.linspace(0.5, 1.2, 12),
                              "h_sigma_post_trials": np.linspace(0.1, 0.8, 12), "trials": 2,
                              "events": np.arange(12), "utc_hours": hours(until)}}
    curve = {"source": "significance stream", "windows": windows, "sqrt_t_fit": None}
    fig = draw_significance(Figure, "ember", {"all": curve}, hours)
    ax = fig.axes[0]
    labels = [text.get_text() for text in ax.get_legend().get_texts()]
    assert not any("√t" in label for label in labels)
    assert "H-test, all data so far" in labels
    formatter = ax.xaxis.get_major_formatter()
    assert formatter(2.5, 0) == "02:30" and "HH:MM" in ax.get_xlabel()
    assert "now 1.2σ, 0.8σ after 2 trials" in ax.get_title()


@pytest.mark.parametrize("final, fitted", [(1.5, False), (8.0, True)])
def test_the_sqrt_t_fit_is_made_only_for_a_detected_pulsar(hours, final, fitted):
    import pyarrow as pa

    start = tt("2026-12-02T02:00:00")
    sigma = np.linspace(0.2, final, 6)
    table = pa.table({"target": ["t"] * 6, "recipe": ["all"] * 6, "window": ["cumulative"] * 6,
                      "data_until_tt_ns": start + np.arange(1, 7) * 60 * NS_PER_S,
                      "h_sigma": sigma, "h_sigma_post_trials": sigma - 0.1,
                      "events": np.arange(6) * 100, "trials": [1] * 6})
    data = significance_data("t", "all", table, None, 1, hours, start)
    assert (data["sqrt_t_fit"] is not None) is fitted


def test_an_unpulsed_profile_has_no_harmonic_curve_and_says_why():
    rng = np.random.default_rng(3)
    counts = rng.poisson(1000, 32).astype(float)
    row = {"counts": counts.tolist(), "errors": np.sqrt(counts).tolist(), "events": 32_000,
           "sum_weights": float(counts.sum()), "harmonics": 2,
           "cos_moments": [0.01, 0.0], "sin_moments": [0.0, 0.01],
           "background_per_bin": 990.0}
    profile = profile_data("ember", "all", row, None, None, False)
    curve = {"windows": {"cumulative": {"h_sigma": np.array([0.4, 1.8])}}}
    _mark_detection(profile, curve)
    assert profile["pulsed"] is False and profile["detected_sigma"] == 1.8
    fig = draw_profile(Figure, "ember", {"all": profile})
    labels = [text.get_text() for text in fig.axes[0].get_legend().get_texts()]
    assert not any("Fourier" in label or "unpulsed" in label for label in labels)
    assert f"no pulsation detected\n(H-test 1.8σ < {DETECTED_SIGMA:g}σ)" in labels
    curve["windows"]["cumulative"]["h_sigma"] = np.array([6.0])
    _mark_detection(profile, curve)
    fig = draw_profile(Figure, "ember", {"all": profile})
    labels = [text.get_text() for text in fig.axes[0].get_legend().get_texts()]
    assert "Fourier estimate\n(2 harmonics)" in labels


def test_partial_first_and_last_rows_do_not_rule_the_colour_scale(hours):
    grid = Grid(4, False, 10 * NS_PER_S)
    first_cell = (tt("2026-12-02T02:00:00") - GRID_ORIGIN_NS) // grid.cell_ns
    for k in range(6):  # 60 s of data at 100 events per bin per 10 s ...
        grid.hist[first_cell + k] = np.full(4, 100.0)
        grid.hist_w2[first_cell + k] = np.full(4, 100.0)
    grid.hist[first_cell] = np.full(4, 5.0)  # ... but the first and last cells only
    grid.hist[first_cell + 5] = np.full(4, 8.0)  # hold the data's first and last second
    grid.first_ns = first_cell * grid.cell_ns + GRID_ORIGIN_NS + 9 * NS_PER_S
    grid.last_ns = (first_cell + 5) * grid.cell_ns + GRID_ORIGIN_NS + NS_PER_S
    data = phase_time_map_data(grid, hours)
    assert data["row_exposure"][0] == pytest.approx(0.1)
    assert data["row_exposure"][-1] == pytest.approx(0.1)
    assert data["colour_range"] == pytest.approx([100.0, 101.0])  # from the full rows only
    assert np.sum(data["counts"]) == pytest.approx(4 * (4 * 100 + 5 + 8))  # counts unscaled


def test_a_clock_step_is_drawn_as_a_step_beside_an_unobstructed_legend(hours):
    mids = np.array([tt("2026-12-02T02:00:00") + k * 10 * NS_PER_S for k in range(7)])
    offsets = np.array([0.0, 2.0, -1.0, 1266.0, 1270.0, 1262.0, 1268.0])
    clock = {"target": "lantern", "recipe": "all", "status": "FAIL", "kind": "step",
             "summary": "FAIL: step", "frequency_hz": 311.4, "tolerance_cycles": 0.02,
             "tolerance_us": 64.2, "chunk_mid_tt_ns": mids, "utc_hours": hours(mids),
             "offset_us": offsets, "sigma_us": np.full(7, 5.0), "detected": np.ones(7, bool),
             "fitted_offset_us": 797.3, "step_time_ns": int(mids[2] + 5 * NS_PER_S),
             "step_time_utc_hours": float(hours(np.int64(mids[2] + 5 * NS_PER_S))[0]),
             "step_levels_us": [0.3, 1266.5]}
    fig = draw_clock(Figure, "lantern", clock, hours)
    ax = fig.axes[0]
    step = next(line for line in ax.get_lines() if "step" in str(line.get_label()))
    assert list(step.get_ydata()) == [0.3, 0.3, 1266.5, 1266.5]
    assert step.get_xdata()[1] == step.get_xdata()[2] == pytest.approx(
        clock["step_time_utc_hours"])
    assert not any("797" in str(line.get_label()) for line in ax.get_lines())  # no flat line
    legend = ax.get_legend()
    fig.canvas.draw()
    box = legend.get_window_extent()
    assert box.x0 >= ax.get_window_extent().x1  # beside the axes: no chunk behind it
    assert "HH:MM:SS" in ax.get_xlabel()  # a one-minute span needs seconds


def test_a_clock_drift_is_drawn_as_a_slope(hours):
    import json

    from turnstamp.views.report.figuredata import clock_data

    starts = [tt("2026-12-02T02:00:00") + k * 600 * NS_PER_S for k in range(6)]
    reference = starts[3]
    verdict = {"kind": "drift", "frequency_hz": 100.0, "tolerance_us": 200.0,
               "reference_ns": reference, "offset_us": 0.0,
               "drift": {"offset_cycles": 0.001, "rate_cycles_per_s": 1e-6}}
    row = {"target": "t", "recipe": "all", "status": "WARN", "kind": "drift",
           "summary": "WARN: drift", "verdict_json": json.dumps(verdict),
           "tolerance_cycles": 0.02, "chunk_start_tt_ns": starts,
           "chunk_end_tt_ns": [s + 600 * NS_PER_S for s in starts],
           "chunk_shift_cycles": [0.0] * 6, "chunk_sigma_cycles": [0.001] * 6,
           "chunk_detected": [True] * 6}
    data = clock_data(row, hours)
    # at 100 Hz one cycle is 10 000 µs; 1e-6 cycles/s = 36 µs/h
    first_mid = starts[0] + 300 * NS_PER_S
    expected = (0.001 + 1e-6 * (first_mid - reference) / NS_PER_S) * 1e4
    assert data["drift_line"]["offset_us"][0] == pytest.approx(expected)
    fig = draw_clock(Figure, "t", data, hours)
    labels = [str(line.get_label()) for line in fig.axes[0].get_lines()]
    assert "fitted drift +36.0 µs/h" in labels
