"""Where the live view gets the service's status: its PUB socket or its output folder.

Both sources answer ``next(timeout_s)`` with the newest status not seen yet (and
when it was made, on the monotonic clock), or None after waiting. A subscriber
that falls behind must not show old news: ZeroMQ's "conflate" option does not
work with two-frame messages, so each wake-up drains every queued message
without blocking and keeps only the newest. A folder is polled: ``status.json``
is replaced atomically by the service, and a file whose ``computed_at_utc_ns``
has not changed is not news; its age is the file's, not the time it was read.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass
from pathlib import Path

__all__ = ["Reading", "read_status_file", "StatusSubscriber", "StatusFolder", "open_source"]

_UNSEEN = object()


@dataclass(frozen=True)
class Reading:
    """A status and when it was made, seconds on ``time.monotonic``'s clock."""

    status: dict
    made_at: float


def read_status_file(folder: Path) -> dict | None:
    """``folder/status.json`` as a dict, or None when it is missing or unreadable."""
    try:
        status = json.loads((Path(folder) / "status.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return status if isinstance(status, dict) else None


class StatusSubscriber:
    """SUB socket on the service's PUB endpoint, topic ``status``, newest message only.

    Parameters
    ----------
    endpoint : str
        The service's ``output.publish_endpoint`` (``tcp://127.0.0.1:5556``).
    """

    def __init__(self, endpoint: str):
        import zmq

        self._zmq = zmq
        self.name = endpoint
        self.context = zmq.Context()
        self.socket = self.context.socket(zmq.SUB)
        self.socket.setsockopt(zmq.LINGER, 0)
        self.socket.setsockopt(zmq.RCVHWM, 16)  # a viewer only wants the newest status
        self.socket.setsockopt(zmq.SUBSCRIBE, b"status")
        self.socket.connect(endpoint)
        self.poller = zmq.Poller()
        self.poller.register(self.socket, zmq.POLLIN)
        self.errors = 0

    def next(self, timeout_s: float) -> Reading | None:
        """Wait up to ``timeout_s`` seconds for a message; drain the queue; the newest."""
        if not self.poller.poll(max(int(timeout_s * 1000), 0)):
            return None
        newest = None
        while (frames := self._receive()) is not None:
            status = self._decode(frames)
            if status is not None:
                newest = status
        return Reading(newest, time.monotonic()) if newest is not None else None

    def _receive(self) -> list[bytes] | None:
        try:
            return self.socket.recv_multipart(self._zmq.NOBLOCK)
        except self._zmq.Again:
            return None

    def _decode(self, frames: list[bytes]) -> dict | None:
        """The status of a ``[b"status", JSON]`` message; None (counted) for anything else."""
        try:
            if len(frames) != 2 or frames[0] != b"status":
                raise ValueError("not a status message")
            status = json.loads(frames[1].decode("utf-8"))
        except ValueError:  # UnicodeDecodeError and JSONDecodeError are ValueErrors
            self.errors += 1
            return None
        return status if isinstance(status, dict) else None

    def close(self) -> None:
        self.socket.close(linger=0)
        self.context.term()


class StatusFolder:
    """``status.json`` of an output folder, re-read on every call after the first.

    Parameters
    ----------
    folder : str or Path
        The service's output folder.
    """

    def __init__(self, folder: str | Path):
        self.folder = Path(folder)
        self.name = str(self.folder / "status.json")
        self._last_made: object = _UNSEEN  # computed_at_utc_ns of the last status
        self._started = False

    def next(self, timeout_s: float) -> Reading | None:
        """The status if it changed (after sleeping ``timeout_s``, except the first time)."""
        if self._started:
            time.sleep(timeout_s)
        self._started = True
        status = read_status_file(self.folder)
        if status is None or status.get("computed_at_utc_ns") == self._last_made:
            return None
        self._last_made = status.get("computed_at_utc_ns")
        return Reading(status, time.monotonic() - self._age_s())

    def _age_s(self) -> float:
        try:
            return max(time.time() - (self.folder / "status.json").stat().st_mtime, 0.0)
        except OSError:
            return 0.0

    def close(self) -> None:
        """Nothing to release."""


def open_source(endpoint: str | None, folder: str | Path | None):
    """A StatusSubscriber on ``endpoint`` if given, else a StatusFolder on ``folder``."""
    if endpoint is not None:
        return StatusSubscriber(endpoint)
    if folder is not None:
        return StatusFolder(folder)
    raise ValueError("give an endpoint or a folder")
