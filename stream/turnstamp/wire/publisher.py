"""Sending event batches from an event builder: :class:`EventPublisher`.

Choosing a pattern
------------------
*PUSH/PULL* (the default of :class:`EventPublisher`) applies back-pressure:
when the receiver falls behind, the sender's queue fills up to its high-water
mark and ``send`` then blocks (or raises ``zmq.Again`` after ``send_timeout_ms``).
Nothing is lost silently. Use it for the archive path.

*PUB/SUB* never blocks the sender: a subscriber that falls behind silently
loses messages (in this project's overload measurements 15 % to 70 % of them),
and a subscriber that connects late misses the first ones. Use it only for
best-effort fan-out, e.g. a live display.

Either way the sequence numbers in the headers reveal every lost message:
:class:`~turnstamp.wire.sequence.SequenceTracker` reports each gap.
"""

from __future__ import annotations

import time
from collections import deque
from collections.abc import Mapping
from typing import Any, Literal

import zmq

from ..core.timebase import Scale, unix_to_ns
from ..errors import InputError
from .encode import encode_message, scale_name
from .message import SEQUENCE_LIMIT, is_integer, is_source_name

__all__ = ["EventPublisher", "ask_sources"]


class EventPublisher:
    """Send event batches from an event builder in a few lines.

    Wraps one ZeroMQ socket, numbers the messages and encodes them::

        with EventPublisher("tcp://turnstamp-host:5555", "builder-1") as publisher:
            for event_id, time_ns, energy in batches():
                publisher.send(event_id=event_id, time_ns=time_ns, energy_kev=energy)

    Parameters
    ----------
    endpoint : str
        ZeroMQ endpoint, e.g. ``"tcp://host:5555"``, or ``"tcp://*:5555"`` with
        ``bind=True``.
    source : str
        This producer's identifier (1 to 64 of ``A-Z a-z 0-9 . _ -``).
    time_scale : Scale or str, default "UTC"
        Scale of the ``time_ns`` values sent.
    pattern : {"push", "pub"}, default "push"
        ``"push"`` for PUSH/PULL: back-pressure, nothing lost (archive path).
        ``"pub"`` for PUB/SUB: never blocks, drops messages when a subscriber
        is slow or not yet connected (best-effort fan-out only). See the
        module docstring.
    topic : bytes, default b""
        Topic frame of every message (``"pub"`` only).
    bind : bool, default False
        Bind the endpoint instead of connecting to it.
    context : zmq.Context, optional
        Defaults to the process-wide ``zmq.Context.instance()``.
    first_sequence : int, default 0
        Sequence number of the first message. Receivers take a return to 0
        as a producer restart.
    send_timeout_ms : int, optional
        With ``"push"``, ``send`` blocks while the queue is full; with a
        timeout it raises ``zmq.Again`` instead. None waits forever.
    high_water_mark : int, optional
        Messages queued per peer before blocking (push) or dropping (pub);
        ZeroMQ's default is 1000.
    stamp_wall_clock : bool, default True
        Put the wall clock in each header's ``sent_utc_ns``.
    keep_last : int, default 0
        Keep this many sent messages for :meth:`resend`. A receiver that crashes
        loses what ZeroMQ had queued for it; after its restart, ask it which numbers
        it lacks (:func:`ask_sources`: per source the missing ranges and the highest
        number committed) and pass this source's entry to :meth:`resend`. The
        receiver refuses any duplicate. Keep at least the messages of the longest
        outage you want to repair.
    """

    def __init__(self, endpoint: str, source: str, *, time_scale: Scale | str = "UTC",
                 pattern: Literal["push", "pub"] = "push", topic: bytes = b"",
                 bind: bool = False, context: zmq.Context | None = None,
                 first_sequence: int = 0, send_timeout_ms: int | None = None,
                 high_water_mark: int | None = None, stamp_wall_clock: bool = True,
                 keep_last: int = 0):
        if pattern not in ("push", "pub"):
            raise InputError("pattern", pattern, "must be 'push' or 'pub'")
        if not is_source_name(source):
            raise InputError("source", source, "must be 1 to 64 of A-Z a-z 0-9 . _ -")
        if not isinstance(topic, bytes):
            raise InputError("topic", topic, "must be bytes")
        if topic and pattern != "pub":
            raise InputError("topic", topic, "only PUB sockets send a topic")
        if not is_integer(first_sequence) or not 0 <= first_sequence < SEQUENCE_LIMIT:
            raise InputError("first_sequence", first_sequence, "must be an integer >= 0")
        self.source = source
        self.time_scale = scale_name(time_scale)
        self.pattern = pattern
        self.topic = topic if pattern == "pub" else None
        self.stamp_wall_clock = stamp_wall_clock
        self._sequence = first_sequence
        if not is_integer(keep_last) or keep_last < 0:
            raise InputError("keep_last", keep_last, "must be an integer >= 0")
        self._kept: deque[tuple[int, list]] = deque(maxlen=keep_last or None)
        self._keep = keep_last > 0
        self._pending: deque[tuple[int, list]] = deque()
        context = context if context is not None else zmq.Context.instance()
        self._socket = context.socket(zmq.PUSH if pattern == "push" else zmq.PUB)
        try:
            if send_timeout_ms is not None:
                self._socket.setsockopt(zmq.SNDTIMEO, int(send_timeout_ms))
            if high_water_mark is not None:
                self._socket.setsockopt(zmq.SNDHWM, int(high_water_mark))
            if bind:
                self._socket.bind(endpoint)
            else:
                self._socket.connect(endpoint)
        except BaseException:
            self._socket.close(linger=0)
            raise

    @property
    def sequence(self) -> int:
        """Sequence number the next message will carry."""
        return self._sequence

    @property
    def last_endpoint(self) -> str:
        """The endpoint bound or connected last (shows the port chosen for ``:*``)."""
        return self._socket.getsockopt_string(zmq.LAST_ENDPOINT)

    @property
    def closed(self) -> bool:
        return self._socket.closed

    def send(self, *, event_id: Any, time_ns: Any, **optional_columns: Any) -> int:
        """Encode and send one batch.

        Parameters
        ----------
        event_id : array-like of int
            Event identifiers, >= 0.
        time_ns : array-like of signed int
            Arrival times, ns since 2000-01-01T12:00:00 in ``time_scale``.
        **optional_columns : array-like
            Any of ``energy_kev, ra_deg, dec_deg, score, weight,
            telescope_mask``; None values are left out.

        Returns
        -------
        int
            The sequence number sent. The counter advances only when ZeroMQ
            accepted the message: after ``zmq.Again`` the same number is used
            again.

        Raises
        ------
        InputError
            A column is invalid or the lengths differ (nothing is sent).
        zmq.Again
            The send timed out (``send_timeout_ms``).
        """
        columns = {"event_id": event_id, "time_ns": time_ns,
                   **{k: v for k, v in optional_columns.items() if v is not None}}
        sent = unix_to_ns(time.time()) if self.stamp_wall_clock else None
        frames = encode_message(self.source, self._sequence, self.time_scale, columns,
                                topic=self.topic, sent_utc_ns=sent)
        self._socket.send_multipart(frames, copy=False)
        sequence = self._sequence
        if self._keep:
            self._kept.append((sequence, frames))
        self._sequence += 1
        return sequence

    def resend_after(self, sequence: int | None) -> int:
        """Send again the kept messages numbered above ``sequence`` (all kept ones
        when None); returns how many. Resumable as :meth:`resend`."""
        return self.resend({"missing_ranges": [], "highest_sequence": sequence})

    def resend(self, report: Mapping[str, Any] | None = None) -> int:
        """Send again what the receiver lacks, from its report on this source.

        ``report`` is this source's entry of the service's ``sources`` answer (or of
        ``status.json``'s ``sources``): ``missing_ranges`` (inclusive ``[first,
        last]`` pairs) and ``highest_sequence``. Every kept message in a missing
        range or above the highest is sent again, in ascending order; an empty
        report (``{}``: a source the service never saw) resends every kept message.

        Resumable: when a send times out (``send_timeout_ms``) it stops there and
        the messages not yet sent stay pending (:attr:`resend_pending`);
        ``resend()`` without a report continues from there. A new report replaces
        the pending plan. Returns how many messages this call sent.

        Raises
        ------
        InputError
            Resending was not enabled, or a wanted message is no longer kept
            (``keep_last`` too small for the outage); nothing is sent then.
        """
        if not self._keep:
            raise InputError("keep_last", 0, "resending needs EventPublisher(keep_last=N)")
        if report is not None:
            self._pending = deque(self._plan(report))
        sent = 0
        while self._pending:
            try:
                self._socket.send_multipart(self._pending[0][1], copy=False)
            except zmq.Again:  # the place is kept: resend() continues from here
                break
            self._pending.popleft()
            sent += 1
        return sent

    @property
    def resend_pending(self) -> int:
        """Messages of an interrupted :meth:`resend` still to send."""
        return len(self._pending)

    def _plan(self, report: Mapping[str, Any]) -> list[tuple[int, list]]:
        """The kept messages ``report`` lacks, ascending; InputError when some are gone."""
        ranges, highest = _wanted(report)
        if highest is None:
            return list(self._kept)
        first_kept = self._kept[0][0] if self._kept else self._sequence
        lowest = min([first for first, _ in ranges] + [highest + 1])
        if lowest < min(first_kept, self._sequence):
            raise InputError("sequence", lowest, f"messages {lowest}..{first_kept - 1} are "
                             f"no longer kept (keep_last = {self._kept.maxlen})")
        return [(number, frames) for number, frames in self._kept
                if number > highest or any(a <= number <= b for a, b in ranges)]

    def close(self, linger_ms: int = 1000) -> None:
        """Close the socket, waiting up to ``linger_ms`` to deliver queued messages.

        The context is left alone. Closing twice is harmless.
        """
        if not self._socket.closed:
            self._socket.close(linger=linger_ms)

    def __enter__(self) -> EventPublisher:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()


def _wanted(report: Mapping[str, Any]) -> tuple[list[tuple[int, int]], int | None]:
    """Missing ranges and highest number of a service's report on one source."""
    if not isinstance(report, Mapping):
        raise InputError("report", report, "must be the service's entry for this source")
    if report.get("missing_ranges_complete") is False:
        raise InputError("missing_ranges_complete", False, "the report lists only some "
                         "missing ranges; ask the control socket (ask_sources) for all")
    highest = report.get("highest_sequence")
    if highest is None:
        return [], None
    if not is_integer(highest):
        raise InputError("highest_sequence", highest, "must be an integer or null")
    ranges = []
    for item in report.get("missing_ranges") or []:
        if (not isinstance(item, list | tuple) or len(item) != 2
                or not all(map(is_integer, item)) or item[0] > item[1]):
            raise InputError("missing_ranges", item, "must be [first, last] integers")
        ranges.append((int(item[0]), int(item[1])))
    return ranges, int(highest)


def ask_sources(control_endpoint: str, *, timeout_ms: int = 5000,
                context: zmq.Context | None = None,
                curve: tuple[bytes, bytes, bytes] | None = None) -> dict[str, dict]:
    """The service's report on every source, from its control socket (``sources``).

    Per source: ``committed_through`` (the last number below which nothing is
    missing), ``missing_ranges`` and ``highest_sequence``, all committed to its
    files. ``curve``: (server public key, client public key, client secret key)
    when the control socket uses CurveZMQ. Raises ``TimeoutError`` when no answer
    comes within ``timeout_ms``.
    """
    import json

    context = context if context is not None else zmq.Context.instance()
    with context.socket(zmq.REQ) as socket:
        socket.setsockopt(zmq.LINGER, 0)
        if curve is not None:
            socket.curve_serverkey, socket.curve_publickey, socket.curve_secretkey = curve
        socket.connect(control_endpoint)
        socket.send(b"sources")
        if not socket.poll(timeout_ms, zmq.POLLIN):
            raise TimeoutError(f"no answer from {control_endpoint} in {timeout_ms} ms")
        return json.loads(socket.recv())["sources"]
