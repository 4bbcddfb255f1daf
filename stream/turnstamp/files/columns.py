"""Arrow arrays from numpy arrays and strings, built from their buffers.

``pyarrow.array`` looks at every value it is given for a pandas object, and its
first call imports pandas when pandas is installed (half a second), as does
``Array.to_numpy``. The tagging path builds and reads its columns here instead: a
numeric numpy array becomes an Arrow array over the same memory, a list of
strings an array of offsets and bytes, and a numeric Arrow array without nulls a
read-only numpy view of its buffer.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pyarrow as pa

__all__ = ["numeric", "strings", "dictionary", "to_numpy"]


def _validity(valid: np.ndarray) -> pa.Buffer:
    return pa.py_buffer(np.packbits(valid, bitorder="little"))


def numeric(values: np.ndarray, mask: np.ndarray | None = None) -> pa.Array:
    """A numeric or bool array (``mask`` True: null), over ``values``' memory where
    it can be (a bool array is packed into bits)."""
    values = np.ascontiguousarray(values)
    validity = None if mask is None or not mask.any() else _validity(~mask)
    if values.dtype == np.bool_:
        return pa.Array.from_buffers(pa.bool_(), values.size, [validity, _validity(values)])
    kind = pa.from_numpy_dtype(values.dtype)
    return pa.Array.from_buffers(kind, values.size, [validity, pa.py_buffer(values)])


def strings(values: Sequence[str | None]) -> pa.Array:
    """A string array of ``values`` (None: null)."""
    encoded = [b"" if v is None else v.encode() for v in values]
    offsets = np.zeros(len(encoded) + 1, np.int32)
    np.cumsum([len(b) for b in encoded], out=offsets[1:])
    missing = np.fromiter((v is None for v in values), bool, len(encoded))
    validity = _validity(~missing) if missing.any() else None
    return pa.Array.from_buffers(pa.string(), len(encoded),
                                 [validity, pa.py_buffer(offsets), pa.py_buffer(b"".join(encoded))])


def dictionary(indices: np.ndarray, words: Sequence[str]) -> pa.DictionaryArray:
    """A dictionary-encoded string column: ``words[indices[i]]`` in row ``i``."""
    return pa.DictionaryArray.from_arrays(numeric(indices), strings(words))


def to_numpy(column: pa.Array) -> np.ndarray:
    """A numeric Arrow array without nulls as a read-only numpy view of its values
    (a bool array is unpacked); any other (or empty) array through ``Array.to_numpy``."""
    kind = column.type
    numeric_kind = (pa.types.is_integer(kind) or pa.types.is_floating(kind)
                    or pa.types.is_boolean(kind))
    if column.null_count or not len(column) or not numeric_kind:
        return column.to_numpy(zero_copy_only=False)
    data = column.buffers()[1]
    if pa.types.is_boolean(kind):
        bits = np.unpackbits(np.frombuffer(data, np.uint8), count=column.offset + len(column),
                             bitorder="little")
        values = bits[column.offset:].view(np.bool_)
    else:
        values = np.frombuffer(data, kind.to_pandas_dtype(), len(column),
                               column.offset * kind.byte_width)
    values.flags.writeable = False
    return values
