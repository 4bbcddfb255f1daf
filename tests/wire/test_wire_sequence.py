"""Sequence tracking: every kind, bounds, checkpoints, and a plain oracle."""

from __future__ import annotations

import json
from collections import OrderedDict

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from turnstamp.errors import InputError
from turnstamp.wire.sequence import SequenceKind, SequenceTracker


def kinds(tracker, source, numbers):
    return [tracker.observe(source, n).kind.value for n in numbers]


def test_sequence_kinds():
    tracker = SequenceTracker()
    assert kinds(tracker, "a", [0, 1, 2]) == ["next"] * 3
    gap = tracker.observe("a", 6)
    assert (gap.kind, gap.expected, gap.missing, gap.outstanding) == (SequenceKind.GAP, 3, 3, 3)
    assert tracker.missing_ranges("a") == [(3, 5)]
    late = tracker.observe("a", 4)
    assert (late.kind, late.outstanding, late.accepted) == (SequenceKind.LATE, 2, True)
    assert tracker.missing_ranges("a") == [(3, 3), (5, 5)]
    duplicate = tracker.observe("a", 4)
    assert (duplicate.kind, duplicate.accepted) == (SequenceKind.DUPLICATE, False)
    assert tracker.observe("a", 6).kind is SequenceKind.DUPLICATE
    restart = tracker.observe("a", 0)
    assert (restart.kind, restart.expected, restart.forgotten) == (SequenceKind.RESTART, 7, 2)
    assert tracker.outstanding("a") == 0
    assert kinds(tracker, "a", [1, 2, 1]) == ["next", "next", "duplicate"]


def test_first_message_of_a_source_is_next_whatever_its_number():
    tracker = SequenceTracker()
    status = tracker.observe("late-joiner", 500)
    assert status.kind is SequenceKind.NEXT and status.new_source and status.missing == 0
    assert kinds(tracker, "late-joiner", [499, 501, 0]) == ["duplicate", "next", "restart"]
    assert kinds(tracker, "other", [0, 0]) == ["next", "duplicate"]


def test_huge_gap_is_bounded():
    tracker = SequenceTracker(max_jump=2**63)  # every jump a gap: memory still bounded
    tracker.observe("a", 0)
    status = tracker.observe("a", 2**63 - 1)
    assert status.missing == 2**63 - 2
    assert status.outstanding == 100_000 and status.forgotten == 2**63 - 2 - 100_000
    assert tracker.missing_ranges("a") == [(2**63 - 100_001, 2**63 - 2)]
    assert tracker.observe("a", 2**63 - 100_001).kind is SequenceKind.LATE
    assert tracker.observe("a", 2**63 - 100_002).kind is SequenceKind.DUPLICATE


def test_window_slides_and_forgets():
    tracker = SequenceTracker(window=4)
    tracker.observe("a", 0)
    assert tracker.observe("a", 2).missing == 1  # 1 missing
    statuses = [tracker.observe("a", n) for n in (3, 4, 5, 6)]
    # the window holds the 4 numbers below the highest: 1 falls out when 6 arrives
    assert [s.forgotten for s in statuses] == [0, 0, 0, 1]
    assert [s.outstanding for s in statuses] == [1, 1, 1, 0]
    assert tracker.observe("a", 1).kind is SequenceKind.DUPLICATE


def test_source_count_is_bounded():
    tracker = SequenceTracker()
    for index in range(10_001):
        tracker.observe(f"s{index}", 0)
    assert len(tracker) == 10_000 and tracker.evicted == 1
    assert "s0" not in tracker and "s10000" in tracker
    tracker.observe("s1", 1)  # now most recent: s2 is evicted next
    tracker.observe("new", 0)
    assert "s1" in tracker and "s2" not in tracker


def test_state_round_trip():
    tracker = SequenceTracker(window=50, max_sources=3)
    for source, numbers in {"a": [0, 1, 5, 9, 3, 20], "b": [7, 8], "c": [0, 30]}.items():
        for n in numbers:
            tracker.observe(source, n)
    state = json.loads(json.dumps(tracker.to_state()))
    again = SequenceTracker.from_state(state)
    assert again.to_state() == tracker.to_state()
    assert again.missing_ranges("a") == [(2, 2), (4, 4), (6, 8), (10, 19)]
    narrower = SequenceTracker.from_state(state, window=12)
    assert narrower.missing_ranges("a") == [(8, 8), (10, 19)] and narrower.window == 12
    fewer = SequenceTracker.from_state(state, max_sources=2)
    assert "a" not in fewer and "b" in fewer and fewer.evicted == 1
    for broken in ({}, {**state, "version": 2}, {**state, "window": -1},
                   {**state, "sources": [{"source": "a", "highest": 3, "missing": [[2, 5]]}]},
                   {**state, "sources": [{"source": "a", "highest": 3}]}):
        with pytest.raises(InputError):
            SequenceTracker.from_state(broken)


def test_sequence_must_be_a_non_negative_integer():
    tracker = SequenceTracker()
    for bad in (-1, 2**63, 1.0, True, "3"):
        with pytest.raises(InputError):
            tracker.observe("a", bad)


class OracleTracker:
    """The same rules written plainly with sets (for small numbers only)."""

    def __init__(self, window, max_sources):
        self.window, self.max_sources = window, max_sources
        self.sources: OrderedDict[str, list] = OrderedDict()

    def observe(self, source, n):
        if source not in self.sources:
            if len(self.sources) >= self.max_sources:
                self.sources.popitem(last=False)
            self.sources[source] = [n, set()]
            return ("next", None, 0, 0, 0)
        self.sources.move_to_end(source)
        highest, missing = self.sources[source]
        if n > highest:
            missing |= set(range(highest + 1, n))
            kept = {m for m in missing if m >= n - self.window}
            forgotten = len(missing) - len(kept)
            self.sources[source] = [n, kept]
            kind = "next" if n == highest + 1 else "gap"
            return (kind, highest + 1, n - highest - 1, len(kept), forgotten)
        if n == 0 and highest > 0:
            self.sources[source] = [0, set()]
            return ("restart", highest + 1, 0, 0, len(missing))
        if n in missing:
            missing.discard(n)
            return ("late", highest + 1, 0, len(missing), 0)
        return ("duplicate", highest + 1, 0, len(missing), 0)


@settings(max_examples=120, deadline=None)
@given(window=st.sampled_from([1, 3, 8, 100_000]), max_sources=st.integers(1, 3),
       ops=st.lists(st.tuples(st.sampled_from("abc"), st.none() | st.integers(0, 40)),
                    max_size=80),
       checkpoint_at=st.integers(0, 80))
def test_tracker_matches_plain_model(window, max_sources, ops, checkpoint_at):
    tracker = SequenceTracker(window=window, max_sources=max_sources)
    oracle = OracleTracker(window, max_sources)
    accepted = duplicates = 0
    for step, (source, choice) in enumerate(ops):
        if step == checkpoint_at:
            tracker = SequenceTracker.from_state(json.loads(json.dumps(tracker.to_state())))
        known = oracle.sources.get(source)
        n = choice if choice is not None else (known[0] + 1 if known else 0)
        before = tracker.outstanding(source)
        status = tracker.observe(source, n)
        expected = oracle.observe(source, n)
        assert (status.kind.value, status.expected, status.missing, status.outstanding,
                status.forgotten) == expected, (step, source, n)
        assert status.outstanding == tracker.outstanding(source)
        if not status.new_source and status.kind is not SequenceKind.RESTART:
            late = status.kind is SequenceKind.LATE
            assert status.outstanding == before + status.missing - late - status.forgotten
        accepted += status.accepted
        duplicates += status.kind is SequenceKind.DUPLICATE
        missing = sorted(oracle.sources[source][1])
        ranges = tracker.missing_ranges(source)
        assert [m for first, last in ranges for m in range(first, last + 1)] == missing
    assert accepted + duplicates == len(ops)
    assert len(tracker) == len(oracle.sources) <= max_sources


def test_committed_through_is_below_the_lowest_missing_number():
    tracker = SequenceTracker(window=64)
    assert tracker.committed_through("a") is None
    for number in (0, 1, 2, 6, 7, 9):
        tracker.observe("a", number)
    assert tracker.missing_ranges("a") == [(3, 5), (8, 8)]
    assert tracker.committed_through("a") == 2
    for number in (3, 4, 5):
        tracker.observe("a", number)
    assert tracker.committed_through("a") == 7
    tracker.observe("a", 8)
    assert tracker.committed_through("a") == 9


def test_a_jump_beyond_the_bound_is_a_new_run_not_missing_messages():
    # a header claiming sequence 2**63 - 1 once: no 9.2e18 missing messages, and the
    # source's genuine messages are not duplicates from then on
    tracker = SequenceTracker(max_jump=1000)
    assert kinds(tracker, "a", [0, 1, 2]) == ["next"] * 3
    spoof = tracker.observe("a", 2**63 - 1)
    assert spoof.kind is SequenceKind.RESTART and spoof.missing == 0
    assert kinds(tracker, "a", [3, 4, 6]) == ["restart", "next", "gap"]
    assert tracker.observe("a", 6).kind is SequenceKind.DUPLICATE
    assert tracker.observe("a", 5).kind is SequenceKind.LATE
    # a producer restarting from 1 (not 0), far below its last number
    assert kinds(tracker, "a", [5000, 1, 2]) == ["restart", "restart", "next"]
    assert tracker.missing_ranges("a") == [] and tracker.committed_through("a") == 2
    with pytest.raises(InputError):
        SequenceTracker(max_jump=0)
