"""An output file written around the page cache while the disk keeps up.

Why
---
An archive is 84 bytes an event: 840 MB for 10^7 events. Written the usual way,
every byte is first copied into the kernel's page cache, on pages the kernel must
find, and on a virtual machine often fault in from the host first: on the machines
this was measured on, that copying cost 0.3–1.9 s of system time for 800 MB, a
different figure every run, and it took the second CPU from the tagging. Written
with ``O_DIRECT`` (Linux), the disk reads the bytes straight from the process's
memory: 0.1–0.3 s of system time for the same file, and the run's CPU time fell
by a third.

How
---
``DirectFile`` gathers what it is given into a staging buffer aligned to a page and
writes it in whole 8 MB chunks through an ``O_DIRECT`` descriptor (direct I/O needs
aligned memory, offsets and lengths); the last, partial chunk is written through
the page cache. It goes over to the page cache for the rest of the file, for good:

* where the file system refuses direct I/O (on opening, or ``EINVAL`` on writing), or
  the platform has none;
* when the disk is what the run would wait for: once direct writes have taken more
  than a quarter of a second in all and more than ``BUSY`` of the time since the
  file was opened (the page cache takes a burst of writes at memory speed and
  flushes it later).

The bytes of the file are the same either way. It is used through
``pyarrow.PythonFile`` (``write``, ``tell``, ``flush``, ``close``).
"""

from __future__ import annotations

import errno
import os
import time
from pathlib import Path

import numpy as np

__all__ = ["DirectFile", "CHUNK", "ALIGN", "BUSY"]

CHUNK = 8 << 20  # bytes a direct write
ALIGN = 4096  # memory, offsets and lengths of direct writes: covers 512 and 4096 sectors
BUSY = 0.75  # share of the time in direct writes beyond which the page cache takes over
_JUDGED_AFTER_S = 0.25

_DIRECT = getattr(os, "O_DIRECT", 0)


class DirectFile:
    """A new file (created or truncated) written as the module docstring says."""

    def __init__(self, path: Path | str):
        flags = os.O_WRONLY | os.O_CREAT | os.O_TRUNC
        self._fd = -1
        if _DIRECT:
            try:
                self._fd = os.open(path, flags | _DIRECT, 0o644)
            except OSError:  # refused by the file system (or not openable at all: said below)
                pass
        self.direct = self._fd >= 0
        if not self.direct:
            self._fd = os.open(path, flags, 0o644)
        raw = np.empty(CHUNK + ALIGN, np.uint8)
        start = -raw.ctypes.data % ALIGN
        self._stage = raw[start : start + CHUNK]
        self._staged = 0
        self._position = 0
        self._opened = time.perf_counter()
        self._direct_s = 0.0  # time in direct writes
        self.closed = False

    def _disk_is_slow(self) -> bool:
        return (self._direct_s > _JUDGED_AFTER_S
                and self._direct_s > BUSY * (time.perf_counter() - self._opened))

    def _through_cache(self) -> None:
        if self.direct:
            import fcntl  # only where there is O_DIRECT (Linux)

            fcntl.fcntl(self._fd, fcntl.F_SETFL, fcntl.fcntl(self._fd, fcntl.F_GETFL) & ~_DIRECT)
            self.direct = False

    def _write_all(self, data: memoryview) -> None:
        done = 0
        while done < len(data):
            try:
                done += os.write(self._fd, data[done:])
            except OSError as exc:
                if exc.errno != errno.EINVAL or not self.direct:
                    raise
                self._through_cache()  # refused by this file system: the page cache it is
            if self.direct and done % ALIGN:  # a short direct write: go on aligned or not at all
                self._through_cache()

    def _flush_stage(self) -> None:
        if self._staged < CHUNK or self._disk_is_slow():  # only whole chunks go direct
            self._through_cache()
        started = time.perf_counter()
        self._write_all(memoryview(self._stage[: self._staged]))
        if self.direct:
            self._direct_s += time.perf_counter() - started
        self._staged = 0

    def write(self, data) -> int:
        source = np.frombuffer(data, np.uint8)
        if not self.direct:
            if self._staged:
                self._flush_stage()
            self._write_all(memoryview(source))
            self._position += source.size
            return source.size
        done = 0
        while done < source.size:
            take = min(source.size - done, CHUNK - self._staged)
            self._stage[self._staged : self._staged + take] = source[done : done + take]
            self._staged += take
            done += take
            if self._staged == CHUNK:
                self._flush_stage()
        self._position += source.size
        return source.size

    def tell(self) -> int:
        return self._position

    def flush(self) -> None:
        """Nothing: staged bytes are written by whole chunks and at ``close``."""

    def writable(self) -> bool:
        return True

    def close(self) -> None:
        if self.closed:
            return
        self.closed = True
        try:
            if self._staged:
                self._flush_stage()
        finally:
            os.close(self._fd)
