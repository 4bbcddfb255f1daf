"""The clock verdict never cries wolf: outlier chunks, cycle slips and marginal noise.

Series are built from chunk offsets with known answers, and whole nights from phases
drawn by the test's own sampler (inverse CDF of a template density written here), so
that a convention error shared with the project's simulator cannot cancel. Sources:
the one-sided Gaussian tail (scipy.stats.norm) for false-alarm counts; binomial limits
(scipy.stats.binom).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as scipy_stats

from turnstamp.core.clock.chunks import ChunkOffset
from turnstamp.core.clock.diagnose import diagnose
from turnstamp.core.moments import PhaseMoments
from turnstamp.core.peaks import PeakComponent
from turnstamp.core.template import PulseTemplate
from turnstamp.core.templatefit import fit_offset

NU = 311.37  # Hz, an invented bright millisecond pulsar
EPOCH_NS = 819_999_600 * 10**9
MINUTE_NS = 60 * 10**9
# main pulse at 0 and an interpulse 0.47 cycles later (invented, like the demo's)
TWO_PEAKS = PulseTemplate(name="two peaks", unpulsed_fraction=0.0, components=[
    PeakComponent(shape="von_mises", position_cycles=0.0, width_cycles=0.025, amplitude=1.0),
    PeakComponent(shape="von_mises", position_cycles=0.47, width_cycles=0.05, amplitude=0.4)])


def density(x, background):
    """The test's own template density: b + (1 − b)(von Mises peaks), written out."""
    def peak(centre, width):
        kappa = 1.0 / (2 * math.pi * width) ** 2
        return np.exp(kappa * (np.cos(2 * math.pi * (x - centre)) - 1.0)) / \
            float(np.i0(kappa) * math.exp(-kappa))
    return background + (1 - background) * (peak(0.0, 0.025) + 0.4 * peak(0.47, 0.05)) / 1.4


def draw_phases(n, background, rng, grid=1 << 14):
    """Inverse-CDF sampler of ``density`` (trapezoid CDF on a fine grid)."""
    x = np.arange(grid + 1) / grid
    f = density(x, background)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (f[1:] + f[:-1]))])
    return np.interp(rng.random(n), cdf / cdf[-1], x)


def chunk(i, shift, sigma, detected=True):
    start = EPOCH_NS + i * MINUTE_NS
    return ChunkOffset(start, start + MINUTE_NS, start + MINUTE_NS // 2, float(shift),
                       float(sigma), 800.0, 40.0, 1000, 1000.0, detected)


def night_fit(rng, n=200_000, shift=0.0):
    return fit_offset(PhaseMoments().update(np.remainder(draw_phases(n, 0.5, rng) + shift, 1)),
                      TWO_PEAKS)


def test_one_chunk_locked_on_the_interpulse_does_not_fail_a_clean_night():
    # issue 11: a rare chunk locks onto the interpulse 0.47 cycles away with a small
    # stated σ; one such chunk made a 47σ "smeared" FAIL
    rng = np.random.default_rng(11)
    chunks = [chunk(i, rng.normal(0, 0.003), 0.003) for i in range(480)]
    chunks[200] = chunk(200, 0.47, 0.003)
    verdict = diagnose(chunks, night_fit(rng), NU)
    assert verdict.status == "OK", "\n".join(verdict.lines)


def test_a_cycle_slip_across_half_a_turn_does_not_become_a_step():
    # issue 11: unwrapping across ±0.5 carried a whole-cycle slip: "FAIL step +0.97
    # cycles, consistent with −19 s"
    rng = np.random.default_rng(12)
    chunks = [chunk(i, rng.normal(0.0, 0.003), 0.003) for i in range(480)]
    chunks[100] = chunk(100, 0.497, 0.003)  # just under half a turn above its neighbours ...
    chunks[101] = chunk(101, -0.006, 0.003)  # ... and the next just over half a turn below it
    verdict = diagnose(chunks, night_fit(rng), NU)
    assert (verdict.status, verdict.kind) == ("OK", "none"), "\n".join(verdict.lines)


@pytest.mark.slow
def test_clean_half_hour_nights_rarely_warn_and_never_fail():
    # issue 11: marginal 3–5σ effects became specific WARN kinds on 1–2% of clean
    # 30-minute nights. Each kind is tested at 3σ after its own trials (one-sided
    # p = 1.35e-3, scipy.stats.norm.sf(3)), and only warns above half the tolerance: over
    # 60 nights, at most 2 WARN (binomial, scipy.stats.binom.sf(2, 60, 0.02) = 0.12 even
    # at the old 2% rate), none FAIL
    from turnstamp.core.clock.apparent import ConstantSpin
    from turnstamp.core.clock.check import CheckSettings, check_target
    from turnstamp.core.timebinned import TimeBinnedMoments

    statuses = []
    for seed in range(60):
        rng = np.random.default_rng(500 + seed)
        pulsed = 20.0 if seed % 2 else float(rng.uniform(2.0, 5.0))
        n_p, n_b = rng.poisson(pulsed * 1800), rng.poisson(200.0 * 1800)
        phases = np.concatenate([draw_phases(n_p, 0.0, rng), rng.random(n_b)])
        times = EPOCH_NS + np.round(rng.uniform(0, 1800, phases.size) * 1e9).astype(np.int64)
        binned = TimeBinnedMoments(10 * 10**9).update(times, phases)
        verdict, _ = check_target(binned, TWO_PEAKS, ConstantSpin(NU), CheckSettings())
        statuses.append(verdict.status)
    assert statuses.count("FAIL") == 0
    assert statuses.count("WARN") <= 2, statuses
    assert math.isclose(scipy_stats.norm.sf(3), 1.35e-3, rel_tol=1e-2)
