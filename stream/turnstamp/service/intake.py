"""The intake: draining the intake socket and admitting each message.

Theory of operation
-------------------
The sockets themselves are set up by ``sockets``. ``drain`` takes what ZeroMQ
holds without blocking. ``Admission.admit`` validates one message at the edge:
decode (``wire.decode.decode_message``), then its sequence number against what its
source sent before. A message that cannot be decoded, or repeats a sequence number,
is ``Refused`` whole; otherwise it is ``Admitted`` with a rejects row noting any
gap in the sequence before it.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass

import pyarrow as pa
import zmq

from ..config import IntakeConfig
from ..core.accounting import MessageRecord
from ..core.batch import EventBatch
from ..errors import RejectReason, WireError
from ..files.outputs import message_reject_table
from ..wire.decode import decode_message
from ..wire.sequence import SequenceKind, SequenceStatus, SequenceTracker

__all__ = ["MAX_SOURCES", "drain", "Admitted", "Refused", "Admission"]

MAX_SOURCES = 10_000  # per-source counts kept, like the sequence tracker's limit
STATUS_RANGES = 100  # missing ranges per source in status.json (all on the control socket)


def drain(socket: zmq.Socket, handle: Callable[[list[tuple[list, float]]], None],
          clock: Callable[[], float], limit: int | None = None,
          deadline: float | None = None, group: int = 1) -> int:
    """Hand the messages ZeroMQ holds to ``handle([(frames, received), ...])``, up
    to ``group`` at a time, without blocking, up to ``limit`` messages or the
    ``deadline`` (``clock()`` seconds). Returns how many were handled."""
    handled = 0
    while True:
        taken: list[tuple[list, float]] = []
        while len(taken) < group and (limit is None or handled + len(taken) < limit):
            if deadline is not None and clock() > deadline:
                break
            try:
                frames = socket.recv_multipart(flags=zmq.NOBLOCK, copy=False)
            except zmq.Again:
                break
            taken.append((frames, clock()))
        if not taken:
            return handled
        handle(taken)
        handled += len(taken)


@dataclass(frozen=True)
class Admitted:
    """A decoded message to feed, and the rejects rows it brings (a gap note)."""

    batch: EventBatch
    message_bytes: int
    missing: int
    """Messages missing from the source's sequence before this one."""
    notes: list[pa.Table]


@dataclass(frozen=True)
class Refused:
    """A message refused whole: its ledger record and its rejects row."""

    record: MessageRecord
    row: pa.Table


class Admission:
    """Decoding and sequence checks of incoming messages, with counts per source.

    Parameters
    ----------
    config : IntakeConfig
        Limits and socket pattern of the intake.
    tracker : SequenceTracker
        What each source sent before (restored after a restart).
    """

    def __init__(self, config: IntakeConfig, tracker: SequenceTracker):
        self.config = config
        self.tracker = tracker
        tracker.max_jump = config.max_sequence_jump
        self.sources: OrderedDict[str, dict] = OrderedDict()  # bounded: MAX_SOURCES

    def admit(self, frames: list, received_ns: int) -> Admitted | Refused:
        """Decode one message received at ``received_ns`` (ns UTC label) and check
        its sequence number."""
        c = self.config
        try:
            message = decode_message(frames, has_topic=c.pattern == "sub",
                                     max_message_bytes=c.max_message_bytes,
                                     max_events=c.max_events_per_message)
        except WireError as exc:  # counted from what was decoded, never the header's claim
            return _refused(received_ns, exc.source, exc.sequence, exc.reason.value, exc.detail,
                            exc.received, sum(len(f) for f in frames))
        batch = message.batch
        key = c.source_keys.get(batch.source)
        if key is not None and _sender_key(frames) != key:
            return _refused(received_ns, batch.source, batch.sequence,
                            RejectReason.SOURCE_NOT_AUTHORISED.value,
                            f"source {batch.source!r} is bound to another CurveZMQ key "
                            "(intake.source_keys)", len(batch), message.message_bytes)
        status = self.tracker.observe(batch.source, batch.sequence)
        source = self._source(batch.source)
        source["messages"] += 1
        source["events"] += len(batch)
        if status.kind == SequenceKind.DUPLICATE:
            return _refused(received_ns, batch.source, batch.sequence,
                            RejectReason.DUPLICATE_MESSAGE.value,
                            f"sequence {batch.sequence} from {batch.source!r} was already "
                            "received", len(batch), message.message_bytes)
        missing = status.missing if status.kind == SequenceKind.GAP else 0
        source["missing"] += missing
        source["last_sequence"] = batch.sequence
        return Admitted(batch, message.message_bytes, missing,
                        self._notes(status, received_ns, source))

    def _notes(self, status: SequenceStatus, received_ns: int, source: dict) -> list[pa.Table]:
        """A rejects row (no events) noting a gap before the message or a new run."""
        name, number = status.source, status.sequence
        if status.kind == SequenceKind.GAP:
            reason = RejectReason.SEQUENCE_GAP
            detail = (f"{status.missing} message(s) missing before sequence {number} "
                      f"(expected {status.expected})")
        elif status.kind == SequenceKind.RESTART:
            source["restarts"] = source.get("restarts", 0) + 1
            reason = RejectReason.SEQUENCE_RESTART
            detail = (f"sequence {number} after {status.expected - 1}: a new run of the source "
                      f"(a restart, or a jump beyond max_sequence_jump = "
                      f"{self.tracker.max_jump}); nothing counted missing")
        else:
            return []
        return [message_reject_table(received_ns, name, number, reason.value, detail, 0, 0)]

    def _source(self, name: str) -> dict:
        source = self.sources.get(name)
        if source is None:
            if len(self.sources) >= MAX_SOURCES:  # as the sequence tracker: forget the oldest
                self.sources.popitem(last=False)
            source = self.sources[name] = {"messages": 0, "events": 0, "last_sequence": None,
                                           "missing": 0}
        return source

    def source_status(self, ranges_shown: int | None = STATUS_RANGES) -> dict[str, dict]:
        """Per source: messages, events, last and highest sequence, missing; and for
        resending: ``committed_through`` (nothing missing at or below it) and
        ``missing_ranges`` (the first ``ranges_shown``; all with None, and
        ``missing_ranges_complete`` says which)."""
        tracker = self.tracker
        out = {}
        for name, highest in tracker.highest().items():
            ranges = tracker.missing_ranges(name)
            shown = ranges if ranges_shown is None else ranges[:ranges_shown]
            out[name] = {**self.sources.get(name, {}), "highest_sequence": highest,
                         "committed_through": tracker.committed_through(name),
                         "missing_ranges": [list(r) for r in shown],
                         "missing_ranges_complete": len(shown) == len(ranges)}
        return out


def _sender_key(frames: list) -> str | None:
    """The CurveZMQ public key (Z85) the message came with, None without CurveZMQ."""
    try:
        return frames[0].get("User-Id")
    except (AttributeError, zmq.ZMQError):
        return None


def _refused(received_ns: int, source: str | None, sequence: int | None, reason: str,
             detail: str, events: int, message_bytes: int) -> Refused:
    return Refused(MessageRecord.refused(received_ns, source, sequence, reason, events),
                   message_reject_table(received_ns, source, sequence, reason, detail, events,
                                        message_bytes))
