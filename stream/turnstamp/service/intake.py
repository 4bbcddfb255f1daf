"""The intake: the service's sockets, draining them, and admitting each message.

Theory of operation
-------------------
``open_sockets`` makes every socket of the service on one context and hands each
to an ``ExitStack``, so they close (linger 0) however the loop ends, before the
context terminates. Endpoints may name port ``*``; the ports ZeroMQ chose are read
back (``LAST_ENDPOINT``) into ``Sockets.endpoints``.

``drain`` takes what ZeroMQ holds without blocking. ``Admission.admit`` validates
one message at the edge: decode (``wire.decode.decode_message``), then its sequence
number against what its source sent before. A message that cannot be decoded, or
repeats a sequence number, is ``Refused`` whole; otherwise it is ``Admitted`` with
a rejects row noting any gap in the sequence before it.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Callable
from contextlib import ExitStack
from dataclasses import dataclass, field

import pyarrow as pa
import zmq

from ..config import IntakeConfig, ServiceConfig
from ..core.accounting import MessageRecord
from ..core.batch import EventBatch
from ..errors import RejectReason, WireError
from ..files.outputs import message_reject_table
from ..wire.decode import decode_message
from ..wire.sequence import SequenceKind, SequenceTracker

__all__ = ["ZMQ_SIZE_LIMIT_FACTOR", "MAX_SOURCES", "Sockets", "open_sockets", "drain",
           "Admitted", "Refused", "Admission"]

ZMQ_SIZE_LIMIT_FACTOR = 4
"""ZeroMQ itself drops messages above this many ``max_message_bytes``; the ones
between are received and refused with a reason (counted, not silently lost)."""
MAX_SOURCES = 10_000  # per-source counts kept, like the sequence tracker's limit
STATUS_RANGES = 100  # missing ranges per source in status.json (all on the control socket)
PUBLISH_HIGH_WATER_MARK = 100  # viewers get the newest updates, not a backlog


@dataclass
class Sockets:
    """The open sockets of a running service (publisher and control are optional)."""

    intake: zmq.Socket
    publisher: zmq.Socket | None = None
    control: zmq.Socket | None = None
    endpoints: dict = field(default_factory=dict)
    """Endpoints as bound or connected: ``intake`` (a list), ``publish``, ``control``."""


def _last_endpoint(socket: zmq.Socket) -> str:
    return socket.getsockopt_string(zmq.LAST_ENDPOINT)


def open_sockets(context: zmq.Context, config: ServiceConfig, stack: ExitStack) -> Sockets:
    """Every socket the configuration asks for; ``stack`` closes them."""
    intake, endpoints = _intake(context, config.intake, stack)
    sockets = Sockets(intake, endpoints={"intake": endpoints, "publish": None,
                                         "control": None})
    if config.output.publish_endpoint:
        sockets.publisher = stack.enter_context(context.socket(zmq.PUB))
        sockets.publisher.setsockopt(zmq.SNDHWM, PUBLISH_HIGH_WATER_MARK)
        sockets.publisher.setsockopt(zmq.LINGER, 0)
        sockets.publisher.bind(config.output.publish_endpoint)
        sockets.endpoints["publish"] = _last_endpoint(sockets.publisher)
    if config.control.endpoint:
        sockets.control = stack.enter_context(context.socket(zmq.REP))
        sockets.control.setsockopt(zmq.LINGER, 0)
        sockets.control.bind(config.control.endpoint)
        sockets.endpoints["control"] = _last_endpoint(sockets.control)
    return sockets


def _intake(context: zmq.Context, c: IntakeConfig, stack: ExitStack):
    """The intake socket (PULL or SUB, CurveZMQ when configured) and its endpoints."""
    if c.curve is not None:  # the authenticator outlives the socket it guards
        from zmq.auth import load_certificate
        from zmq.auth.thread import ThreadAuthenticator

        authenticator = ThreadAuthenticator(context)
        authenticator.start()
        stack.callback(authenticator.stop)
        authenticator.configure_curve(domain="*",
                                      location=str(c.curve.authorized_clients_directory))
    kind = zmq.PULL if c.pattern == "pull" else zmq.SUB
    intake = stack.enter_context(context.socket(kind))
    intake.setsockopt(zmq.RCVHWM, c.receive_high_water_mark)
    intake.setsockopt(zmq.MAXMSGSIZE, ZMQ_SIZE_LIMIT_FACTOR * c.max_message_bytes)
    intake.setsockopt(zmq.LINGER, 0)
    if kind == zmq.SUB:
        for topic in c.topics:
            intake.setsockopt(zmq.SUBSCRIBE, topic.encode())
    if c.curve is not None:
        public, secret = load_certificate(str(c.curve.server_secret_key_file))
        intake.curve_publickey, intake.curve_secretkey = public, secret
        intake.curve_server = True
    endpoints = []
    for endpoint in c.endpoints:
        (intake.bind if c.bind else intake.connect)(endpoint)
        endpoints.append(_last_endpoint(intake))
    return intake, endpoints


def drain(socket: zmq.Socket, handle: Callable[[list, float], None],
          clock: Callable[[], float], limit: int | None = None,
          deadline: float | None = None) -> int:
    """Hand the messages ZeroMQ holds to ``handle(frames, received)``, without
    blocking, up to ``limit`` messages or the ``deadline`` (``clock()`` seconds).
    Returns how many were handled."""
    handled = 0
    while limit is None or handled < limit:
        if deadline is not None and clock() > deadline:
            break
        try:
            frames = socket.recv_multipart(flags=zmq.NOBLOCK, copy=False)
        except zmq.Again:
            break
        handle(frames, clock())
        handled += 1
    return handled


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
        self.sources: OrderedDict[str, dict] = OrderedDict()  # bounded: MAX_SOURCES

    def admit(self, frames: list, received_ns: int) -> Admitted | Refused:
        """Decode one message received at ``received_ns`` (ns UTC label) and check
        its sequence number."""
        c = self.config
        try:
            message = decode_message(frames, has_topic=c.pattern == "sub",
                                     max_message_bytes=c.max_message_bytes,
                                     max_events=c.max_events_per_message)
        except WireError as exc:
            return _refused(received_ns, exc.source, exc.sequence, exc.reason.value, exc.detail,
                            exc.events, sum(len(f) for f in frames))
        batch = message.batch
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
        notes = []
        if missing:
            source["missing"] += missing
            notes.append(message_reject_table(
                received_ns, batch.source, batch.sequence, RejectReason.SEQUENCE_GAP.value,
                f"{missing} message(s) missing before sequence {batch.sequence} "
                f"(expected {status.expected})", 0, 0))
        source["last_sequence"] = batch.sequence
        return Admitted(batch, message.message_bytes, missing, notes)

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


def _refused(received_ns: int, source: str | None, sequence: int | None, reason: str,
             detail: str, events: int, message_bytes: int) -> Refused:
    return Refused(MessageRecord.refused(received_ns, source, sequence, reason, events),
                   message_reject_table(received_ns, source, sequence, reason, detail, events,
                                        message_bytes))
