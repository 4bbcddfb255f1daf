"""Direct (slow, obvious) numpy computations of trigonometric moments: the oracle of the
moment and periodicity tests, and hypothesis strategies for event sets."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import strategies as st

from turnstamp.core.moments import DEFAULT_BINS, MAX_HARMONICS

__all__ = ["direct_sums", "direct_z2", "direct_hist", "assert_moments_match",
           "assert_same_moments", "phase_values", "weight_values", "event_sets", "pieces"]


def direct_sums(phases, weights=None, harmonics=MAX_HARMONICS):
    phases = np.asarray(phases, dtype=float)
    w = np.ones_like(phases) if weights is None else np.asarray(weights, dtype=float)
    angle = 2.0 * np.pi * np.arange(1, harmonics + 1)[:, None] * phases[None, :]
    return np.cos(angle) @ w, np.sin(angle) @ w, float(w.sum()), float(w @ w)


def direct_z2(phases, weights=None, harmonics=MAX_HARMONICS):
    cos, sin, _, sum_w2 = direct_sums(phases, weights, harmonics)
    if sum_w2 == 0.0:
        return np.zeros(harmonics)
    return 2.0 / sum_w2 * np.cumsum(cos**2 + sin**2)


def direct_hist(phases, weights=None, bins=DEFAULT_BINS):
    phases = np.asarray(phases, dtype=float)
    w = np.ones_like(phases) if weights is None else np.asarray(weights, dtype=float)
    index = np.floor(phases * bins).astype(int)
    return (np.bincount(index, w, minlength=bins), np.bincount(index, w * w, minlength=bins))


def assert_moments_match(moments, phases, weights=None, rel=1e-9):
    """Sums agree with the direct computation to ``rel`` relative to Σ|w| (our accuracy goal)."""
    phases = np.asarray(phases, dtype=float)
    cos, sin, sum_w, sum_w2 = direct_sums(phases, weights, moments.harmonics)
    scale = rel * max(sum_w, 1e-300)
    assert moments.count == phases.size
    assert moments.sum_w == pytest.approx(sum_w, rel=1e-12, abs=1e-300)
    assert moments.sum_w2 == pytest.approx(sum_w2, rel=1e-12, abs=1e-300)
    np.testing.assert_allclose(moments.cos_sums, cos, rtol=0, atol=scale)
    np.testing.assert_allclose(moments.sin_sums, sin, rtol=0, atol=scale)
    hist_w, hist_w2 = direct_hist(phases, weights, moments.bins)
    np.testing.assert_allclose(moments.hist_w, hist_w, rtol=1e-12, atol=1e-12 * sum_w)
    np.testing.assert_allclose(moments.hist_w2, hist_w2, rtol=1e-12, atol=1e-12 * sum_w2)


def assert_same_moments(a, b, rel=1e-9):
    assert (a.harmonics, a.bins, a.count, a.weighted) == (b.harmonics, b.bins, b.count, b.weighted)
    scale = rel * max(abs(a.sum_w), abs(b.sum_w), 1e-300)
    for name in ("cos_sums", "sin_sums", "hist_w", "hist_w2"):
        np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=0, atol=scale,
                                   err_msg=name)
    assert a.sum_w == pytest.approx(b.sum_w, rel=1e-12, abs=1e-300)
    assert a.sum_w2 == pytest.approx(b.sum_w2, rel=1e-12, abs=1e-300)


phase_values = st.floats(0.0, 1.0, exclude_max=True, allow_nan=False)
weight_values = st.one_of(st.just(0.0), st.floats(1e-3, 100.0))


@st.composite
def event_sets(draw, max_size=150):
    phases = draw(st.lists(phase_values, max_size=max_size))
    if draw(st.booleans()):
        weights = draw(st.lists(weight_values, min_size=len(phases), max_size=len(phases)))
    else:
        weights = None
    cuts = sorted(draw(st.lists(st.integers(0, len(phases)), max_size=5)))
    return np.array(phases, dtype=float), None if weights is None else np.array(weights), cuts


def pieces(array, cuts):
    return None if array is None else np.split(array, cuts)
