"""The validating decoder: frames as received to a :class:`DecodedMessage`, or a refusal.

Theory of operation
-------------------
The decoder trusts no size and runs no code from the message. It checks, in order:
the frames (buffers, total size, count), the header (size, UTF-8 JSON without
duplicate keys or NaN, version, then the strict :class:`MessageHeader` model), the
body's IPC messages as pyarrow's ``MessageReader`` frames them (how many, their
types, no compression; :mod:`turnstamp.files.arrow_metadata` reads the one flag
pyarrow does not expose), no bytes after the end-of-stream marker, the first
record batch's row count against the limit and the header, the schema against
the column rules, a full validation of the batch, and last the conversion to the
core's dtypes.

The error boundary: only the decoder's own explicit checks, pyarrow's refusals of
the body (``pa.ArrowException``, and ``OSError``/``EOFError`` for IPC data cut
short), the JSON parser's and pydantic's become a :class:`~turnstamp.errors.WireError`
(the peer's fault). Anything else, a plain ``ValueError`` or ``TypeError`` included,
is a bug of ours and propagates.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import pyarrow as pa
import zmq
from pydantic import ValidationError

from ..core.batch import EventBatch
from ..core.timebase import Scale
from ..errors import ArrowMetadataError, RejectReason, WireError
from ..files.arrow_metadata import uses_compression
from .columns import check_schema, event_batch
from .message import (
    FORMAT_NAME,
    MAX_HEADER_BYTES,
    WIRE_VERSION,
    MessageContext,
    MessageHeader,
    is_integer,
    shown,
)

__all__ = ["DecodedMessage", "decode_message"]

MAX_IPC_MESSAGES = 1000
"""Most IPC messages (schema, dictionaries and batches) one body may hold."""

# pyarrow's refusals of IPC data: its own exceptions, OSError for a body cut short
# ("Expected to be able to read N bytes for message body"), EOFError from read_message.
_ARROW_REFUSALS = (pa.ArrowException, OSError, EOFError, ArrowMetadataError)
_READ_OPTIONS = pa.ipc.IpcReadOptions(ensure_alignment=pa.ipc.Alignment.DataTypeSpecific,
                                      use_threads=False)
_BATCH_TYPES = ("dictionary", "record batch")


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
        For every refusal, and for nothing else, whatever the frames hold. A bug
        of ours raises plainly (``ValueError``, ``TypeError``, ...), never this.
    """
    header_index = 1 if has_topic else 0
    views = [_as_view(frame, index) for index, frame in enumerate(frames)]
    message_bytes = sum(view.nbytes for view in views)
    _check_frames(views, header_index, message_bytes, max_message_bytes)
    context = MessageContext()
    header = _read_header(views[header_index], context)
    if header.events > max_events:
        raise context.refuse(RejectReason.OVERSIZED_MESSAGE,
                             f"header events = {header.events}, more than "
                             f"max_events = {max_events}")
    body = pa.py_buffer(views[header_index + 1])
    schema, record = _read_body(body, context)
    rows = 0 if record is None else record.num_rows
    if rows > max_events:
        raise context.refuse(RejectReason.OVERSIZED_MESSAGE,
                             f"body has {rows} rows, more than max_events = {max_events}")
    if rows != header.events:
        raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                             f"header events = {header.events} but the body has {rows} rows")
    context.received = rows  # the rows are in hand: a refusal from here counts them
    positions, notes = check_schema(schema, context)
    if record is not None:
        _validate(record, context)
    batch = event_batch(record, schema, positions, header.source, header.sequence,
                        Scale(header.time_scale), context)
    return DecodedMessage(header=header, batch=batch, notes=notes,
                          message_bytes=message_bytes,
                          topic=bytes(views[0]) if has_topic else None)


# ----------------------------------------------------------------------------------------
# frames


def _as_view(frame: Any, index: int) -> memoryview:
    if isinstance(frame, zmq.Frame):
        view = frame.buffer
    elif isinstance(frame, str):
        raise MessageContext().refuse(RejectReason.MALFORMED_MESSAGE,
                                      f"frame {index} is a str, not bytes")
    else:
        try:
            view = memoryview(frame)
        except TypeError:  # the object has no buffer: the peer's frame is not bytes
            raise MessageContext().refuse(
                RejectReason.MALFORMED_MESSAGE,
                f"frame {index} is a {type(frame).__name__}, not bytes") from None
    if view.ndim != 1 or view.format not in ("B", "b", "c"):
        if not view.c_contiguous:
            raise MessageContext().refuse(RejectReason.MALFORMED_MESSAGE,
                                          f"frame {index} is not a contiguous buffer")
        view = view.cast("B")
    return view


def _check_frames(views: list[memoryview], header_index: int, message_bytes: int,
                  max_message_bytes: int) -> None:
    if message_bytes > max_message_bytes:
        raise _peek_context(views, header_index).refuse(
            RejectReason.OVERSIZED_MESSAGE, f"message has {message_bytes} bytes, more than "
            f"max_message_bytes = {max_message_bytes}")
    expected = header_index + 2
    if len(views) != expected:
        layout = "topic, header, body" if header_index else "header, body"
        raise _peek_context(views, header_index).refuse(
            RejectReason.MALFORMED_MESSAGE,
            f"message has {len(views)} frames, expected {expected} ({layout})")


def _peek_context(views: list[memoryview], header_index: int) -> MessageContext:
    """What the header says, as far as it can be read, for refusing the whole message."""
    if header_index >= len(views):
        return MessageContext()
    try:
        return MessageContext.from_raw_header(_parse_header_json(views[header_index]))
    except WireError:
        return MessageContext()


# ----------------------------------------------------------------------------------------
# header


def _refuse_duplicate_keys(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    result: dict[str, Any] = {}
    for key, value in pairs:
        if key in result:
            raise MessageContext().refuse(RejectReason.MALFORMED_MESSAGE,
                                          f"header is not valid JSON: key {key!r} appears twice")
        result[key] = value
    return result


def _refuse_constant(name: str) -> Any:
    raise MessageContext().refuse(RejectReason.MALFORMED_MESSAGE,
                                  f"header is not valid JSON: {name} is not valid JSON")


def _parse_header_json(view: memoryview) -> dict[str, Any]:
    """The header frame as a dict; a ``malformed_message`` refusal otherwise."""
    refuse = MessageContext().refuse
    if view.nbytes > MAX_HEADER_BYTES:
        raise refuse(RejectReason.MALFORMED_MESSAGE,
                     f"header frame has {view.nbytes} bytes, more than {MAX_HEADER_BYTES}")
    try:
        text = bytes(view).decode("utf-8")
        value = json.loads(text, object_pairs_hook=_refuse_duplicate_keys,
                           parse_constant=_refuse_constant)
    except UnicodeDecodeError as exc:
        raise refuse(RejectReason.MALFORMED_MESSAGE,
                     f"header is not UTF-8 ({exc.reason} at byte {exc.start})") from None
    except RecursionError:
        raise refuse(RejectReason.MALFORMED_MESSAGE, "header JSON is nested too deeply") from None
    except json.JSONDecodeError as exc:
        raise refuse(RejectReason.MALFORMED_MESSAGE, f"header is not valid JSON: {exc}") from None
    if not isinstance(value, dict):
        raise refuse(RejectReason.MALFORMED_MESSAGE,
                     f"header is a JSON {type(value).__name__}, not an object")
    return value


def _validation_detail(exc: ValidationError) -> str:
    problems = []
    for item in exc.errors():
        where = ".".join(str(part) for part in item["loc"]) or "(header)"
        value = item.get("input")
        text = "{...}" if isinstance(value, dict) and item["loc"] else shown(value)
        if item["type"] == "missing":
            problems.append(f"header field {where!r} is missing")
        else:
            problems.append(f"header field {where!r} = {text}: {item['msg']}")
    return "; ".join(problems)


def _read_header(view: memoryview, context: MessageContext) -> MessageHeader:
    """The validated header; fills ``context`` with what it says, valid or not."""
    raw = _parse_header_json(view)
    found = MessageContext.from_raw_header(raw)
    context.source, context.sequence, context.events = found.source, found.sequence, found.events
    version = raw.get("version")
    if raw.get("format") == FORMAT_NAME and is_integer(version) and version != WIRE_VERSION:
        raise context.refuse(RejectReason.WRONG_VERSION,
                             f"header version = {shown(version)}; this decoder reads "
                             f"version {WIRE_VERSION}")
    try:
        return MessageHeader.model_validate(raw)
    except ValidationError as exc:
        raise context.refuse(RejectReason.MALFORMED_MESSAGE, _validation_detail(exc)) from None


# ----------------------------------------------------------------------------------------
# body


def _survey_body(body: pa.Buffer, context: MessageContext) -> int:
    """Count the record batches of the body without decoding any.

    Refuses runaway message counts, a body not starting with its one schema,
    message types other than dictionary and record batches, and compressed
    bodies (whose decompressed size only the sender vouches for), and bytes after
    the end-of-stream marker (which a reader would silently ignore).
    """
    batches = 0
    stream = pa.BufferReader(body)
    for count, message in enumerate(pa.ipc.MessageReader.open_stream(stream)):
        if count >= MAX_IPC_MESSAGES:
            raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                                 f"body has more than {MAX_IPC_MESSAGES} IPC messages")
        kind = message.type
        if (count == 0) != (kind == "schema"):
            raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                                 "body has a second Arrow schema message" if count else
                                 "body does not start with an Arrow schema message")
        if count and kind not in _BATCH_TYPES:
            raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                                 f"body has an Arrow IPC message of type {kind!r}; only "
                                 "schema, dictionary and record batches are allowed")
        # pyarrow cannot tell this before decompressing: see files.arrow_metadata
        if uses_compression(message):
            raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                                 "body uses Arrow IPC buffer compression, which this "
                                 "format does not allow; send it uncompressed")
        batches += kind == "record batch"
    _check_end(stream.tell(), body.size, context)
    return batches


def _check_end(end: int, size: int, context: MessageContext) -> None:
    """Refuse bytes after the body's end-of-stream marker."""
    if end != size:
        raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                             f"body has {size - end} bytes after the Arrow end-of-stream "
                             "marker")


def _read_body(body: pa.Buffer, context: MessageContext
               ) -> tuple[pa.Schema, pa.RecordBatch | None]:
    """The schema and the record batch (None without one), read but not validated.

    Reading an uncompressed batch only slices the body (buffers are copied at most
    to align them), so the row count can be checked before anything is allocated
    for it.
    """
    try:
        batches = _survey_body(body, context)
        if batches > 1:
            raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                                 f"body has {batches} record batches; the format allows one")
        reader = pa.ipc.open_stream(body, options=_READ_OPTIONS)
        record = reader.read_next_batch() if batches else None
        return reader.schema, record
    except _ARROW_REFUSALS as exc:
        raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                             f"body is not a valid Arrow IPC stream: {exc}") from None


def _validate(record: pa.RecordBatch, context: MessageContext) -> None:
    try:
        record.validate(full=True)
    except pa.ArrowException as exc:
        raise context.refuse(RejectReason.MALFORMED_MESSAGE,
                             f"body is not a valid Arrow IPC stream: {exc}") from None
