"""Accounting: what became of every event and every message.

Theory of operation
-------------------
Every event fed is *tagged* (archived for at least one target), *filtered* (valid
but selected by no target) or *rejected* (with a reason). ``Pipeline.feed`` returns
that split for one batch as a ``FeedResult``; the service adds the message around
it as a ``MessageRecord``, which is exactly the message's ledger row.

``Counters`` is the one tally of all this. It is fed three ways, and the same
three ways again when the files are replayed after a crash:

* ``add_feed(result)``: the events of one fed batch (offline tagging, the
  pipeline's own tally);
* ``add_message(record)``: one ledger row: its message and its events;
* ``add_rejects(reasons, events)``: the rows a message wrote to the rejects
  stream, counted by reason. A row for a whole refused message counts its events
  (at least one: a message whose events are unknown still counts once); a
  sequence-gap row is a note about *other* messages and counts nothing; so is a
  sequence-restart row (a new run of the source).

Invariant: ``events_received == events_tagged + events_filtered + events_rejected``
(``reconciles()``). The counters are checkpointed whole (``to_state``), reasons
included, so every count survives a restart.

A tagged event is not always a good one: ``QualityCounts`` tallies, per target and
per ``Quality`` flag, the archive rows tagged with a quality problem (outside the
spin model's validity window above all: phase extrapolated, left out of the
statistics). The pipeline counts them where it adds events to the statistics, so
the same counts come back when archive rows are replayed after a crash.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import asdict, dataclass, field, fields

import numpy as np

from ..errors import RejectReason
from .flags import Quality

__all__ = ["ACCEPTED", "FeedResult", "MessageRecord", "Counters", "QualityCounts",
           "QUALITY_WORDS", "EXCLUDED_FROM_STATISTICS"]

ACCEPTED = "accepted"
_NOTES = (RejectReason.SEQUENCE_GAP.value, RejectReason.SEQUENCE_RESTART.value)
"""Rejects rows that note something about a source's sequence and count no event."""
"""Outcome of a message whose events were fed (otherwise the outcome is a reason)."""

_EARLIER_NAMES = {"received": "events_received", "tagged": "events_tagged",
                  "filtered": "events_filtered", "rejected": "events_rejected",
                  "by_reason": "rejected_by_reason"}
"""Key names of pipeline states saved before the counters were unified."""

QUALITY_WORDS = {
    "OUTSIDE_MODEL_VALIDITY": "outside the spin model's validity window (phase extrapolated, "
                              "left out of the statistics)",
    "LEAP_TABLE_EXPIRED": "after the leap-second table's expiry (a new leap second would be "
                          "missed)",
    "EARTH_ORIENTATION_PREDICTED": "with predicted Earth orientation (a few ns at most)",
    "EARTH_ORIENTATION_HELD": "past the end of the Earth-orientation table (barycentric "
                              "time off by up to ~1.4 µs)",
    "CLOCK_CORRECTION_EXTRAPOLATED": "outside a clock-correction table (its end value held)",
    "BINARY_NOT_CONVERGED": "with an unconverged binary emission time",
    "BUILTIN_EPHEMERIS": "with erfa's built-in ephemeris (~15 µs rms)",
    "ORBIT_TABLE_EXTRAPOLATED": "outside the orbit table (position extrapolated)",
}
"""Each ``Quality`` flag in words, after "N events tagged ..."."""
EXCLUDED_FROM_STATISTICS = Quality.OUTSIDE_MODEL_VALIDITY
"""Flags whose events the statistics leave out (``Pipeline.accumulate``)."""


@dataclass
class FeedResult:
    """What one batch produced (``Pipeline.feed``).

    Attributes
    ----------
    archive : dict of str to dict of str to ndarray
        Archive columns per target name (targets that tagged no event are absent).
    rejected_index : ndarray of int
        Rows of the input batch refused.
    rejected_reason, rejected_detail : list of str
        Reason code (a ``RejectReason`` value) and explanation of each refused row.
    events, tagged, filtered : int
        Events in the batch, archived for at least one target, selected by none.
    first_tt_ns, last_tt_ns : int or None
        Earliest and latest accepted event, ns TT since 2000-01-01T12:00:00.
    """

    archive: dict[str, dict[str, np.ndarray]]
    rejected_index: np.ndarray
    rejected_reason: list[str]
    rejected_detail: list[str]
    events: int = 0
    tagged: int = 0
    filtered: int = 0
    first_tt_ns: int | None = None
    last_tt_ns: int | None = None

    @property
    def rejected(self) -> int:
        """Events refused."""
        return int(self.rejected_index.size)


@dataclass(frozen=True)
class MessageRecord:
    """The accounting of one message: its ledger row, field for field.

    Attributes
    ----------
    received_utc_ns : int
        Wall clock on receipt, ns UTC label since 2000-01-01T12:00:00.
    source : str or None
        Event builder (None when the header was unreadable).
    sequence : int or None
        Message sequence number (None when unreadable).
    outcome : str
        ``ACCEPTED``, or the ``RejectReason`` value refusing the whole message.
    events, tagged, filtered, rejected : int
        Events in the message (0 if unknown) and their fate.
    missing_before : int
        Messages missing from the source's sequence before this one.
    first_tt_ns, last_tt_ns : int or None
        Earliest and latest accepted event, ns TT.
    """

    received_utc_ns: int
    source: str | None
    sequence: int | None
    outcome: str
    events: int
    tagged: int = 0
    filtered: int = 0
    rejected: int = 0
    missing_before: int = 0
    first_tt_ns: int | None = None
    last_tt_ns: int | None = None

    @classmethod
    def accepted(cls, received_utc_ns: int, source: str, sequence: int, result: FeedResult,
                 missing_before: int = 0) -> MessageRecord:
        """A message whose events were fed, with ``result`` from ``Pipeline.feed``."""
        return cls(received_utc_ns, source, sequence, ACCEPTED, result.events, result.tagged,
                   result.filtered, result.rejected, missing_before, result.first_tt_ns,
                   result.last_tt_ns)

    @classmethod
    def refused(cls, received_utc_ns: int, source: str | None, sequence: int | None,
                reason: str, events: int) -> MessageRecord:
        """A message refused whole for ``reason``: all its ``events`` are rejected."""
        return cls(received_utc_ns, source, sequence, reason, events, rejected=events)

    @classmethod
    def from_row(cls, row: Mapping) -> MessageRecord:
        """From a ledger row read back (a dict with the ledger's field names)."""
        return cls(**{f.name: row[f.name] for f in fields(cls)})

    def row(self) -> dict:
        """The ledger row (a dict with the ledger's field names)."""
        return asdict(self)


@dataclass
class Counters:
    """Events and messages so far, and rejected events by reason.

    Attributes
    ----------
    events_received, events_tagged, events_filtered, events_rejected : int
        Events; received = tagged + filtered + rejected.
    messages_received, messages_rejected : int
        Messages, and those refused whole (their events count as rejected).
    duplicate_messages : int
        Messages refused because their sequence number was seen already.
    missing_messages : int
        Sequence numbers skipped by the sources.
    rejected_by_reason : dict of str to int
        Rejected events by ``RejectReason`` value (a refused message of unknown size
        counts once).
    """

    events_received: int = 0
    events_tagged: int = 0
    events_filtered: int = 0
    events_rejected: int = 0
    messages_received: int = 0
    messages_rejected: int = 0
    duplicate_messages: int = 0
    missing_messages: int = 0
    rejected_by_reason: dict[str, int] = field(default_factory=dict)

    def add_feed(self, result: FeedResult) -> None:
        """Count the events of one fed batch (no message: offline tagging)."""
        self.events_received += result.events
        self.events_tagged += result.tagged
        self.events_filtered += result.filtered
        self.events_rejected += result.rejected
        self.add_rejects(result.rejected_reason, [1] * len(result.rejected_reason))

    def add_message(self, record: MessageRecord) -> None:
        """Count one committed message (one ledger row); its reasons come with its
        rejects rows (``add_rejects``)."""
        self.messages_received += 1
        self.messages_rejected += int(record.outcome != ACCEPTED)
        self.duplicate_messages += int(record.outcome == RejectReason.DUPLICATE_MESSAGE.value)
        self.missing_messages += int(record.missing_before)
        self.events_received += int(record.events)
        self.events_tagged += int(record.tagged)
        self.events_filtered += int(record.filtered)
        self.events_rejected += int(record.rejected)

    def add_rejects(self, reasons: Iterable[str], events: Iterable[int]) -> None:
        """Count rejects rows by reason: ``events`` of each row (at least 1); rows
        noting a sequence gap or a new run count nothing (see the module docstring)."""
        by_reason = self.rejected_by_reason
        for reason, count in zip(reasons, events, strict=True):
            if reason not in _NOTES:
                by_reason[reason] = by_reason.get(reason, 0) + max(int(count), 1)

    def reconciles(self) -> bool:
        """True when every event received is tagged, filtered or rejected."""
        return self.events_received == (self.events_tagged + self.events_filtered
                                        + self.events_rejected)

    def totals(self) -> dict[str, int]:
        """The counts without the reasons (the ``counters`` of ``status.json``)."""
        return {f.name: getattr(self, f.name) for f in fields(self)
                if f.name != "rejected_by_reason"}

    def to_state(self) -> dict:
        """Everything, for a checkpoint (plain JSON types)."""
        return {**self.totals(), "rejected_by_reason": dict(self.rejected_by_reason)}

    @classmethod
    def from_state(cls, state: Mapping) -> Counters:
        """From ``to_state()``; also reads the key names of earlier pipeline states."""
        values = {_EARLIER_NAMES.get(key, key): value for key, value in state.items()}
        values["rejected_by_reason"] = dict(values.get("rejected_by_reason", {}))
        return cls(**values)


@dataclass
class QualityCounts:
    """Tagged events carrying a quality problem, per target and per ``Quality`` flag.

    Attributes
    ----------
    by_target : dict of str to dict of str to int
        Target name -> flag name -> archive rows of that target with the flag set.
        An event with two flags counts under each.
    """

    by_target: dict[str, dict[str, int]] = field(default_factory=dict)

    def add(self, target: str, quality: np.ndarray) -> None:
        """Count the ``quality`` flags (uint32 array, one per tagged row) of ``target``."""
        quality = np.asarray(quality, dtype=np.uint32)
        present = int(np.bitwise_or.reduce(quality)) if quality.size else 0
        if not present:  # one pass for the usual clean batch
            return
        counts = self.by_target.setdefault(target, {})
        for flag in Quality:
            if present & flag:
                n = int(np.count_nonzero(quality & np.uint32(flag)))
                counts[flag.name] = counts.get(flag.name, 0) + n

    def of(self, target: str) -> dict[str, int]:
        """Flag name -> count for one target (empty when it has no flagged events)."""
        return dict(self.by_target.get(target, {}))

    def excluded(self, target: str) -> int:
        """Tagged events of ``target`` left out of its statistics (outside validity)."""
        return self.by_target.get(target, {}).get(EXCLUDED_FROM_STATISTICS.name, 0)

    def totals(self) -> dict[str, int]:
        """Flag name -> count over every target."""
        out: dict[str, int] = {}
        for counts in self.by_target.values():
            for name, n in counts.items():
                out[name] = out.get(name, 0) + n
        return out

    def lines(self, target: str) -> list[str]:
        """One sentence per flag of ``target``, the serious ones first."""
        counts = self.of(target)
        order = sorted(counts, key=lambda name: (name != EXCLUDED_FROM_STATISTICS.name, name))
        return [f"{counts[name]:,} events of {target} tagged "
                f"{QUALITY_WORDS.get(name, name.lower().replace('_', ' '))}" for name in order]

    def to_state(self) -> dict:
        """Plain JSON types, for a checkpoint."""
        return {name: dict(counts) for name, counts in self.by_target.items()}

    @classmethod
    def from_state(cls, state: Mapping | None) -> QualityCounts:
        """From ``to_state()`` (None or missing: no counts, as in older checkpoints)."""
        return cls({str(name): {str(k): int(v) for k, v in counts.items()}
                    for name, counts in (state or {}).items()})
