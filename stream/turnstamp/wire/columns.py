"""The body's columns: which Arrow types each accepts, and conversion to the core's dtypes.

The table of the format specification (:mod:`turnstamp.wire.message`) as data:
one :class:`ColumnRule` per column of :data:`turnstamp.files.schemas.EVENTS`. The
decoder checks a body's schema against it and converts each column; event files
for offline tagging go through the same rules (``batch_from_record``), and the
encoder converts a producer's arrays with it.
"""

from __future__ import annotations

import math
from typing import Any, NamedTuple

import numpy as np
import pyarrow as pa

from ..core.batch import MISSING_ID, MISSING_TIME, OPTIONAL_COLUMNS, EventBatch
from ..core.timebase import Scale
from ..errors import RejectReason
from ..files.columns import to_numpy
from ..files.schemas import EVENTS
from .message import WIRE_VERSION, MessageContext, clipped, shown

__all__ = ["ColumnRule", "COLUMN_RULES", "arrow_kind", "check_schema", "column_to_numpy",
           "event_batch", "batch_from_record"]


class ColumnRule(NamedTuple):
    """How one column travels.

    Attributes
    ----------
    dtype : numpy dtype
        The core's dtype of the decoded column.
    arrow_type : pyarrow.DataType
        The Arrow type matching ``dtype`` (the encoder writes it).
    fill : scalar
        The value of a null (a sentinel of :mod:`turnstamp.core.batch`, NaN or 0).
    accepted : tuple of str
        Kinds of Arrow type accepted (see :func:`arrow_kind`); ``null`` always is.
    wording : str
        What is accepted, in words, for a refusal.
    """

    dtype: Any
    arrow_type: pa.DataType
    fill: Any
    accepted: tuple[str, ...]
    wording: str


_UNSIGNED = ("int", "uint")
_FLOAT_RULE = ColumnRule(np.float64, pa.float64(), math.nan, ("int", "uint", "float"),
                         "a floating-point or integer column")

COLUMN_RULES: dict[str, ColumnRule] = {
    "event_id": ColumnRule(np.uint64, pa.uint64(), MISSING_ID, _UNSIGNED,
                           "an integer column with values >= 0"),
    "time_ns": ColumnRule(np.int64, pa.int64(), MISSING_TIME, ("int",),
                          "an integer column of ns (signed, int8 to int64)"),
    **{name: _FLOAT_RULE for name, (dtype, _) in OPTIONAL_COLUMNS.items()
       if np.dtype(dtype).kind == "f"},
    "telescope_mask": ColumnRule(np.uint64, pa.uint64(), 0, _UNSIGNED,
                                 "an integer column with values >= 0"),
}
"""Rules of every column of format version 1, in the order of ``EVENTS``."""

assert set(COLUMN_RULES) == {"event_id", "time_ns", *OPTIONAL_COLUMNS}
assert set(COLUMN_RULES) == set(EVENTS.names)


def arrow_kind(kind: pa.DataType) -> str:
    """``null``, ``int`` (signed), ``uint``, ``float`` or ``other``."""
    if pa.types.is_null(kind):
        return "null"
    if pa.types.is_signed_integer(kind):
        return "int"
    if pa.types.is_unsigned_integer(kind):
        return "uint"
    if pa.types.is_floating(kind):
        return "float"
    return "other"


def check_schema(schema: pa.Schema, context: MessageContext) -> tuple[dict[str, int], list[str]]:
    """Index of each known column, and notes about the unknown ones.

    Raises
    ------
    WireError
        ``bad_schema``: a column repeated, of a type its rule does not accept, a
        required column missing, or one of ``ra_deg``/``dec_deg`` without the other.
    """
    positions: dict[str, int] = {}
    notes: list[str] = []
    for index, field in enumerate(schema):
        rule = COLUMN_RULES.get(field.name)
        if rule is None:
            notes.append(f"column {shown(field.name)} ({clipped(str(field.type))}) is not part "
                         f"of format version {WIRE_VERSION} and was ignored")
            continue
        if field.name in positions:
            raise context.refuse(RejectReason.BAD_SCHEMA, f"column {field.name!r} appears twice")
        kind = arrow_kind(field.type)
        if kind != "null" and kind not in rule.accepted:
            raise context.refuse(RejectReason.BAD_SCHEMA, f"{field.name} must be "
                                 f"{rule.wording}, got {clipped(str(field.type))}")
        positions[field.name] = index
    for name in ("event_id", "time_ns"):
        if name not in positions:
            raise context.refuse(RejectReason.BAD_SCHEMA,
                                 f"required column {name!r} is missing; columns: "
                                 f"{shown(schema.names, 200)}")
    if ("ra_deg" in positions) != ("dec_deg" in positions):
        present, absent = (("ra_deg", "dec_deg") if "ra_deg" in positions
                           else ("dec_deg", "ra_deg"))
        raise context.refuse(RejectReason.BAD_SCHEMA,
                             f"column {present!r} without {absent!r}; the two come together")
    return positions, notes


def column_to_numpy(name: str, column: pa.Array, context: MessageContext) -> np.ndarray:
    """One column (already checked by :func:`check_schema`) in the core's dtype.

    A read-only view of the Arrow buffer when possible; nulls become the rule's fill.

    Raises
    ------
    WireError
        ``bad_schema``: a negative value in a column decoded as uint64.
    """
    rule = COLUMN_RULES[name]
    kind = arrow_kind(column.type)
    if kind == "null":
        result = np.full(len(column), rule.fill, rule.dtype)
        result.flags.writeable = False
        return result
    if kind == "int" and rule.arrow_type == pa.uint64():
        _refuse_negative(name, column, context)
    # Integers to float64 round beyond 2**53, deliberately; every other cast is exact.
    rounding = kind in ("int", "uint") and rule.arrow_type == pa.float64()
    if column.type != rule.arrow_type and column.null_count == 0 \
            and kind in ("int", "uint", "float"):
        values = to_numpy(column)  # numpy casts what is exact (a quick start: no compute)
        if rounding or np.can_cast(values.dtype, rule.dtype, "safe") \
                or (kind == "int" and rule.arrow_type == pa.uint64()):  # none negative
            return _read_only(values.astype(rule.dtype))
    if column.type != rule.arrow_type:
        column = column.cast(rule.arrow_type, safe=not rounding)
    if column.null_count:
        column = column.fill_null(pa.scalar(rule.fill, rule.arrow_type))
    return to_numpy(column)


def _read_only(values: np.ndarray) -> np.ndarray:
    values.flags.writeable = False
    return values


def _refuse_negative(name: str, column: pa.Array, context: MessageContext) -> None:
    if len(column) == 0:
        return
    if column.null_count == 0:  # the usual case, read from the buffer: a quick start
        values = to_numpy(column)
        if values.min() >= 0:
            return
    else:
        import pyarrow.compute as pc  # only here, for a column with nulls

        low = pc.min(column).as_py()
        if low is None or low >= 0:
            return
        values = column.fill_null(0).to_numpy(zero_copy_only=False)
    row = int(np.flatnonzero(values < 0)[0])
    raise context.refuse(RejectReason.BAD_SCHEMA,
                         f"{name} must be >= 0 to fit uint64, got {int(values[row])} "
                         f"in row {row} ({column.type} column)")


def event_batch(record: pa.RecordBatch | None, schema: pa.Schema, positions: dict[str, int],
                source: str, sequence: int, time_scale: Scale,
                context: MessageContext) -> EventBatch:
    """The ``EventBatch`` of a record batch whose schema passed :func:`check_schema`
    (``positions`` from it); None for a body without rows."""
    columns = {}
    for name, index in positions.items():
        column = (record.column(index) if record is not None
                  else pa.array([], type=schema.field(index).type))
        columns[name] = column_to_numpy(name, column, context)
    return EventBatch(source=source, sequence=sequence, time_scale=time_scale, **columns)


def batch_from_record(record: pa.RecordBatch, *, source: str, sequence: int,
                      time_scale: Scale) -> tuple[EventBatch, list[str]]:
    """An ``EventBatch`` from an Arrow record batch with the wire format's columns
    (used for event files: the same types, casts and null rules as messages).

    Raises
    ------
    WireError
        ``bad_schema`` naming the column when a column is missing or mistyped.
    """
    context = MessageContext(source=source, sequence=sequence, events=record.num_rows)
    positions, notes = check_schema(record.schema, context)
    return event_batch(record, record.schema, positions, source, sequence, time_scale,
                       context), notes
