"""``tag`` keeps freed memory in the process: glibc's thresholds raised, and Arrow's
allocations given to glibc (``tagging.allocator``)."""

import gc

import pyarrow as pa
import pytest

from turnstamp.tagging.allocator import keep_freed_memory


def test_arrow_allocates_through_glibc_once_asked():
    before = pa.default_memory_pool()
    earlier = pa.allocate_buffer(1 << 20)  # made before the change: freed by its own pool
    try:
        if not keep_freed_memory():
            pytest.skip("not glibc: nothing changes")
        assert pa.default_memory_pool().backend_name == "system"
        made = pa.allocate_buffer(1 << 20)
        assert made.size == earlier.size == 1 << 20
        del earlier, made
        gc.collect()
    finally:
        pa.set_memory_pool(before)
