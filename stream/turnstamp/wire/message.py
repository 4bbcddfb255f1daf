"""The event stream on the wire: the message format, its header, and how refusals are worded.

Event builders send batches of detected events to turnstamp over ZeroMQ. This
module specifies that format (ours, version ``WIRE_VERSION``);
:mod:`~turnstamp.wire.encode` writes it, :mod:`~turnstamp.wire.decode` checks and
decodes it at the edge into an :class:`~turnstamp.core.batch.EventBatch`,
:mod:`~turnstamp.wire.publisher` helps producers send it (and says when to choose
PUSH/PULL or PUB/SUB), and :mod:`~turnstamp.wire.sequence` tracks each source's
sequence numbers.

Message format, version 1
-------------------------
One message is one ZeroMQ multipart message of two or three frames:

``[topic]``
    Only with the PUB/SUB pattern: the subscription topic (any bytes, may be
    empty). PUSH/PULL messages have no topic frame. The receiver knows which
    pattern it uses and tells the decoder (``has_topic``).
``header``
    A UTF-8 JSON object of at most ``MAX_HEADER_BYTES`` bytes, with exactly
    these keys (no others; no key twice; no NaN or Infinity):

    ============== ======================================== ==================
    key            value                                    required
    ============== ======================================== ==================
    ``format``     ``"turnstamp.events"``                    yes
    ``version``    integer, ``1``                           yes
    ``source``     1 to 64 of ``A-Z a-z 0-9 . _ -``         yes
    ``sequence``   integer, 0 <= sequence < 2**63           yes
    ``time_scale`` ``"UTC"``, ``"TAI"``, ``"GPS"`` or ``"TT"`` yes
    ``events``     integer >= 0, rows in the body           yes
    ``sent_utc_ns`` integer or null: the producer's wall   no
                   clock, ns since 2000-01-01T12:00:00 UTC
                   (labels); informational only
    ============== ======================================== ==================

    ``sequence`` counts the source's messages: 0, 1, 2, ... from the producer's
    start. A producer that restarts begins again at 0.
``body``
    One Arrow IPC *stream* (schema message, then exactly one record batch, or
    no record batch when ``events`` is 0), uncompressed, whose columns follow
    :data:`turnstamp.files.schemas.EVENTS`:

    ================== ========== ============================================
    column             required   accepted Arrow types (decoded as)
    ================== ========== ============================================
    ``event_id``       yes        any integer type, values >= 0 (uint64)
    ``time_ns``        yes        signed integer types: int8 to int64 (int64),
                                  ns since 2000-01-01T12:00:00 in the header's
                                  ``time_scale``; never floating point
    ``energy_kev``     no         float16/32/64 or any integer type (float64)
    ``ra_deg``         no         as ``energy_kev``; only together with
                                  ``dec_deg``
    ``dec_deg``        no         as ``energy_kev``; only together with
                                  ``ra_deg``
    ``score``          no         as ``energy_kev``
    ``weight``         no         as ``energy_kev``
    ``telescope_mask`` no         any integer type, values >= 0 (uint64)
    ================== ========== ============================================

    Any column may also have the Arrow ``null`` type (all values missing).
    Nulls become the sentinels of :mod:`turnstamp.core.batch`: ``MISSING_ID``
    in ``event_id``, ``MISSING_TIME`` in ``time_ns``, NaN in float columns and
    0 in ``telescope_mask``; the core refuses such events one by one. Columns
    not named here are ignored (a later version may add some) and listed in
    :attr:`~turnstamp.wire.decode.DecodedMessage.notes`. Column order does not matter.

Decoding trusts no size and runs no code from the message (nothing is
unpickled). Every refusal raises :class:`~turnstamp.errors.WireError` with a
:class:`~turnstamp.errors.RejectReason`:

* ``oversized_message``: the frames add up to more than ``max_message_bytes``,
  or the header or the body announce more than ``max_events`` rows;
* ``malformed_message``: wrong number of frames, a header that is not JSON or
  fails validation, a body that is not one uncompressed Arrow IPC stream with
  at most one record batch, or a row count that differs from ``events``;
* ``wrong_version``: a header of this format with another ``version``;
* ``bad_schema``: a required column missing or repeated, a column of a type
  the table above does not accept, ``ra_deg`` without ``dec_deg`` (or the
  reverse), a negative value in an unsigned column (``event_id``,
  ``telescope_mask``).

Where possible the decoded columns are views of the body frame (no copy); every
decoded column is read-only.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Annotated, Any, Literal, TypeGuard

from pydantic import BaseModel, ConfigDict, Field

from ..errors import RejectReason, WireError

__all__ = [
    "FORMAT_NAME",
    "WIRE_VERSION",
    "MAX_HEADER_BYTES",
    "SEQUENCE_LIMIT",
    "MessageHeader",
    "MessageContext",
    "is_integer",
    "is_source_name",
    "shown",
    "clipped",
]

FORMAT_NAME = "turnstamp.events"
"""Value of the header's ``format`` key."""

WIRE_VERSION = 1
"""Version of the message format written and read by this package."""

MAX_HEADER_BYTES = 4096
"""Largest header frame accepted; a valid header takes about 200 bytes."""

SEQUENCE_LIMIT = 2**63
"""Sequence numbers and event counts are integers in ``[0, SEQUENCE_LIMIT)``."""

_MAX_DETAIL = 400  # characters of a refusal's detail
_SOURCE_PATTERN = r"^[A-Za-z0-9._-]+$"
_SOURCE_RE = re.compile(r"[A-Za-z0-9._-]{1,64}")

_Int64 = Annotated[int, Field(ge=-SEQUENCE_LIMIT, lt=SEQUENCE_LIMIT)]


class MessageHeader(BaseModel):
    """The header frame of a message (see the module docstring).

    Validation is strict: integers must be JSON integers (not ``1.0``, not
    ``"1"``, not ``true``), and no other key is allowed.
    """

    model_config = ConfigDict(frozen=True, extra="forbid", strict=True)

    format: Literal["turnstamp.events"] = Field(description="always 'turnstamp.events'")
    version: int = Field(description="format version; this decoder reads 1")
    source: str = Field(min_length=1, max_length=64, pattern=_SOURCE_PATTERN,
                        description="the event builder's identifier")
    sequence: int = Field(ge=0, lt=SEQUENCE_LIMIT, description="message number from this "
                          "source, 0 at the producer's start")
    time_scale: Literal["UTC", "TAI", "GPS", "TT"] = Field(
        description="scale of the body's time_ns column")
    events: int = Field(ge=0, lt=SEQUENCE_LIMIT, description="rows in the body")
    sent_utc_ns: _Int64 | None = Field(
        default=None, description="producer's wall clock at sending, ns since "
        "2000-01-01T12:00:00 UTC labels (informational)")


@dataclass
class MessageContext:
    """What is known about a message so far, to say in its refusal.

    Attributes
    ----------
    source : str or None
        The header's source, once read and well formed.
    sequence : int or None
        The header's sequence number, once read and in range.
    events : int
        The header's event count, 0 until read (a claim, never counted as such).
    received : int
        Events actually in hand: the body's rows once read and equal to the
        header's count, else 0. What a refusal counts as received.
    """

    source: str | None = None
    sequence: int | None = None
    events: int = 0
    received: int = 0

    def refuse(self, reason: RejectReason, detail: str) -> WireError:
        """The refusal of this message (to raise), its detail cut to a readable length."""
        if len(detail) > _MAX_DETAIL:
            detail = detail[: _MAX_DETAIL - 3] + "..."
        return WireError(reason, detail, self.source, self.sequence, self.events,
                         received=self.received)

    @classmethod
    def from_raw_header(cls, raw: Any) -> MessageContext:
        """Source, sequence and event count from a parsed header that may be invalid."""
        context = cls()
        if not isinstance(raw, dict):
            return context
        source = raw.get("source")
        if is_source_name(source):
            context.source = source
        sequence = raw.get("sequence")
        if is_integer(sequence) and 0 <= sequence < SEQUENCE_LIMIT:
            context.sequence = sequence
        events = raw.get("events")
        if is_integer(events) and 0 <= events < SEQUENCE_LIMIT:
            context.events = events
        return context


def is_integer(value: Any) -> TypeGuard[int]:
    """True for a Python (or JSON) integer, False for ``bool`` and everything else."""
    return isinstance(value, int) and not isinstance(value, bool)


def is_source_name(value: Any) -> TypeGuard[str]:
    """True for a valid ``source``: 1 to 64 of ``A-Z a-z 0-9 . _ -``."""
    return isinstance(value, str) and _SOURCE_RE.fullmatch(value) is not None


def clipped(text: str, limit: int = 60) -> str:
    """``text`` cut to ``limit`` characters (ending in ``...`` when cut)."""
    return text if len(text) <= limit else text[: limit - 3] + "..."


def shown(value: Any, limit: int = 60) -> str:
    """``repr(value)`` cut to ``limit`` characters, for a refusal's detail."""
    return clipped(repr(value), limit)
