"""Arrow arrays built from buffers (files.columns) against pyarrow's own conversion."""

import numpy as np
import pyarrow as pa
import pytest

from turnstamp.files.columns import dictionary, numeric, strings, to_numpy


@pytest.mark.parametrize("dtype", [np.int8, np.uint32, np.int64, np.uint64, np.float32,
                                   np.float64, np.bool_])
def test_numeric_round_trips_like_pyarrow(dtype):
    values = (np.arange(-5, 12) % 3).astype(dtype)
    built = numeric(values)
    assert built.equals(pa.array(values))  # pyarrow's own conversion is the reference
    for start, length in [(0, 17), (3, 9)]:  # slices carry an offset
        part = built.slice(start, length)
        assert np.array_equal(to_numpy(part), values[start:start + length])
        assert not to_numpy(part).flags.writeable
    assert to_numpy(built.slice(9, 0)).size == 0


def test_numeric_masks_and_strided_input():
    values = np.arange(10.0)[::2]  # not contiguous: copied
    mask = np.array([False, True, False, False, True])
    built = numeric(values, mask)
    assert built.equals(pa.array(values, mask=mask))
    assert to_numpy(built).tolist()[:1] == [0.0]  # nulls: through pyarrow's own path


def test_strings_and_dictionaries():
    words = ["α-source", "", None, "beta"]
    assert strings(words).equals(pa.array(words, pa.string()))
    assert strings([]).equals(pa.array([], pa.string()))
    coded = dictionary(np.array([1, 0, 1], np.int32), ["x", "yz"])
    assert coded.to_pylist() == ["yz", "x", "yz"]
    assert coded.type == pa.dictionary(pa.int32(), pa.string())
