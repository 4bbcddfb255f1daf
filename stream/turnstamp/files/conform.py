"""Batches fitted to a file's schema.

``conform_batch`` turns what a caller hands a writer (a record batch, a table or a
mapping of columns) into a batch of exactly the stream's schema: columns matched by
name, cast only where the cast is meaningful and safe, omitted nullable columns
filled with nulls; anything else raises :class:`~turnstamp.errors.SchemaMismatchError`
naming the column. Dictionary columns keep each batch's own dictionary: the IPC
stream format the writers use allows a dictionary to be replaced between batches.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import pyarrow as pa

from ..errors import SchemaMismatchError

__all__ = ["RESERVED_KEYS", "checked_metadata", "row_count", "conform_batch"]

RESERVED_KEYS = ("turnstamp.stream", "turnstamp.opened_utc", "turnstamp.file_counter")
"""Schema metadata keys the writer sets itself."""


def checked_metadata(metadata: Mapping[str, str] | None) -> dict[str, str]:
    """Provenance metadata for a writer: str keys and values, none of ``RESERVED_KEYS``."""
    checked = {}
    for key, value in (metadata or {}).items():
        if not isinstance(key, str) or not isinstance(value, str):
            raise TypeError(f"metadata {key!r} = {value!r}: keys and values must be str")
        if key in RESERVED_KEYS:
            raise ValueError(f"metadata {key!r} is set by the writer itself")
        checked[key] = value
    return checked


def row_count(data) -> int:
    """Rows of a record batch, a table, or a mapping of columns (its first column)."""
    if isinstance(data, (pa.RecordBatch, pa.Table)):
        return data.num_rows
    if isinstance(data, Mapping):
        for value in data.values():
            return len(value)
        return 0
    raise TypeError("write() takes a pyarrow.RecordBatch, a pyarrow.Table or a mapping of "
                    f"columns, not {type(data).__name__}")


def conform_batch(data, schema: pa.Schema, stem: str) -> pa.RecordBatch:
    """Columns of ``data`` as a batch of exactly ``schema``.

    Parameters
    ----------
    data : pyarrow.RecordBatch, pyarrow.Table or mapping of column name to values
        See :meth:`~turnstamp.files.writer.RotatingArrowWriter.write`.
    schema : pyarrow.Schema
        The stream's schema.
    stem : str
        The stream's name, for the error.

    Raises
    ------
    SchemaMismatchError
        A column is missing, unknown, repeated, of an incompatible type, of the
        wrong length, or holds nulls where the schema forbids them.
    """
    if isinstance(data, pa.Table):
        data = data.combine_chunks()
        batches = data.to_batches()
        if len(batches) == 1 and batches[0].schema.equals(schema, check_metadata=False):
            if all(c.null_count == 0 or f.nullable for c, f in zip(batches[0].columns, schema,
                                                                   strict=True)):
                return batches[0]  # already exactly the schema: nothing to convert
    if isinstance(data, (pa.RecordBatch, pa.Table)):
        names = data.schema.names
        columns = dict(zip(names, data.columns, strict=True))
        if len(columns) != len(names):
            duplicate = next(n for n in names if names.count(n) > 1)
            raise SchemaMismatchError(stem, duplicate, "appears more than once")
    else:
        columns = dict(data)
    rows = row_count(data)
    unknown = [name for name in columns if name not in schema.names]
    if unknown:
        raise SchemaMismatchError(stem, str(unknown[0]), "not in the schema "
                                  f"(known: {', '.join(schema.names)})")
    arrays = []
    for field in schema:
        if field.name not in columns:
            if not field.nullable:
                raise SchemaMismatchError(stem, field.name, "required column is missing")
            arrays.append(pa.nulls(rows, field.type))
            continue
        array = _to_array(columns[field.name], field, stem)
        if len(array) != rows:
            raise SchemaMismatchError(stem, field.name, f"has {len(array)} rows, "
                                      f"expected {rows} like the first column")
        if array.null_count and not field.nullable:
            raise SchemaMismatchError(stem, field.name,
                                      f"{array.null_count} null(s) in a non-nullable column")
        arrays.append(array)
    return pa.RecordBatch.from_arrays(arrays, schema=schema)


def _to_array(value, field: pa.Field, stem: str) -> pa.Array:
    if isinstance(value, pa.ChunkedArray):
        value = value.combine_chunks()
    if not isinstance(value, pa.Array):
        if isinstance(value, np.ndarray) and value.ndim == 2 and pa.types.is_list(field.type):
            value = list(value)
        try:
            return pa.array(value, type=field.type, safe=True)
        except (pa.ArrowException, TypeError, ValueError, OverflowError) as exc:
            try:  # e.g. a numpy string array for a dictionary column
                value = pa.array(value)
            except (pa.ArrowException, TypeError, ValueError, OverflowError):
                raise SchemaMismatchError(stem, field.name, f"cannot convert to {field.type}: "
                                          f"{exc}") from None
    if value.type == field.type:
        return value
    if not _cast_is_meaningful(value.type, field.type):
        raise SchemaMismatchError(stem, field.name, f"type {value.type} does not fit "
                                  f"{field.type}")
    try:
        return value.cast(field.type, safe=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError) as exc:
        raise SchemaMismatchError(stem, field.name, f"cannot cast {value.type} to "
                                  f"{field.type} safely: {exc}") from None


def _type_family(kind: pa.DataType) -> str:
    if pa.types.is_dictionary(kind):
        return _type_family(kind.value_type)
    if pa.types.is_null(kind):
        return "null"
    if pa.types.is_integer(kind) or pa.types.is_floating(kind):
        return "number"
    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        return "string"
    if pa.types.is_binary(kind) or pa.types.is_large_binary(kind):
        return "binary"
    if pa.types.is_boolean(kind):
        return "bool"
    if pa.types.is_list(kind) or pa.types.is_large_list(kind) or pa.types.is_fixed_size_list(kind):
        return "list"
    return str(kind)


def _cast_is_meaningful(source: pa.DataType, target: pa.DataType) -> bool:
    """Casts we allow: within numbers, within strings (incl. dictionary encoding),
    lists of allowed element casts, all-null columns. No parsing, no formatting."""
    family = _type_family(source)
    if family == "null":
        return True
    if family != _type_family(target):
        return False
    if family == "list":
        return _cast_is_meaningful(source.value_type, target.value_type)
    return True
