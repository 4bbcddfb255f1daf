"""The event stream on the wire: message format, decoder, producer helper, sequence tracking.

Event builders send batches of detected events to turnstamp over ZeroMQ. This
module defines that format (ours, version ``WIRE_VERSION``), decodes it at the
edge into an :class:`~turnstamp.core.batch.EventBatch`, helps producers send it
(:class:`EventPublisher`), and tracks each source's sequence numbers
(:class:`SequenceTracker`).

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
    :data:`turnstamp.io.schemas.EVENTS`:

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
    :attr:`DecodedMessage.notes`. Column order does not matter.

Decoding trusts no size and runs no code from the message (nothing is
unpickled). Every refusal raises :class:`WireError` with a
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
:class:`SequenceTracker` reports each gap.
"""

from __future__ import annotations

import json
import math
import re
import struct
import time
from collections import OrderedDict, deque
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from enum import StrEnum
from typing import Annotated, Any, Literal, TypeGuard

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import zmq
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from ..core.batch import MISSING_ID, MISSING_TIME, OPTIONAL_COLUMNS, EventBatch
from ..core.timebase import INPUT_SCALES, Scale, unix_to_ns
from ..errors import InputError, RejectReason
from .schemas import EVENTS

__all__ = [
    "FORMAT_NAME",
    "WIRE_VERSION",
    "MAX_HEADER_BYTES",
    "MessageHeader",
    "DecodedMessage",
    "WireError",
    "decode_message",
    "batch_from_record",
    "encode_message",
    "encode_batch",
    "EventPublisher",
    "SequenceKind",
    "SequenceStatus",
    "SequenceTracker",
]

FORMAT_NAME = "turnstamp.events"
"""Value of the header's ``format`` key."""

WIRE_VERSION = 1
"""Version of the message format written and read by this module."""

MAX_HEADER_BYTES = 4096
"""Largest header frame accepted; a valid header takes about 200 bytes."""

_MAX_IPC_MESSAGES = 1000  # schema, dictionaries and batches in one body
_MAX_DETAIL = 400  # characters of a refusal's detail
_SOURCE_PATTERN = r"^[A-Za-z0-9._-]+$"
_SOURCE_RE = re.compile(r"[A-Za-z0-9._-]{1,64}")
_INT63 = 2**63
_SCALE_NAMES = tuple(scale.value for scale in INPUT_SCALES)

_Int64 = Annotated[int, Field(ge=-_INT63, lt=_INT63)]


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
    sequence: int = Field(ge=0, lt=_INT63, description="message number from this source, "
                          "0 at the producer's start")
    time_scale: Literal["UTC", "TAI", "GPS", "TT"] = Field(
        description="scale of the body's time_ns column")
    events: int = Field(ge=0, lt=_INT63, description="rows in the body")
    sent_utc_ns: _Int64 | None = Field(
        default=None, description="producer's wall clock at sending, ns since "
        "2000-01-01T12:00:00 UTC labels (informational)")


@dataclass(frozen=True)
class DecodedMessage:
    """A message that passed every structural check.

    Attributes
    ----------
    header : MessageHeader
        The validated header.
    batch : EventBatch
        The columns, converted to the core's dtypes; read-only arrays.
    notes : list of str
        Things the decoder tolerated, e.g. unknown columns it ignored.
    message_bytes : int
        Total size of all frames, topic included.
    topic : bytes or None
        The topic frame (PUB/SUB), None without one.
    """

    header: MessageHeader
    batch: EventBatch
    notes: list[str]
    message_bytes: int
    topic: bytes | None


class WireError(InputError):
    """A message was refused as a whole.

    Parameters
    ----------
    reason : RejectReason
        Code for the rejects output.
    detail : str
        What was wrong, naming the field and the value.
    source, sequence : str or None, int or None
        From the header, as far as it could be read.
    events : int
        The header's event count when it could be read, else 0.
    """

    def __init__(self, reason: RejectReason, detail: str, source: str | None = None,
                 sequence: int | None = None, events: int = 0):
        self.reason = RejectReason(reason)
        self.detail = detail
        self.source = source
        self.sequence = sequence
        self.events = events
        where = f" (source {source!r}, sequence {sequence})" if source is not None else ""
        super().__init__("message", None if source is None else f"{source}#{sequence}", detail,
                         message=f"{self.reason.value}: {detail}{where}")

    def __reduce__(self):
        return (type(self), (self.reason, self.detail, self.source, self.sequence, self.events))


# ----------------------------------------------------------------------------------------
# decoding


@dataclass
class _Context:
    """What is known about the message so far, for the refusal."""

    source: str | None = None
    sequence: int | None = None
    events: int = 0

    def refuse(self, reason: RejectReason, detail: str) -> WireError:
        if len(detail) > _MAX_DETAIL:
            detail = detail[: _MAX_DETAIL - 3] + "..."
        return WireError(reason, detail, self.source, self.sequence, self.events)


def _clip(text: str, limit: int = 60) -> str:
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _shown(value: Any, limit: int = 60) -> str:
    return _clip(repr(value), limit)


def _is_int(value: Any) -> TypeGuard[int]:
    return isinstance(value, int) and not isinstance(value, bool)


def _as_view(frame: Any, index: int) -> memoryview:
    if isinstance(frame, zmq.Frame):
        view = frame.buffer
    else:
        if isinstance(frame, str):
            raise TypeError(f"frame {index} is a str, not bytes")
        try:
            view = memoryview(frame)
        except TypeError:
            raise TypeError(f"frame {index} is a {type(frame).__name__}, not bytes") from None
    if view.ndim != 1 or view.format not in ("B", "b", "c"):
        if not view.c_contiguous:
            raise TypeError(f"frame {index} is not a contiguous buffer")
        view = view.cast("B")
    return view


def _reject_pair_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    result: dict[str, Any] = {}
    for key, value in pairs:
        if key in result:
            raise ValueError(f"key {key!r} appears twice")
        result[key] = value
    return result


def _reject_constant(name: str) -> Any:
    raise ValueError(f"{name} is not valid JSON")


def _parse_header_json(view: memoryview) -> dict[str, Any]:
    """The header frame as a dict; ValueError with the problem otherwise."""
    if view.nbytes > MAX_HEADER_BYTES:
        raise ValueError(f"header frame has {view.nbytes} bytes, more than {MAX_HEADER_BYTES}")
    try:
        text = bytes(view).decode("utf-8")
        value = json.loads(text, object_pairs_hook=_reject_pair_duplicates,
                           parse_constant=_reject_constant)
    except UnicodeDecodeError as exc:
        raise ValueError(f"header is not UTF-8 ({exc.reason} at byte {exc.start})") from None
    except RecursionError:
        raise ValueError("header JSON is nested too deeply") from None
    except ValueError as exc:
        raise ValueError(f"header is not valid JSON: {exc}") from None
    if not isinstance(value, dict):
        raise ValueError(f"header is a JSON {type(value).__name__}, not an object")
    return value


def _context_from(raw: Any) -> _Context:
    """Source, sequence and event count from a header that may be invalid."""
    context = _Context()
    if not isinstance(raw, dict):
        return context
    source = raw.get("source")
    if isinstance(source, str) and _SOURCE_RE.fullmatch(source):
        context.source = source
    sequence = raw.get("sequence")
    if _is_int(sequence) and 0 <= sequence < _INT63:
        context.sequence = sequence
    events = raw.get("events")
    if _is_int(events) and 0 <= events < _INT63:
        context.events = events
    return context


def _peek_context(views: list[memoryview], header_index: int) -> _Context:
    if header_index >= len(views):
        return _Context()
    try:
        return _context_from(_parse_header_json(views[header_index]))
    except ValueError:
        return _Context()


def _validation_detail(exc: ValidationError) -> str:
    problems = []
    for item in exc.errors():
        where = ".".join(str(part) for part in item["loc"]) or "(header)"
        value = item.get("input")
        shown = "{...}" if isinstance(value, dict) and item["loc"] else _shown(value)
        if item["type"] == "missing":
            problems.append(f"header field {where!r} is missing")
        else:
            problems.append(f"header field {where!r} = {shown}: {item['msg']}")
    return "; ".join(problems)


def _read_header(view: memoryview, context: _Context) -> MessageHeader:
    try:
        raw = _parse_header_json(view)
    except ValueError as exc:
        raise context.refuse(RejectReason.MALFORMED_MESSAGE, str(exc)) from None
    found = _context_from(raw)
    context.source, context.sequence, context.events = found.source, found.sequence, found.events
    version = raw.get("version")
    if raw.get("format") == FORMAT_NAME and _is_int(version) and version != WIRE_VERSION:
        raise context.refuse(RejectReason.WRONG_VERSION,
                             f"header version = {_shown(version)}; this decoder reads "
                             f"version {WIRE_VERSION}")
    try:
        return MessageHeader.model_validate(raw)
    except ValidationError as exc:
        raise context.refuse(RejectReason.MALFORMED_MESSAGE, _validation_detail(exc)) from None


class _FlatError(ValueError):
    pass


class _Flat:
    """Just enough of a FlatBuffers reader to look into Arrow IPC message metadata."""

    def __init__(self, data: bytes):
        self.data = data

    def _get(self, fmt: str, pos: int) -> int:
        size = struct.calcsize(fmt)
        if pos < 0 or pos + size > len(self.data):
            raise _FlatError("metadata offset out of range")
        return struct.unpack_from(fmt, self.data, pos)[0]

    def root(self) -> int:
        return self._get("<I", 0)

    def field(self, table: int, index: int) -> int | None:
        """Position of field ``index`` of the table at ``table``, None when absent."""
        vtable = table - self._get("<i", table)
        size = self._get("<H", vtable)
        slot = 4 + 2 * index
        if slot + 2 > size:
            return None
        offset = self._get("<H", vtable + slot)
        return table + offset if offset else None

    def target(self, position: int) -> int:
        return position + self._get("<I", position)

    def u8(self, position: int) -> int:
        return self._get("<B", position)

    def i64(self, position: int) -> int:
        return self._get("<q", position)


# Arrow's Message.fbs: Message{version, header_type, header, bodyLength, custom_metadata};
# MessageHeader union: 1 Schema, 2 DictionaryBatch, 3 RecordBatch; RecordBatch{length,
# nodes, buffers, compression, ...}; DictionaryBatch{id, data: RecordBatch, isDelta}.
_SCHEMA, _DICTIONARY_BATCH, _RECORD_BATCH = 1, 2, 3


def _survey_body(body: pa.Buffer, context: _Context) -> tuple[int, int]:
    """Look at the IPC messages without decoding them.

    Returns the number of record batches and the rows of the first one (0 when
    there is none); refuses compressed bodies (whose decompressed size only the
    sender vouches for), unknown message kinds and runaway message counts.
    """
    batches = rows = 0
    try:
        reader = pa.ipc.MessageReader.open_stream(body)
        for count, message in enumerate(reader):
            if count >= _MAX_IPC_MESSAGES:
                raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                                     f"body has more than {_MAX_IPC_MESSAGES} IPC messages")
            flat = _Flat(bytes(message.metadata))
            root = flat.root()
            where = flat.field(root, 1)
            kind = flat.u8(where) if where is not None else 0
            if count == 0 and kind != _SCHEMA:
                raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                                     "body does not start with an Arrow schema message")
            if kind == _SCHEMA:
                if count != 0:
                    raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                                         "body has a second Arrow schema message")
                continue
            if kind not in (_DICTIONARY_BATCH, _RECORD_BATCH):
                raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                                     f"body has an Arrow IPC message of kind {kind}; only "
                                     "schema, dictionary and record batches are allowed")
            header_at = flat.field(root, 2)
            if header_at is None:
                raise _FlatError("message without header")
            table = flat.target(header_at)
            if kind == _DICTIONARY_BATCH:
                data_at = flat.field(table, 1)
                if data_at is None:
                    raise _FlatError("dictionary batch without data")
                table = flat.target(data_at)
            if flat.field(table, 3) is not None:
                raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                                     "body uses Arrow IPC buffer compression, which this "
                                     "format does not allow; send it uncompressed")
            if kind == _RECORD_BATCH:
                batches += 1
                if batches == 1:
                    length_at = flat.field(table, 0)
                    rows = flat.i64(length_at) if length_at is not None else 0
    except WireError:
        raise
    except (pa.ArrowException, ValueError, OSError, EOFError) as exc:
        raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                             f"body is not a valid Arrow IPC stream: {exc}") from None
    return batches, rows


# name: (numpy dtype, Arrow type, value for nulls, accepted kinds, what is accepted)
_FLOAT_RULE = (np.float64, pa.float64(), math.nan, ("int", "uint", "float"),
               "a floating-point or integer column")
_RULES: dict[str, tuple[Any, pa.DataType, Any, tuple[str, ...], str]] = {
    "event_id": (np.uint64, pa.uint64(), MISSING_ID, ("int", "uint"),
                 "an integer column with values >= 0"),
    "time_ns": (np.int64, pa.int64(), MISSING_TIME, ("int",),
                "an integer column of ns (signed, int8 to int64)"),
    **{name: _FLOAT_RULE for name, (dtype, _) in OPTIONAL_COLUMNS.items()
       if np.dtype(dtype).kind == "f"},
    "telescope_mask": (np.uint64, pa.uint64(), 0, ("int", "uint"),
                       "an integer column with values >= 0"),
}
assert set(_RULES) == {"event_id", "time_ns", *OPTIONAL_COLUMNS}
assert set(_RULES) == set(EVENTS.names)


def _kind(kind: pa.DataType) -> str:
    if pa.types.is_null(kind):
        return "null"
    if pa.types.is_signed_integer(kind):
        return "int"
    if pa.types.is_unsigned_integer(kind):
        return "uint"
    if pa.types.is_floating(kind):
        return "float"
    return "other"


def _check_schema(schema: pa.Schema, context: _Context) -> tuple[dict[str, int], list[str]]:
    """Index of each known column, and notes about the unknown ones."""
    positions: dict[str, int] = {}
    notes: list[str] = []
    for index, field in enumerate(schema):
        rule = _RULES.get(field.name)
        if rule is None:
            notes.append(f"column {_shown(field.name)} ({_clip(str(field.type))}) is not part of "
                         f"format version {WIRE_VERSION} and was ignored")
            continue
        if field.name in positions:
            raise context.refuse(RejectReason.BAD_SCHEMA, f"column {field.name!r} appears twice")
        accepted = rule[3]
        kind = _kind(field.type)
        if kind != "null" and kind not in accepted:
            raise context.refuse(RejectReason.BAD_SCHEMA,
                                 f"{field.name} must be {rule[4]}, got {_clip(str(field.type))}")
        positions[field.name] = index
    for name in ("event_id", "time_ns"):
        if name not in positions:
            raise context.refuse(RejectReason.BAD_SCHEMA,
                                 f"required column {name!r} is missing; columns: "
                                 f"{_shown(schema.names, 200)}")
    if ("ra_deg" in positions) != ("dec_deg" in positions):
        present, absent = ("ra_deg", "dec_deg") if "ra_deg" in positions else ("dec_deg",
                                                                                "ra_deg")
        raise context.refuse(RejectReason.BAD_SCHEMA,
                             f"column {present!r} without {absent!r}; the two come together")
    return positions, notes


def _to_numpy(name: str, column: pa.Array, context: _Context) -> np.ndarray:
    """One column in the core's dtype: a read-only view when possible."""
    dtype, target, fill, _, _ = _RULES[name]
    kind = _kind(column.type)
    if kind == "null":
        result = np.full(len(column), fill, dtype)
        result.flags.writeable = False
        return result
    if kind == "int" and target == pa.uint64():
        low = pc.min(column).as_py()
        if low is not None and low < 0:
            values = column.fill_null(0).to_numpy(zero_copy_only=False)
            row = int(np.flatnonzero(values < 0)[0])
            raise context.refuse(RejectReason.BAD_SCHEMA,
                                 f"{name} must be >= 0 to fit uint64, got {int(values[row])} "
                                 f"in row {row} ({column.type} column)")
    if column.type != target:
        # Integers to float64 round beyond 2**53, deliberately; every other cast is exact.
        rounding = kind in ("int", "uint") and target == pa.float64()
        column = pc.cast(column, target, safe=not rounding)
    if column.null_count:
        column = column.fill_null(pa.scalar(fill, target))
    return column.to_numpy(zero_copy_only=True)


def decode_message(frames: Sequence[bytes | zmq.Frame | memoryview], *, has_topic: bool,
                   max_message_bytes: int, max_events: int) -> DecodedMessage:
    """Validate and decode one multipart message.

    Parameters
    ----------
    frames : sequence of bytes, zmq.Frame or memoryview
        The frames as received (``recv_multipart(copy=False)`` avoids a copy).
        The decoded columns may be views of the body frame: do not modify or
        reuse its buffer afterwards.
    has_topic : bool
        True for PUB/SUB (first frame is the topic), False for PUSH/PULL.
    max_message_bytes : int
        Largest accepted total size of all frames.
    max_events : int
        Largest accepted number of rows.

    Returns
    -------
    DecodedMessage

    Raises
    ------
    WireError
        For every refusal, and for nothing else, whatever the frames hold.
    """
    context = _Context()
    header_index = 1 if has_topic else 0
    try:
        views = [_as_view(frame, index) for index, frame in enumerate(frames)]
    except TypeError as exc:
        raise context.refuse(RejectReason.MALFORMED_MESSAGE, str(exc)) from None
    message_bytes = sum(view.nbytes for view in views)
    if message_bytes > max_message_bytes:
        context = _peek_context(views, header_index)
        raise context.refuse(RejectReason.OVERSIZED_MESSAGE,
                             f"message has {message_bytes} bytes, more than "
                             f"max_message_bytes = {max_message_bytes}")
    expected = header_index + 2
    if len(views) != expected:
        context = _peek_context(views, header_index)
        layout = "topic, header, body" if has_topic else "header, body"
        raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                             f"message has {len(views)} frames, expected {expected} ({layout})")
    topic = bytes(views[0]) if has_topic else None
    header = _read_header(views[header_index], context)
    if header.events > max_events:
        raise context.refuse(RejectReason.OVERSIZED_MESSAGE,
                             f"header events = {header.events}, more than "
                             f"max_events = {max_events}")

    body = pa.py_buffer(views[header_index + 1])
    batches, rows = _survey_body(body, context)
    if batches > 1:
        raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                             f"body has {batches} record batches; the format allows one")
    if rows > max_events:
        raise context.refuse(RejectReason.OVERSIZED_MESSAGE,
                             f"body has {rows} rows, more than max_events = {max_events}")
    if rows != header.events:
        raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                             f"header events = {header.events} but the body has {rows} rows")
    try:
        options = pa.ipc.IpcReadOptions(ensure_alignment=pa.ipc.Alignment.DataTypeSpecific,
                                        use_threads=False)
        reader = pa.ipc.open_stream(body, options=options)
        schema = reader.schema
        positions, notes = _check_schema(schema, context)
        try:
            record = reader.read_next_batch()
        except StopIteration:
            record = None
        if record is not None:
            record.validate(full=True)
    except WireError:
        raise
    except (pa.ArrowException, ValueError, OSError, EOFError) as exc:
        raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                             f"body is not a valid Arrow IPC stream: {exc}") from None
    if record is not None and record.num_rows != header.events:  # the survey saw the same
        raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                             f"header events = {header.events} but the body has "
                             f"{record.num_rows} rows")

    batch = _batch(record, schema, positions, header.source, header.sequence,
                   Scale(header.time_scale), context)
    return DecodedMessage(header=header, batch=batch, notes=notes,
                          message_bytes=message_bytes, topic=topic)


def _batch(record, schema, positions, source, sequence, time_scale, context) -> EventBatch:
    columns = {}
    for name, index in positions.items():
        column = (record.column(index) if record is not None
                  else pa.array([], type=schema.field(index).type))
        columns[name] = _to_numpy(name, column, context)
    return EventBatch(source=source, sequence=sequence, time_scale=time_scale, **columns)


def batch_from_record(record: pa.RecordBatch, *, source: str, sequence: int,
                      time_scale: Scale | str) -> tuple[EventBatch, list[str]]:
    """An ``EventBatch`` from an Arrow record batch with the wire format's columns
    (used for event files: the same types, casts and null rules as messages).

    Raises
    ------
    WireError
        ``bad_schema`` naming the column when a column is missing or mistyped.
    """
    context = _Context(source=source, sequence=sequence, events=record.num_rows)
    positions, notes = _check_schema(record.schema, context)
    batch = _batch(record, record.schema, positions, source, sequence,
                   Scale(_scale_name(time_scale)), context)
    return batch, notes


# ----------------------------------------------------------------------------------------
# encoding


def _scale_name(time_scale: Scale | str) -> str:
    name = time_scale.value if isinstance(time_scale, Scale) else str(time_scale)
    if name not in _SCALE_NAMES:
        raise InputError("time_scale", time_scale, f"must be one of {', '.join(_SCALE_NAMES)}")
    return name


def _encode_column(name: str, values: Any) -> np.ndarray:
    array = np.asarray(values)
    if array.ndim != 1:
        raise InputError(name, f"array of shape {array.shape}", "must be one-dimensional")
    kind = array.dtype.kind
    dtype, _, _, accepted, what = _RULES[name]
    if array.size == 0:  # np.asarray([]) is float64: any empty column will do
        return np.empty(0, dtype)
    numpy_kinds = {"int": "i", "uint": "u", "float": "f"}
    if kind not in {numpy_kinds[k] for k in accepted}:
        raise InputError(name, f"array of {array.dtype}", f"must be {what}")
    if np.dtype(dtype).kind == "u" and kind == "i" and len(array) and array.min() < 0:
        row = int(np.flatnonzero(array < 0)[0])
        raise InputError(name, int(array[row]), f"must be >= 0 (row {row})")
    return np.ascontiguousarray(array, dtype=dtype)


def encode_message(source: str, sequence: int, time_scale: Scale | str,
                   columns: Mapping[str, Any], topic: bytes | None = None,
                   sent_utc_ns: int | None = None) -> list[bytes]:
    """The frames of one message.

    Parameters
    ----------
    source : str
        The event builder's identifier (1 to 64 of ``A-Z a-z 0-9 . _ -``).
    sequence : int
        This message's number from ``source``.
    time_scale : Scale or str
        Scale of ``time_ns``: UTC, TAI, GPS or TT.
    columns : mapping of str to array-like
        ``event_id`` and ``time_ns`` (integers), and any optional columns
        (:data:`turnstamp.core.batch.OPTIONAL_COLUMNS`), all one-dimensional and
        of equal length. Converted to the wire types: uint64, int64, float64.
    topic : bytes, optional
        Prepend a topic frame (PUB/SUB); None for PUSH/PULL.
    sent_utc_ns : int, optional
        The producer's wall clock, ns since 2000-01-01T12:00:00 UTC labels.

    Returns
    -------
    list of bytes
        ``[topic,] header, body``.

    Raises
    ------
    InputError
        A header value or a column is invalid (the message names it).
    """
    columns = {name: values for name, values in columns.items() if values is not None}
    unknown = sorted(set(columns) - set(_RULES))
    if unknown:
        raise InputError("columns", unknown, f"unknown column(s); known: {', '.join(_RULES)}")
    for name in ("event_id", "time_ns"):
        if name not in columns:
            raise InputError("columns", sorted(columns), f"required column {name!r} is missing")
    if ("ra_deg" in columns) != ("dec_deg" in columns):
        raise InputError("columns", sorted(columns), "ra_deg and dec_deg come together")
    arrays = {name: _encode_column(name, columns[name]) for name in EVENTS.names
              if name in columns}
    lengths = {name: len(array) for name, array in arrays.items()}
    if len(set(lengths.values())) > 1:
        raise InputError("columns", lengths, "all columns must have the same length")
    rows = lengths["event_id"]
    if topic is not None and not isinstance(topic, bytes):
        raise InputError("topic", topic, "must be bytes")
    try:
        header = MessageHeader.model_validate({
            "format": FORMAT_NAME, "version": WIRE_VERSION, "source": source,
            "sequence": sequence, "time_scale": _scale_name(time_scale), "events": rows,
            "sent_utc_ns": sent_utc_ns})
    except ValidationError as exc:
        first = exc.errors()[0]
        field = ".".join(str(part) for part in first["loc"])
        raise InputError(field, first.get("input"), first["msg"]) from None
    schema = pa.schema([EVENTS.field(name) for name in arrays], metadata=EVENTS.metadata)
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, schema) as writer:
        if rows:
            writer.write_batch(pa.record_batch(list(arrays.values()), schema=schema))
    header_bytes = json.dumps(header.model_dump(exclude_none=True),
                              separators=(",", ":")).encode("utf-8")
    frames = [header_bytes, sink.getvalue().to_pybytes()]
    return frames if topic is None else [topic, *frames]


def encode_batch(batch: EventBatch, topic: bytes | None = None,
                 sent_utc_ns: int | None = None) -> list[bytes]:
    """The frames of a message carrying ``batch`` (see :func:`encode_message`).

    Sentinel values travel as values: a decoder maps them back to the same
    sentinels.
    """
    return encode_message(batch.source, batch.sequence, batch.time_scale, batch.columns(),
                          topic=topic, sent_utc_ns=sent_utc_ns)


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
        Keep this many sent messages for :meth:`resend_after`. A receiver that
        crashes loses what ZeroMQ had queued for it; after its restart, ask it for
        the last sequence it committed (``turnstamp`` reports it per source in its
        status) and resend the rest. The receiver refuses any duplicate.
    """

    def __init__(self, endpoint: str, source: str, *, time_scale: Scale | str = "UTC",
                 pattern: Literal["push", "pub"] = "push", topic: bytes = b"",
                 bind: bool = False, context: zmq.Context | None = None,
                 first_sequence: int = 0, send_timeout_ms: int | None = None,
                 high_water_mark: int | None = None, stamp_wall_clock: bool = True,
                 keep_last: int = 0):
        if pattern not in ("push", "pub"):
            raise InputError("pattern", pattern, "must be 'push' or 'pub'")
        if not isinstance(source, str) or not _SOURCE_RE.fullmatch(source):
            raise InputError("source", source, "must be 1 to 64 of A-Z a-z 0-9 . _ -")
        if not isinstance(topic, bytes):
            raise InputError("topic", topic, "must be bytes")
        if topic and pattern != "pub":
            raise InputError("topic", topic, "only PUB sockets send a topic")
        if not _is_int(first_sequence) or not 0 <= first_sequence < _INT63:
            raise InputError("first_sequence", first_sequence, "must be an integer >= 0")
        self.source = source
        self.time_scale = _scale_name(time_scale)
        self.pattern = pattern
        self.topic = topic if pattern == "pub" else None
        self.stamp_wall_clock = stamp_wall_clock
        self._sequence = first_sequence
        if not _is_int(keep_last) or keep_last < 0:
            raise InputError("keep_last", keep_last, "must be an integer >= 0")
        self._kept: deque[tuple[int, list]] = deque(maxlen=keep_last or None)
        self._keep = keep_last > 0
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
        when None); returns how many. Raises ``InputError`` when some of them are no
        longer kept (``keep_last`` too small for the outage)."""
        if not self._keep:
            raise InputError("keep_last", 0, "resending needs EventPublisher(keep_last=N)")
        first_kept = self._kept[0][0] if self._kept else self._sequence
        wanted = 0 if sequence is None else sequence + 1
        if self._kept and wanted < first_kept:
            raise InputError("sequence", sequence, f"messages {wanted}..{first_kept - 1} are "
                             f"no longer kept (keep_last = {self._kept.maxlen})")
        resent = 0
        for number, frames in list(self._kept):
            if number >= wanted:
                self._socket.send_multipart(frames, copy=False)
                resent += 1
        return resent

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


# ----------------------------------------------------------------------------------------
# sequence tracking


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
    """0 after a higher number: the producer restarted; its state is reset."""


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
    """

    def __init__(self, window: int = 100_000, max_sources: int = 10_000):
        if not _is_int(window) or window < 1:
            raise InputError("window", window, "must be an integer >= 1")
        if not _is_int(max_sources) or max_sources < 1:
            raise InputError("max_sources", max_sources, "must be an integer >= 1")
        self.window = window
        self.max_sources = max_sources
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
        if not _is_int(sequence) or not 0 <= sequence < _INT63:
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
        if sequence > highest:
            step = sequence - highest
            if step <= self.window:
                state.missing = ((state.missing << step) | ((1 << (step - 1)) - 1)) & self._mask
            else:
                state.missing = self._mask
            state.highest = sequence
            after = state.missing.bit_count()
            kind = SequenceKind.NEXT if step == 1 else SequenceKind.GAP
            return SequenceStatus(kind, source, sequence, expected, missing=step - 1,
                                  outstanding=after, forgotten=before + step - 1 - after)
        if sequence == 0 and highest > 0:
            self._sources[source] = _Source(highest=0)
            return SequenceStatus(SequenceKind.RESTART, source, sequence, expected,
                                  forgotten=before)
        index = highest - 1 - sequence
        if 0 <= index < self.window and state.missing >> index & 1:
            state.missing &= ~(1 << index)
            return SequenceStatus(SequenceKind.LATE, source, sequence, expected,
                                  outstanding=before - 1)
        return SequenceStatus(SequenceKind.DUPLICATE, source, sequence, expected,
                              outstanding=before)

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

    def forget(self, source: str) -> None:
        """Drop a source's state (its next message counts as its first)."""
        self._sources.pop(source, None)

    def to_state(self) -> dict[str, Any]:
        """A JSON-serialisable checkpoint (sources in least-recently-seen order)."""
        return {
            "format": "turnstamp.sequence-state",
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
        def bad(field: str, value: Any, problem: str) -> InputError:
            return InputError(f"sequence state {field}", _shown(value), problem)

        if not isinstance(state, Mapping) or state.get("format") != "turnstamp.sequence-state":
            raise bad("format", state.get("format") if isinstance(state, Mapping) else state,
                      "not a turnstamp sequence-state checkpoint")
        if state.get("version") != 1:
            raise bad("version", state.get("version"), "only version 1 is known")
        for key in ("window", "max_sources", "evicted"):
            if not _is_int(state.get(key)) or state[key] < 0:
                raise bad(key, state.get(key), "must be an integer >= 0")
        tracker = cls(window=window if window is not None else state["window"],
                      max_sources=max_sources if max_sources is not None
                      else state["max_sources"])
        tracker.evicted = state["evicted"]
        sources = state.get("sources")
        if not isinstance(sources, list):
            raise bad("sources", sources, "must be a list")
        for entry in sources:
            if not isinstance(entry, Mapping) or not isinstance(entry.get("source"), str):
                raise bad("sources", entry, "each entry needs a 'source' string")
            name, highest, ranges = entry["source"], entry.get("highest"), entry.get("missing")
            if not _is_int(highest) or not 0 <= highest < _INT63:
                raise bad(f"{name}.highest", highest, "must be an integer in [0, 2**63)")
            if not isinstance(ranges, list):
                raise bad(f"{name}.missing", ranges, "must be a list of [first, last]")
            bits = 0
            for item in ranges:
                if (not isinstance(item, list) or len(item) != 2 or not all(map(_is_int, item))
                        or not 0 <= item[0] <= item[1] < highest):
                    raise bad(f"{name}.missing", item, "must be [first, last] with "
                              "0 <= first <= last < highest")
                first = max(item[0], highest - tracker.window)
                if first > item[1]:
                    continue
                low, high = highest - 1 - item[1], highest - 1 - first
                bits |= ((1 << (high - low + 1)) - 1) << low
            if name in tracker._sources:
                raise bad("sources", name, "appears twice")
            tracker._sources[name] = _Source(highest=highest, missing=bits)
        while len(tracker._sources) > tracker.max_sources:
            tracker._sources.popitem(last=False)
            tracker.evicted += 1
        return tracker
