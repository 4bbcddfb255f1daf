"""Several pulsars at once: a clock error shared by all in time, or one target's own model.

Theory of operation
-------------------
A clock error δt(t) moves every pulsar's phase by ν_app·δt(t): the *same* shift in
time for all targets. A wrong phase zero, template or spin model moves one target
alone. Each target's series of chunk offsets is carried into time, τ = y/ν_app
(µs; offsets far below a period, as a clock fault worth finding is), and three
clock histories shared by all targets are fitted, each with a free constant per
target where the history has its own parameter:

* offset: the targets' whole-night offsets a_j ± s_j (µs) against one common c
  (weighted mean). Consistent (χ² tail ≥ ``CONSISTENT_P``) and significant: the
  clock. Inconsistent with three targets or more: the target whose removal leaves
  the rest consistent is off on its own (its model).
* step: τ_ji = a_j + s·[t ≥ T], one size s (µs) and instant T for all; T is searched
  over the gaps between chunks (trials), a_j profiled out in closed form.
* drift: τ_ji = a_j + r·(t − t̄_j), one rate r (µs/h) for all.

A shared step or drift significant after its trials (≥ 5σ) and consistent with each
target's own is the clock; a step one target alone shows is its model.
:func:`attribute` then tells each target's verdict which it is.

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from .apparent import SpinView
from .chunks import ChunkOffset
from .diagnose import usable_chunks
from .rating import level
from .robust import outliers, unwrap_robust
from .series import chi2_log_sf, delta_chi2_sigma
from .verdict import SIGNIFICANT_SIGMA, ClockVerdict

__all__ = ["CONSISTENT_P", "TargetSeries", "JointVerdict", "target_series", "joint_check",
           "attribute"]

CONSISTENT_P = 1e-3
"""Offsets (or steps) agree when their χ² about the common value has at least this tail."""
_MIN_SIDE = 2


@dataclass(frozen=True)
class TargetSeries:
    """One target's night in time units: whole-night offset and chunk series (µs)."""

    name: str
    offset_us: float
    offset_sigma_us: float
    mids_ns: np.ndarray
    tau_us: np.ndarray
    sigma_us: np.ndarray


@dataclass(frozen=True)
class JointVerdict:
    """What all targets together say about the clock (sizes in µs, µs/h for a drift)."""

    kind: str
    status: str
    targets: list[str]
    shared: bool
    size: float | None = None
    size_sigma: float | None = None
    size_unit: str = "µs"
    significance_sigma: float = 0.0
    step_time_ns: int | None = None
    own_model: list[str] = field(default_factory=list)
    common_offset_us: float | None = None
    common_offset_sigma_us: float | None = None
    lines: list[str] = field(default_factory=list)


def target_series(name: str, verdict: ClockVerdict, chunks: list[ChunkOffset],
                  spin: SpinView) -> TargetSeries | None:
    """A target's offsets in time, or None when its night has no offset to speak of."""
    if verdict.offset_us is None or not verdict.offset_sigma_us:
        return None
    used = usable_chunks(chunks)
    mids = np.array([c.mid_ns for c in used], dtype=np.int64)
    if used:
        y = unwrap_robust([c.shift_cycles for c in used], verdict.offset_cycles or 0.0)
        sig = np.array([c.sigma_cycles for c in used])
        kept = ~outliers(y - float(np.median(y)), sig)
        nu = spin.frequency_hz(mids[kept])
        mids, tau, sigma = mids[kept], y[kept] / nu * 1e6, sig[kept] / nu * 1e6
    else:
        tau = sigma = np.zeros(0)
    return TargetSeries(name, float(verdict.offset_us), float(verdict.offset_sigma_us),
                        mids, tau, sigma)


def _common(series: list[TargetSeries]) -> tuple[float, float, float]:
    """(weighted mean offset, its σ, χ² tail log-probability of agreement)."""
    a = np.array([s.offset_us for s in series])
    w = 1.0 / np.array([s.offset_sigma_us for s in series]) ** 2
    c = float(w @ a / w.sum())
    chi2 = float(w @ (a - c) ** 2)
    return c, 1.0 / math.sqrt(float(w.sum())), chi2_log_sf(chi2, len(series) - 1)


def _offsets(series: list[TargetSeries]) -> tuple[list[TargetSeries], list[str]]:
    """The targets that agree on a common offset, and those off on their own."""
    agree, alone = list(series), []
    while len(agree) >= 3 and _common(agree)[2] < math.log(CONSISTENT_P):
        best = max(range(len(agree)),
                   key=lambda j: _common(agree[:j] + agree[j + 1:])[2])
        alone.append(agree.pop(best).name)
    return agree, alone


def _step_sums(series: list[TargetSeries], edges: np.ndarray):
    """Per target and trial instant: Σw, Σwτ, Σw after, Σwτ after, count before/after."""
    rows = []
    for s in series:
        w = 1.0 / s.sigma_us**2
        order = np.argsort(s.mids_ns)
        t, tau, w = s.mids_ns[order], s.tau_us[order], w[order]
        after = np.searchsorted(t, edges)  # first chunk at or after the edge
        cw = np.concatenate([[0.0], np.cumsum(w)])
        cwt = np.concatenate([[0.0], np.cumsum(w * tau)])
        rows.append((cw[-1], cwt[-1], cw[-1] - cw[after], cwt[-1] - cwt[after], after,
                     t.size - after))
    return rows


def _shared_step(series: list[TargetSeries]) -> tuple[float, float, float, int] | None:
    """(size µs, σ, significance σ after trials, instant ns) of the best common step."""
    mids = np.unique(np.concatenate([s.mids_ns for s in series]))
    if mids.size < 2 * _MIN_SIDE:
        return None
    edges = (mids[:-1] + (np.diff(mids) // 2)).astype(np.int64)
    rows = _step_sums(series, edges)
    valid = np.all([(r[4] >= _MIN_SIDE) & (r[5] >= _MIN_SIDE) for r in rows], axis=0)
    if not valid.any():
        return None
    num = sum(r[3] - r[2] * r[1] / r[0] for r in rows)
    den = sum(r[2] - r[2] ** 2 / r[0] for r in rows)
    gain = np.where(valid & (den > 0), num**2 / np.where(den > 0, den, 1.0), -np.inf)
    best = int(np.argmax(gain))
    size, sigma = float(num[best] / den[best]), 1.0 / math.sqrt(float(den[best]))
    significance = delta_chi2_sigma(float(gain[best]), 1, float(valid.sum()))
    return size, sigma, significance, int(edges[best])


def _own_step(s: TargetSeries, edge: int) -> tuple[float, float]:
    """A target's own step at ``edge`` (µs) and its σ (inf when a side is empty)."""
    w = 1.0 / s.sigma_us**2
    late = s.mids_ns >= edge
    if late.sum() < 1 or (~late).sum() < 1:
        return 0.0, math.inf
    before = float(w[~late] @ s.tau_us[~late] / w[~late].sum())
    after = float(w[late] @ s.tau_us[late] / w[late].sum())
    return after - before, math.sqrt(1.0 / w[late].sum() + 1.0 / w[~late].sum())


def _shared_drift(series: list[TargetSeries]) -> tuple[float, float, float] | None:
    """(rate µs/h, σ, significance σ) of a drift common to all targets."""
    num = den = 0.0
    for s in series:
        if s.mids_ns.size < 3:
            continue
        w = 1.0 / s.sigma_us**2
        t = (s.mids_ns - s.mids_ns[0]) * 1e-9 / 3600.0
        x = t - float(w @ t / w.sum())
        num += float(w @ (x * s.tau_us))
        den += float(w @ x**2)
    if den <= 0:
        return None
    rate = num / den
    return rate, 1.0 / math.sqrt(den), delta_chi2_sigma(rate * rate * den, 1)


def joint_check(series: list[TargetSeries], tolerance_us: float,
                time_text: Callable[[int], str]) -> JointVerdict | None:
    """The clock history shared by all targets (see the theory of operation)."""
    if len(series) < 2:
        return None
    names = [s.name for s in series]
    agree, alone = _offsets(series)
    c, c_sigma, log_p = _common(agree)
    base: dict[str, Any] = dict(targets=names, own_model=alone, common_offset_us=c,
                                common_offset_sigma_us=c_sigma)
    step = _shared_step([s for s in series if s.mids_ns.size])
    if step is not None and step[2] >= SIGNIFICANT_SIGMA:
        own = [_own_step(s, step[3]) for s in series]
        chi2 = sum((d - step[0]) ** 2 / e**2 for d, e in own if math.isfinite(e))
        shared = chi2_log_sf(chi2, len(series) - 1) >= math.log(CONSISTENT_P)
        lines = [f"{'Shared' if shared else 'Not shared'} step of {step[0]:+.1f} ± "
                 f"{step[1]:.1f} µs at {time_text(step[3])} in all {len(series)} targets "
                 f"({step[2]:.1f}σ after the search): "
                 + ("the clock." if shared else "the targets' own steps disagree.")]
        status = level("step", step[2], abs(step[0]), tolerance_us) or "OK"
        return JointVerdict("step", status, shared=shared, size=step[0], size_sigma=step[1],
                            significance_sigma=step[2], step_time_ns=step[3], lines=lines,
                            **base)
    drift = _shared_drift(series)
    if drift is not None and drift[2] >= SIGNIFICANT_SIGMA:
        lines = [f"Drift shared by all {len(series)} targets: {drift[0]:+.2f} ± "
                 f"{drift[1]:.2f} µs/h ({drift[2]:.1f}σ): the clock."]
        hours = max(float(np.ptp(s.mids_ns)) * 1e-9 / 3600.0 for s in series)
        status = level("drift", drift[2], abs(drift[0]) * hours, tolerance_us) or "OK"
        return JointVerdict("drift", status, shared=True, size=drift[0], size_sigma=drift[1],
                            size_unit="µs/h", significance_sigma=drift[2], lines=lines,
                            **base)
    significance = delta_chi2_sigma((c / c_sigma) ** 2, 1)
    shared = significance >= SIGNIFICANT_SIGMA and len(agree) >= 2
    lines = [f"Offset common to {', '.join(s.name for s in agree)}: {c:+.1f} ± {c_sigma:.1f} "
             f"µs ({significance:.1f}σ)" + (": the clock." if shared else ".")]
    if alone:
        lines.append(f"Off on its own: {', '.join(alone)} (its model: phase zero, template "
                     "or spin parameters).")
    kind = "offset" if shared or alone else "none"
    status = (level("offset", significance, abs(c), tolerance_us) or "OK") if shared else \
        ("WARN" if alone else "OK")
    return JointVerdict(kind, status, shared=shared, size=c, size_sigma=c_sigma,
                        significance_sigma=significance, lines=lines, **base)


def attribute(results: list[tuple[str, str, ClockVerdict, list[ChunkOffset]]],
              spins: Mapping[str, SpinView], time_text: Callable[[int], str]):
    """``results`` (target, recipe, verdict, chunks) with each verdict told whether its
    effect is the clock (shared by all targets) or its own model."""
    series = [s for name, _, verdict, chunks in results
              if (s := target_series(name, verdict, chunks, spins[name])) is not None]
    joint = joint_check(series, min(v.tolerance_us for _, _, v, _ in results) if results
                        else math.inf, time_text)
    if joint is None:
        return results
    out = []
    for name, recipe, verdict, chunks in results:
        attribution = None
        if name in joint.own_model:
            attribution = "model"
        elif joint.shared and verdict.kind in ("offset", "step", "drift"):
            attribution = "clock"
        note = [f"Several targets: {line}" for line in joint.lines]
        out.append((name, recipe, replace(verdict, attribution=attribution,
                                          lines=[*verdict.lines, *note]), chunks))
    return out
