"""Per-source sequence bookkeeping: gaps, late arrivals, duplicates and restarts.

Theory of operation
-------------------
Each producer numbers its messages 0, 1, 2, ... (the header's ``sequence``). For
each source :class:`SequenceTracker` keeps the highest number seen and, as one
integer used as a bit set, which of the ``window`` numbers below it are still
missing: bit ``i`` stands for number ``highest - 1 - i``. A number above the
highest shifts the set left by the step and marks the numbers skipped; a missing
number arriving clears its bit; a 0 after higher numbers is a producer restart, and
so is a number more than ``max_jump`` away from the highest, either way: a producer
that restarted from another number, or a header not to be trusted. Such a jump
starts a new run (nothing counted missing); a single bad number therefore cannot
make the source's genuine messages look like millions of missing ones, nor like
duplicates forever after.
Memory per source is bounded by ``window / 8`` bytes, and the number of sources by
``max_sources`` (least recently seen dropped first). Pure bookkeeping, no I/O.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Mapping
from dataclasses import dataclass
from enum import StrEnum
from typing import Any

import numpy as np

from ..errors import InputError
from .message import SEQUENCE_LIMIT, is_integer, shown

__all__ = ["SequenceKind", "SequenceStatus", "SequenceTracker"]

_STATE_FORMAT = "turnstamp.sequence-state"


class SequenceKind(StrEnum):
    """How a message's sequence number relates to what came before from its source."""

    NEXT = "next"
    """The expected number (or the first message seen from the source)."""
    GAP = "gap"
    """Beyond the expected number: the numbers in between are missing."""
    LATE = "late"
    """A number remembered as missing: it arrived after all."""
    DUPLICATE = "duplicate"
    """Seen already, or too old to tell: the caller refuses the message."""
    RESTART = "restart"
    """0 after a higher number, or a jump beyond ``max_jump`` either way: a new run
    of the producer (or a suspicious number); its state is reset, nothing missing."""


@dataclass(frozen=True)
class SequenceStatus:
    """The outcome of :meth:`SequenceTracker.observe`.

    Attributes
    ----------
    kind : SequenceKind
    source : str
    sequence : int
    expected : int or None
        The number that was expected next; None for a source not seen before.
    missing : int
        ``GAP``: how many numbers this message skipped; else 0.
    outstanding : int
        Numbers of this source remembered as missing after this message.
    forgotten : int
        Missing numbers this message pushed out of memory (beyond the window,
        or discarded by a restart); they can no longer arrive late.
    """

    kind: SequenceKind
    source: str
    sequence: int
    expected: int | None
    missing: int = 0
    outstanding: int = 0
    forgotten: int = 0

    @property
    def accepted(self) -> bool:
        """False only for duplicates."""
        return self.kind is not SequenceKind.DUPLICATE

    @property
    def new_source(self) -> bool:
        return self.expected is None


@dataclass
class _Source:
    highest: int
    missing: int = 0  # bit i set: number highest - 1 - i is missing (i < window)


class SequenceTracker:
    """Per-source sequence bookkeeping: gaps, late arrivals, duplicates, restarts.

    Pure bookkeeping (no I/O). For each source it keeps the highest number seen
    and which of the ``window`` numbers below it are still missing, as a bit
    set: at most ``window / 8`` bytes per source, whatever the input. A number
    older than that window can no longer be told from a duplicate and is
    reported as one. At most ``max_sources`` sources are kept; the one seen
    least recently is dropped to make room (counted in :attr:`evicted`) and
    starts afresh if it comes back.

    The first message seen from a source is ``NEXT`` whatever its number
    (the tracker may have started after the producer); nothing before it
    counts as missing.

    Parameters
    ----------
    window : int, default 100_000
        How many numbers below the highest one are remembered.
    max_sources : int, default 10_000
        How many sources are tracked at once.
    max_jump : int, default 1_000_000
        A number further than this from the highest, above or below, starts a
        new run (``RESTART``) instead of counting the numbers between as missing.
    """

    def __init__(self, window: int = 100_000, max_sources: int = 10_000,
                 max_jump: int = 1_000_000):
        if not is_integer(window) or window < 1:
            raise InputError("window", window, "must be an integer >= 1")
        if not is_integer(max_sources) or max_sources < 1:
            raise InputError("max_sources", max_sources, "must be an integer >= 1")
        if not is_integer(max_jump) or max_jump < 1:
            raise InputError("max_jump", max_jump, "must be an integer >= 1")
        self.window = window
        self.max_sources = max_sources
        self.max_jump = max_jump
        self.evicted = 0
        self._mask = (1 << window) - 1
        self._sources: OrderedDict[str, _Source] = OrderedDict()

    def __len__(self) -> int:
        return len(self._sources)

    def __contains__(self, source: object) -> bool:
        return source in self._sources

    def highest(self) -> dict[str, int]:
        """The highest sequence number accepted so far, per source."""
        return {name: state.highest for name, state in self._sources.items()}

    def observe(self, source: str, sequence: int) -> SequenceStatus:
        """Record one message and classify its number.

        Parameters
        ----------
        source : str
        sequence : int
            0 <= sequence < 2**63.

        Returns
        -------
        SequenceStatus
            ``accepted`` is False for a duplicate, which the caller refuses.
        """
        if not is_integer(sequence) or not 0 <= sequence < SEQUENCE_LIMIT:
            raise InputError("sequence", sequence, "must be an integer in [0, 2**63)")
        state = self._sources.get(source)
        if state is None:
            if len(self._sources) >= self.max_sources:
                self._sources.popitem(last=False)
                self.evicted += 1
            self._sources[source] = _Source(highest=sequence)
            return SequenceStatus(SequenceKind.NEXT, source, sequence, None)
        self._sources.move_to_end(source)
        highest, expected = state.highest, state.highest + 1
        before = state.missing.bit_count()
        index = highest - 1 - sequence
        late = 0 <= index < self.window and state.missing >> index & 1
        if (sequence == 0 < highest) or (not late and abs(sequence - highest) > self.max_jump):
            self._sources[source] = _Source(highest=sequence)
            return SequenceStatus(SequenceKind.RESTART, source, sequence, expected,
                                  forgotten=before)
        if sequence > highest:
            return self._advance(state, source, sequence, before)
        if late:
            state.missing &= ~(1 << index)
            return SequenceStatus(SequenceKind.LATE, source, sequence, expected,
                                  outstanding=before - 1)
        return SequenceStatus(SequenceKind.DUPLICATE, source, sequence, expected,
                              outstanding=before)

    def _advance(self, state: _Source, source: str, sequence: int, before: int
                 ) -> SequenceStatus:
        """A number above the highest: mark the numbers skipped as missing."""
        highest = state.highest
        step = sequence - highest
        if step <= self.window:
            state.missing = ((state.missing << step) | ((1 << (step - 1)) - 1)) & self._mask
        else:
            state.missing = self._mask
        state.highest = sequence
        after = state.missing.bit_count()
        kind = SequenceKind.NEXT if step == 1 else SequenceKind.GAP
        return SequenceStatus(kind, source, sequence, highest + 1, missing=step - 1,
                              outstanding=after, forgotten=before + step - 1 - after)

    def outstanding(self, source: str) -> int:
        """Numbers of ``source`` remembered as missing (0 for an unknown source)."""
        state = self._sources.get(source)
        return 0 if state is None else state.missing.bit_count()

    def missing_ranges(self, source: str) -> list[tuple[int, int]]:
        """The missing numbers of ``source`` as inclusive ``(first, last)`` ranges, ascending."""
        state = self._sources.get(source)
        if state is None or not state.missing:
            return []
        bits = np.unpackbits(np.frombuffer(
            state.missing.to_bytes((self.window + 7) // 8, "little"), np.uint8),
            bitorder="little")[: self.window]
        # bit i <-> number highest - 1 - i; reverse so that numbers ascend
        numbers_set = bits[::-1].astype(np.int8)
        edges = np.diff(np.concatenate(([0], numbers_set, [0])))
        starts = np.flatnonzero(edges == 1)
        stops = np.flatnonzero(edges == -1) - 1
        base = state.highest - self.window  # number of position 0 after reversal
        return [(int(base + a), int(base + b)) for a, b in zip(starts, stops, strict=True)]

    def committed_through(self, source: str) -> int | None:
        """The last number of ``source`` with nothing missing at or below it (within
        the window); None for an unknown source."""
        state = self._sources.get(source)
        if state is None:
            return None
        if not state.missing:
            return state.highest
        return state.highest - state.missing.bit_length() - 1

    def forget(self, source: str) -> None:
        """Drop a source's state (its next message counts as its first)."""
        self._sources.pop(source, None)

    def to_state(self) -> dict[str, Any]:
        """A JSON-serialisable checkpoint (sources in least-recently-seen order)."""
        return {
            "format": _STATE_FORMAT,
            "version": 1,
            "window": self.window,
            "max_sources": self.max_sources,
            "evicted": self.evicted,
            "sources": [{"source": name, "highest": state.highest,
                         "missing": [list(r) for r in self.missing_ranges(name)]}
                        for name, state in self._sources.items()],
        }

    @classmethod
    def from_state(cls, state: Mapping[str, Any], *, window: int | None = None,
                   max_sources: int | None = None) -> SequenceTracker:
        """Rebuild a tracker from :meth:`to_state`'s output.

        Parameters
        ----------
        state : mapping
            As returned by :meth:`to_state` (possibly through JSON).
        window, max_sources : int, optional
            Override the checkpoint's bounds; a smaller window forgets the
            older missing numbers, fewer sources drop the least recent ones.

        Raises
        ------
        InputError
            The checkpoint is not valid.
        """
        _check_state_header(state)
        tracker = cls(window=window if window is not None else state["window"],
                      max_sources=max_sources if max_sources is not None
                      else state["max_sources"])
        tracker.evicted = state["evicted"]
        sources = state.get("sources")
        if not isinstance(sources, list):
            raise _bad_state("sources", sources, "must be a list")
        for entry in sources:
            name, source = _source_from_state(entry, tracker.window)
            if name in tracker._sources:
                raise _bad_state("sources", name, "appears twice")
            tracker._sources[name] = source
        while len(tracker._sources) > tracker.max_sources:
            tracker._sources.popitem(last=False)
            tracker.evicted += 1
        return tracker


def _bad_state(field: str, value: Any, problem: str) -> InputError:
    return InputError(f"sequence state {field}", shown(value), problem)


def _check_state_header(state: Any) -> None:
    """Format, version and bounds of a checkpoint; InputError naming the first problem."""
    if not isinstance(state, Mapping) or state.get("format") != _STATE_FORMAT:
        raise _bad_state("format", state.get("format") if isinstance(state, Mapping) else state,
                         "not a turnstamp sequence-state checkpoint")
    if state.get("version") != 1:
        raise _bad_state("version", state.get("version"), "only version 1 is known")
    for key in ("window", "max_sources", "evicted"):
        if not is_integer(state.get(key)) or state[key] < 0:
            raise _bad_state(key, state.get(key), "must be an integer >= 0")


def _source_from_state(entry: Any, window: int) -> tuple[str, _Source]:
    """One source of a checkpoint, its missing ranges folded into a ``window``-bit set."""
    if not isinstance(entry, Mapping) or not isinstance(entry.get("source"), str):
        raise _bad_state("sources", entry, "each entry needs a 'source' string")
    name, highest, ranges = entry["source"], entry.get("highest"), entry.get("missing")
    if not is_integer(highest) or not 0 <= highest < SEQUENCE_LIMIT:
        raise _bad_state(f"{name}.highest", highest, "must be an integer in [0, 2**63)")
    if not isinstance(ranges, list):
        raise _bad_state(f"{name}.missing", ranges, "must be a list of [first, last]")
    bits = 0
    for item in ranges:
        if (not isinstance(item, list) or len(item) != 2 or not all(map(is_integer, item))
                or not 0 <= item[0] <= item[1] < highest):
            raise _bad_state(f"{name}.missing", item, "must be [first, last] with "
                             "0 <= first <= last < highest")
        first = max(item[0], highest - window)
        if first > item[1]:
            continue
        low, high = highest - 1 - item[1], highest - 1 - first
        bits |= ((1 << (high - low + 1)) - 1) << low
    return name, _Source(highest=highest, missing=bits)
