"""The offset fitted to the events' own phases: the same maximum as an independent
optimiser on a likelihood written here, errors from its curvature, the template read right.

Phases are drawn here by inverse CDF of densities written in this file. The maximum is
checked against scipy.optimize on the mixture likelihood f = 1 + w·p·(s − 1) (Kerr 2011,
ApJ 732, 38, eq. 2; from memory) with the density written here; σ against the
profile likelihood's curvature by finite differences of that same function.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize

from turnstamp.core.cycles import wrap_cycles
from turnstamp.core.eventfit import TABLE_SIZE, refine_with_events, template_tables
from turnstamp.core.moments import PhaseMoments
from turnstamp.core.peaks import PeakComponent
from turnstamp.core.template import PulseTemplate
from turnstamp.core.templatefit import fit_offset

GRID = 1 << 15


def von_mises(x, centre, width):
    kappa = 1.0 / (2 * math.pi * width) ** 2
    return np.exp(kappa * (np.cos(2 * math.pi * (x - centre)) - 1)) / (
        np.i0(kappa) * math.exp(-kappa))


def shape(x):
    """Main pulse at 0.2 (width 0.03) and a weaker, wider one at 0.65, unit area."""
    return (von_mises(x, 0.2, 0.03) + 0.5 * von_mises(x, 0.65, 0.06)) / 1.5


TEMPLATE = PulseTemplate(name="two", unpulsed_fraction=0.0, components=[
    PeakComponent(shape="von_mises", position_cycles=0.2, width_cycles=0.03),
    PeakComponent(shape="von_mises", position_cycles=0.65, width_cycles=0.06, amplitude=0.5)])


def draw(n, background, shift, rng):
    x = np.linspace(0, 1, GRID + 1)
    f = background + (1 - background) * shape(x)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (f[1:] + f[:-1]))])
    return np.remainder(np.interp(rng.random(n), cdf / cdf[-1], x) + shift, 1.0)


def log_likelihood(shift, fraction, phases, weights):
    w = np.ones_like(phases) if weights is None else weights
    return float(np.sum(np.log(1 + w * fraction * (shape(phases - shift) - 1))))


def profile(shift, phases, weights):
    """max over p in [0, 1] of the log-likelihood (scipy's bounded scalar search)."""
    found = optimize.minimize_scalar(lambda p: -log_likelihood(shift, p, phases, weights),
                                     bounds=(0.0, 1.0), method="bounded",
                                     options={"xatol": 1e-10})
    return -found.fun, found.x


def test_tables_are_the_templates_shape_and_its_derivatives():
    x = np.arange(TABLE_SIZE + 1) / TABLE_SIZE
    table = template_tables(TEMPLATE)
    h = 1e-5
    assert np.max(np.abs(table[0] - shape(x))) < 1e-9 * shape(x).max()
    assert np.allclose(table[1], (shape(x + h) - shape(x - h)) / (2 * h), rtol=0,
                       atol=1e-5 * np.abs(table[1]).max())
    # a binned profile is read through the bin centres (its trigonometric interpolant):
    # a pure first harmonic on 64 bins comes back exactly, its lowest bin taken as the
    # unpulsed level (unit area), never below zero between the centres
    centres = (np.arange(64) + 0.5) / 64
    values = 1 + np.cos(2 * np.pi * centres)
    binned = template_tables(PulseTemplate(name="one", binned_profile=list(values)))
    low = values.min()
    expected = (1 + np.cos(2 * np.pi * x) - low) / (1 - low)
    assert np.allclose(binned[0], np.maximum(expected, 0.0), atol=1e-12)


@pytest.mark.parametrize("background, weighted", [(0.0, False), (0.6, False), (0.6, True)])
def test_the_maximum_is_an_independent_optimisers(background, weighted):
    rng = np.random.default_rng(31)
    phases = draw(2000, background, 0.137, rng)
    weights = rng.uniform(0.3, 1.0, phases.size) if weighted else None
    moments = PhaseMoments().update(phases, weights)
    fit = refine_with_events(fit_offset(moments, TEMPLATE), phases, TEMPLATE, weights)
    assert fit.method == "events"
    found = optimize.minimize_scalar(lambda d: -profile(d, phases, weights)[0],
                                     bounds=(0.137 - 0.05, 0.137 + 0.05), method="bounded",
                                     options={"xatol": 1e-9})
    assert abs(wrap_cycles(fit.shift_cycles - found.x)) < 2e-6  # table interpolation
    p = profile(found.x, phases, weights)[1]
    assert fit.amplitude == pytest.approx(p * (weights.sum() if weighted else phases.size),
                                          rel=1e-4)
    # σ: the curvature of the profile likelihood (finite differences, step 1e-4 cycles)
    h = 1e-4
    curve = (profile(found.x + h, phases, weights)[0] - 2 * profile(found.x, phases, weights)[0]
             + profile(found.x - h, phases, weights)[0]) / h**2
    assert fit.curvature_sigma_cycles == pytest.approx(1 / math.sqrt(-curve), rel=2e-3)
    assert fit.interval_cycles[0] < fit.shift_cycles < fit.interval_cycles[1]


def test_errors_scatter_as_stated():
    """300 seeded nights of 500 events on half background: the spread of the fitted
    offsets matches the stated σ (ratio within the Monte Carlo error of a sample standard
    deviation from 300 trials, ±4%·2.5), and about 68% fall within 1σ (binomial, 3σ)."""
    rng = np.random.default_rng(7)
    errors, sigmas = [], []
    for _ in range(300):
        truth = rng.uniform(-0.5, 0.5)
        phases = draw(500, 0.5, truth, rng)
        fit = refine_with_events(fit_offset(PhaseMoments().update(phases), TEMPLATE),
                                 phases, TEMPLATE)
        errors.append(wrap_cycles(fit.shift_cycles - truth))
        sigmas.append(fit.sigma_cycles)
    errors, sigmas = np.array(errors), np.array(sigmas)
    assert np.std(errors) / np.sqrt(np.mean(sigmas**2)) == pytest.approx(1.0, abs=0.1)
    assert abs(np.mean(np.abs(errors) <= sigmas) - 0.683) < 3 * math.sqrt(0.68 * 0.32 / 300)


def test_nothing_to_refine_leaves_the_fit_alone():
    empty = fit_offset(PhaseMoments(), TEMPLATE)
    assert refine_with_events(empty, np.zeros(0), TEMPLATE) is empty


def test_chunks_are_fitted_to_their_events_where_they_are_kept():
    from turnstamp.core.clock.chunks import chunk_offsets
    from turnstamp.core.timebinned import TimeBinnedMoments

    rng = np.random.default_rng(3)
    times = np.sort(rng.integers(0, 600 * 10**9, 6000))
    phases = draw(times.size, 0.5, 0.1, rng)
    binned = TimeBinnedMoments(10 * 10**9)
    binned.update(times, phases)

    def events(start_ns, end_ns):
        inside = (times >= start_ns) & (times < end_ns)
        return phases[inside], None

    live = chunk_offsets(binned, TEMPLATE, chunk_ns=60 * 10**9)
    archive = chunk_offsets(binned, TEMPLATE, chunk_ns=60 * 10**9, events=events)
    assert len(live) == len(archive) == 10
    for moments_fit, event_fit in zip(live, archive, strict=True):
        chosen = events(event_fit.start_ns, event_fit.end_ns)[0]
        expected = refine_with_events(fit_offset(PhaseMoments().update(chosen), TEMPLATE),
                                      chosen, TEMPLATE)
        assert event_fit.shift_cycles == expected.shift_cycles
        assert event_fit.sigma_cycles == expected.sigma_cycles
        assert moments_fit.shift_cycles != event_fit.shift_cycles


def test_a_whole_night_is_fitted_by_cells_of_phase_to_the_same_maximum(monkeypatch):
    import turnstamp.core.eventfit as eventfit

    rng = np.random.default_rng(12)
    phases = draw(400_000, 0.9, -0.21, rng)
    weights = rng.uniform(0.2, 1.0, phases.size)
    for w in (None, weights):
        start = fit_offset(PhaseMoments().update(phases, w), TEMPLATE)
        cells = refine_with_events(start, phases, TEMPLATE, w)
        monkeypatch.setattr(eventfit, "COMPACT_ABOVE", phases.size)
        every = refine_with_events(start, phases, TEMPLATE, w)
        monkeypatch.undo()
        assert abs(cells.shift_cycles - every.shift_cycles) < 1e-3 * every.sigma_cycles
        assert cells.sigma_cycles == pytest.approx(every.sigma_cycles, rel=1e-3)
