"""Writing the wire format: the frames of a message from columns or an ``EventBatch``.

Every value is checked before anything is built, and a bad one raises
:class:`~turnstamp.errors.InputError` naming it: the producer's mistake is its own,
not a message the receiver has to refuse.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from typing import Any

import numpy as np
import pyarrow as pa
from pydantic import ValidationError

from ..core.batch import EventBatch
from ..core.timebase import INPUT_SCALES, Scale
from ..errors import InputError
from ..files.schemas import EVENTS
from .columns import COLUMN_RULES
from .message import FORMAT_NAME, WIRE_VERSION, MessageHeader

__all__ = ["encode_message", "encode_batch", "scale_name"]

_SCALE_NAMES = tuple(scale.value for scale in INPUT_SCALES)
_NUMPY_KINDS = {"int": "i", "uint": "u", "float": "f"}


def scale_name(time_scale: Scale | str) -> str:
    """The name of an input time scale (UTC, TAI, GPS or TT).

    Raises
    ------
    InputError
        Any other scale.
    """
    name = time_scale.value if isinstance(time_scale, Scale) else str(time_scale)
    if name not in _SCALE_NAMES:
        raise InputError("time_scale", time_scale, f"must be one of {', '.join(_SCALE_NAMES)}")
    return name


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
    arrays = _encode_columns(columns)
    rows = len(arrays["event_id"])
    if topic is not None and not isinstance(topic, bytes):
        raise InputError("topic", topic, "must be bytes")
    header = _header(source, sequence, time_scale, rows, sent_utc_ns)
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


def _header(source: str, sequence: int, time_scale: Scale | str, rows: int,
            sent_utc_ns: int | None) -> MessageHeader:
    try:
        return MessageHeader.model_validate({
            "format": FORMAT_NAME, "version": WIRE_VERSION, "source": source,
            "sequence": sequence, "time_scale": scale_name(time_scale), "events": rows,
            "sent_utc_ns": sent_utc_ns})
    except ValidationError as exc:
        first = exc.errors()[0]
        field = ".".join(str(part) for part in first["loc"])
        raise InputError(field, first.get("input"), first["msg"]) from None


def _encode_columns(columns: Mapping[str, Any]) -> dict[str, np.ndarray]:
    """The columns in the wire types and in the order of ``EVENTS``."""
    columns = {name: values for name, values in columns.items() if values is not None}
    unknown = sorted(set(columns) - set(COLUMN_RULES))
    if unknown:
        raise InputError("columns", unknown,
                         f"unknown column(s); known: {', '.join(COLUMN_RULES)}")
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
    return arrays


def _encode_column(name: str, values: Any) -> np.ndarray:
    array = np.asarray(values)
    if array.ndim != 1:
        raise InputError(name, f"array of shape {array.shape}", "must be one-dimensional")
    rule = COLUMN_RULES[name]
    if array.size == 0:  # np.asarray([]) is float64: any empty column will do
        return np.empty(0, rule.dtype)
    kind = array.dtype.kind
    if kind not in {_NUMPY_KINDS[k] for k in rule.accepted}:
        raise InputError(name, f"array of {array.dtype}", f"must be {rule.wording}")
    if np.dtype(rule.dtype).kind == "u" and kind == "i" and array.min() < 0:
        row = int(np.flatnonzero(array < 0)[0])
        raise InputError(name, int(array[row]), f"must be >= 0 (row {row})")
    return np.ascontiguousarray(array, dtype=rule.dtype)
