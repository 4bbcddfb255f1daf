"""Trigonometric moments: accumulation against a direct numpy computation, merging,
splitting and state round trips (oracle and splitting tests)."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from hypothesis import given
from moment_oracle import assert_moments_match, assert_same_moments, event_sets, pieces

from turnstamp.core.moments import PhaseMoments
from turnstamp.core.periodicity import h_test
from turnstamp.errors import InputError

# ---------------------------------------------------------------------------------------------
# PhaseMoments mechanics


def test_update_matches_direct_computation_across_chunks(rng):
    # more events than one internal chunk, phases near the awkward ends, weights
    phases = np.concatenate([rng.random(30_000), rng.random(100) * 1e-12,
                             1.0 - rng.random(100) * 1e-12])
    weights = rng.random(phases.size)
    assert_moments_match(PhaseMoments().update(phases, weights), phases, weights)
    assert_moments_match(PhaseMoments(harmonics=3, bins=7).update(phases), phases)


def test_histogram_bin_edges_and_phase_reduction():
    bins = 8
    edges = np.arange(bins) / bins
    moments = PhaseMoments(bins=bins).update(edges)
    np.testing.assert_array_equal(moments.hist_w, np.ones(bins))  # b/bins lands in bin b
    top = PhaseMoments(bins=3).update([np.nextafter(1.0, 0.0)])
    np.testing.assert_array_equal(top.hist_w, [0, 0, 1])
    # phases outside [0, 1) are reduced modulo 1 (trigonometric sums are periodic anyway)
    shifted = PhaseMoments().update([-0.75, 1.5, 3.125, -1e-300])
    reduced = PhaseMoments().update([0.25, 0.5, 0.125, 0.0])
    assert_same_moments(shifted, reduced, rel=1e-12)


def test_update_is_atomic_and_refuses_bad_input(rng):
    moments = PhaseMoments().update(rng.random(10))
    before = moments.to_state()
    bad_phases = rng.random(20_000)
    bad_phases[15_000] = np.nan  # in the second chunk
    with pytest.raises(ValueError, match="finite"):
        moments.update(bad_phases)
    with pytest.raises(ValueError, match=">= 0"):
        moments.update([0.1, 0.2], [1.0, -0.5])
    with pytest.raises(ValueError, match="finite"):
        moments.update([0.1, 0.2], [1.0, np.inf])
    with pytest.raises(ValueError, match="weights has 1 values"):
        moments.update([0.1, 0.2], [1.0])
    assert moments.to_state() == before
    with pytest.raises(ValueError, match="positive integer"):
        PhaseMoments(harmonics=0)


def test_empty_and_unit_weights():
    moments = PhaseMoments()
    assert moments.is_empty and not moments.weighted
    assert moments.update([]) is moments and moments.is_empty
    moments.update([], [])  # an empty batch changes nothing, not even `weighted`
    assert not moments.weighted
    result = h_test(moments)
    assert (result.statistic, result.log_p, result.count) == (0.0, 0.0, 0)
    moments.update([0.2, 0.4])
    assert not moments.is_empty and not moments.weighted
    np.testing.assert_array_equal(moments.hist_w, moments.hist_w2)
    assert moments.sum_w == moments.sum_w2 == 2.0


def test_merge_refuses_mismatched_shapes():
    with pytest.raises(ValueError, match="harmonics=20, bins=32 versus harmonics=10, bins=32"):
        PhaseMoments() + PhaseMoments(harmonics=10)
    with pytest.raises(ValueError, match="different shapes"):
        moments = PhaseMoments()
        moments += PhaseMoments(bins=16)
    with pytest.raises(TypeError):
        PhaseMoments().merge("not moments")


def test_sum_of_moments_and_copy_independence(rng):
    parts = [PhaseMoments().update(rng.random(50)) for _ in range(4)]
    total = sum(parts)
    assert total.count == 200
    clone = total.copy()
    clone.update([0.5])
    assert total.count == 200 and clone.count == 201
    merged = parts[0].merge(parts[1])
    assert parts[0].count == 50 and merged.count == 100  # merge returns a new object


@pytest.mark.parametrize(
    "change, field",
    [
        (lambda s: s.pop("hist_w"), "state"),
        (lambda s: s.update(extra=1), "state"),
        (lambda s: s.update(kind="Other"), "state.kind"),
        (lambda s: s.update(version=99), "state.version"),
        (lambda s: s.update(count=-1), "state.count"),
        (lambda s: s.update(count=2.5), "state.count"),
        (lambda s: s.update(weighted="yes"), "state.weighted"),
        (lambda s: s.update(harmonics=True), "state.harmonics"),
        (lambda s: s.update(sum_w=float("nan")), "state.sum_w"),
        (lambda s: s.update(cos_sums=[0.0] * 3), "state.cos_sums"),
        (lambda s: s.update(sin_sums="0,0"), "state.sin_sums"),
        (lambda s: s.update(hist_w2=[-1.0] + [0.0] * 31), "state.hist_w2"),
        (lambda s: s["cos_sums"].__setitem__(0, None), "state.cos_sums"),
    ],
)
def test_from_state_refuses_bad_state(change, field):
    state = PhaseMoments().update([0.1, 0.2, 0.3]).to_state()
    change(state)
    with pytest.raises(InputError) as caught:
        PhaseMoments.from_state(state)
    assert caught.value.field == field
    with pytest.raises(InputError):
        PhaseMoments.from_state([1, 2, 3])


# ---------------------------------------------------------------------------------------------
# properties (hypothesis)


@given(event_sets())
def test_property_split_merge_equals_whole(events):
    phases, weights, cuts = events
    whole = PhaseMoments().update(phases, weights)
    assert_moments_match(whole, phases, weights)
    split_phases = pieces(phases, cuts)
    split_weights = pieces(weights, cuts) or [None] * len(split_phases)
    # one accumulator fed piece by piece
    streamed = PhaseMoments()
    for part_phases, part_weights in zip(split_phases, split_weights, strict=True):
        streamed.update(part_phases, part_weights)
    # separate accumulators merged
    merged = PhaseMoments()
    for part_phases, part_weights in zip(split_phases, split_weights, strict=True):
        merged = merged + PhaseMoments().update(part_phases, part_weights)
    for other in (streamed, merged):
        assert_same_moments(whole, other)


@given(event_sets())
def test_property_state_round_trip_is_exact(events):
    phases, weights, _ = events
    moments = PhaseMoments(harmonics=7, bins=5).update(phases, weights)
    state = moments.to_state()
    restored = PhaseMoments.from_state(json.loads(json.dumps(state)))
    assert restored.to_state() == state
    for name in ("cos_sums", "sin_sums", "hist_w", "hist_w2"):
        np.testing.assert_array_equal(getattr(restored, name), getattr(moments, name))
    assert (restored.sum_w, restored.sum_w2, restored.count, restored.weighted) == (
        moments.sum_w, moments.sum_w2, moments.count, moments.weighted)


def test_module_has_no_io_or_transport_imports():
    # core rule (DEVELOPERS.md): the core imports neither zmq nor pyarrow
    code = ("import sys, turnstamp.core.moments; "
            "print(any(m.split('.')[0] in ('zmq', 'pyarrow') for m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
