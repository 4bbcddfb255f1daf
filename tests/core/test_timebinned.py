"""Time-binned moments: windows, retention, merging and state, against direct numpy
grouping of the events (oracle and splitting tests)."""

from __future__ import annotations

import json

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from moment_oracle import (
    assert_moments_match,
    assert_same_moments,
    phase_values,
    pieces,
    weight_values,
)

from turnstamp.core.moments import PhaseMoments
from turnstamp.core.timebinned import TimeBinnedMoments
from turnstamp.errors import InputError

INTERVAL = 1_000_000_000  # 1 s in ns


@st.composite
def timed_event_sets(draw):
    size = draw(st.integers(0, 120))
    times = draw(st.lists(st.integers(-5 * INTERVAL, 20 * INTERVAL), min_size=size,
                          max_size=size))
    phases = draw(st.lists(phase_values, min_size=size, max_size=size))
    weights = None
    if draw(st.booleans()):
        weights = np.array(draw(st.lists(weight_values, min_size=size, max_size=size)))
    if draw(st.booleans()):
        times = sorted(times)  # the usual, nearly sorted, case
    cuts = sorted(draw(st.lists(st.integers(0, size), max_size=4)))
    return np.array(times, dtype=np.int64), np.array(phases, dtype=float), weights, cuts


def interval_index(times):
    return np.floor_divide(times, INTERVAL)


@given(timed_event_sets())
def test_property_time_binned_split_merge_and_state(events):
    times, phases, weights, cuts = events
    whole = TimeBinnedMoments(INTERVAL).update(times, phases, weights)
    # intervals hold exactly the events of their interval (direct numpy grouping)
    starts = [start for start, _ in whole.intervals()]
    assert starts == sorted(set((interval_index(times) * INTERVAL).tolist()))
    for start, moments in whole.intervals():
        mask = interval_index(times) == start // INTERVAL
        assert_moments_match(moments, phases[mask], None if weights is None else weights[mask])
    assert whole.latest_ns == (int(times.max()) if times.size else None)
    assert_same_moments(whole.total(), PhaseMoments().update(phases, weights))
    # splitting the stream, or merging separately filled objects, changes nothing
    split_weights = pieces(weights, cuts) or [None] * (len(cuts) + 1)
    streamed = TimeBinnedMoments(INTERVAL)
    merged = TimeBinnedMoments(INTERVAL)
    for t, p, w in zip(np.split(times, cuts), np.split(phases, cuts), split_weights,
                       strict=True):
        streamed.update(t, p, w)
        merged = merged + TimeBinnedMoments(INTERVAL).update(t, p, w)
    for other in (streamed, merged):
        assert other.latest_ns == whole.latest_ns
        assert [s for s, _ in other.intervals()] == starts
        for (_, a), (_, b) in zip(whole.intervals(), other.intervals(), strict=True):
            assert a.count == b.count
            if a.count:
                assert_same_moments(a, b)
    # state round trip is exact
    state = whole.to_state()
    restored = TimeBinnedMoments.from_state(json.loads(json.dumps(state)))
    assert restored.to_state() == state


# ---------------------------------------------------------------------------------------------
# TimeBinnedMoments windows and retention


def test_window_sums_equal_direct_sums(rng):
    times = rng.integers(0, 60 * INTERVAL, 20_000)  # unsorted on purpose
    phases = rng.random(times.size)
    weights = rng.random(times.size)
    binned = TimeBinnedMoments(INTERVAL, harmonics=8, bins=16)
    for part in np.array_split(np.arange(times.size), 7):
        binned.update(times[part], phases[part], weights[part])
    starts = interval_index(times) * INTERVAL
    for length in (INTERVAL, 5 * INTERVAL, 60 * INTERVAL):
        for end in (None, 30 * INTERVAL, 30 * INTERVAL - 1, 7 * INTERVAL + 12345):
            window = binned.window(length, end)
            end_ns = binned.latest_ns if end is None else end
            # every interval overlapping (end − length, end], events counted whole
            mask = (starts <= end_ns) & (starts + INTERVAL > end_ns - length + 1)
            assert_moments_match(window, phases[mask], weights[mask])
    # windows over every interval equal the total
    assert_same_moments(binned.window(61 * INTERVAL), binned.total())
    with pytest.raises(ValueError, match="positive multiple"):
        binned.window(INTERVAL + 1)
    with pytest.raises(ValueError, match="positive multiple"):
        binned.window(0)
    assert TimeBinnedMoments(INTERVAL).window(INTERVAL).is_empty


def test_retention_bounds_memory_and_keeps_total_exact(rng):
    retain = 10 * INTERVAL
    binned = TimeBinnedMoments(INTERVAL, retain_ns=retain)
    times = np.sort(rng.integers(0, 200 * INTERVAL, 40_000))
    phases = rng.random(times.size)
    for part in np.array_split(np.arange(times.size), 400):  # ~1 interval per batch
        binned.update(times[part], phases[part])
        assert len(binned) <= retain // INTERVAL + 2
    assert_moments_match(binned.total(), phases)
    # the longest window the retention allows is exact ...
    latest = binned.latest_ns
    starts = interval_index(times) * INTERVAL
    mask = starts + INTERVAL > latest - retain + 1
    assert_moments_match(binned.window(retain), phases[mask])
    # ... and a longer one is refused, not silently short
    with pytest.raises(ValueError, match="retained"):
        binned.window(retain + 5 * INTERVAL)
    # a late event for an expired interval goes into the total only
    before = len(binned)
    binned.update(np.array([3 * INTERVAL]), np.array([0.25]))
    assert len(binned) == before
    assert_moments_match(binned.total(), np.append(phases, 0.25))
    assert binned.expired.count + sum(m.count for _, m in binned.intervals()) == times.size + 1
    restored = TimeBinnedMoments.from_state(json.loads(json.dumps(binned.to_state())))
    assert restored.to_state() == binned.to_state()


def test_merge_with_retention_expires_consistently(rng):
    retain = 5 * INTERVAL
    early = TimeBinnedMoments(INTERVAL, retain_ns=retain)
    late = TimeBinnedMoments(INTERVAL, retain_ns=retain)
    t1 = np.sort(rng.integers(0, 20 * INTERVAL, 2000))
    t2 = np.sort(rng.integers(0, 40 * INTERVAL, 2000))
    p1, p2 = rng.random(t1.size), rng.random(t2.size)
    early.update(t1, p1)
    late.update(t2, p2)
    merged = early + late
    assert merged.latest_ns == late.latest_ns
    assert_moments_match(merged.total(), np.concatenate([p1, p2]))
    times, phases = np.concatenate([t1, t2]), np.concatenate([p1, p2])
    starts = interval_index(times) * INTERVAL
    mask = starts + INTERVAL > merged.latest_ns - retain + 1
    assert_moments_match(merged.window(retain), phases[mask])
    with pytest.raises(ValueError, match="different shapes"):
        early + TimeBinnedMoments(2 * INTERVAL)


def test_time_binned_refuses_bad_input():
    binned = TimeBinnedMoments(INTERVAL)
    with pytest.raises(TypeError, match="integer nanoseconds"):
        binned.update(np.array([1.5]), np.array([0.1]))
    with pytest.raises(ValueError, match="phases has"):
        binned.update(np.array([1, 2]), np.array([0.1]))
    with pytest.raises(ValueError, match="finite"):
        binned.update(np.array([1, 2 * INTERVAL]), np.array([0.1, np.nan]))
    assert binned.is_empty and binned.latest_ns is None
    with pytest.raises(ValueError):
        TimeBinnedMoments(0)
    with pytest.raises(ValueError):
        TimeBinnedMoments(INTERVAL, retain_ns=-1)
    state = TimeBinnedMoments(INTERVAL).update(np.array([5, INTERVAL + 5]),
                                               np.array([0.1, 0.2])).to_state()
    state["intervals"][1][0] = INTERVAL + 1
    with pytest.raises(InputError, match="multiple of interval_ns"):
        TimeBinnedMoments.from_state(state)
    state["intervals"][1][0] = 0
    with pytest.raises(InputError, match="appears twice"):
        TimeBinnedMoments.from_state(state)
    state["intervals"][1] = [INTERVAL, PhaseMoments(harmonics=3).to_state()]
    with pytest.raises(InputError, match="harmonics, bins"):
        TimeBinnedMoments.from_state(state)


@pytest.mark.parametrize("ordered", [True, False])
def test_update_together_equals_separate_updates(rng, ordered):
    # recipes taking the same rows share the kernel's pass: each accumulator equals one
    # filled on its own, and the direct numpy sums (moment_oracle)
    from turnstamp.core.timebinned import update_together

    times = rng.integers(0, 40 * INTERVAL, 30_000)
    if ordered:
        times = np.sort(times)
    phases = rng.random(times.size)
    weights = rng.random(times.size)
    other = rng.random(times.size) * 3
    sets = [None, weights, other]
    together = [TimeBinnedMoments(INTERVAL, harmonics=9, bins=16) for _ in sets]
    update_together(together, times, phases, sets)
    for binned, w in zip(together, sets, strict=True):
        alone = TimeBinnedMoments(INTERVAL, harmonics=9, bins=16).update(times, phases, w)
        assert binned.latest_ns == alone.latest_ns
        for (s1, a), (s2, b) in zip(binned.intervals(), alone.intervals(), strict=True):
            assert s1 == s2
            assert_same_moments(a, b)
        assert_moments_match(binned.total(), phases, w)
    with pytest.raises(ValueError, match="finite"):
        bad = other.copy()
        bad[7] = np.nan
        update_together(together, times, phases, [None, weights, bad])
    assert together[0].total().count == times.size  # nothing committed by the refusal
