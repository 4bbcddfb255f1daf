"""A service on a thread of the test process, and waiting for a condition with a limit."""

import threading
import time
from pathlib import Path

from turnstamp.service.loop import Service


def leave_as_killed(service: Service) -> None:
    """What ``kill -9`` leaves: open files as they are, no end written, locks released."""
    for writer in service.writers.values():
        if writer._open is not None:
            writer._open.handle.close()
            writer._open = None


def wait_until(predicate, timeout=30.0, step=0.02) -> bool:
    """True as soon as ``predicate()`` is; False after ``timeout`` seconds."""
    deadline = time.time() + timeout
    while time.time() < deadline:
        if predicate():
            return True
        time.sleep(step)
    return False


class RunningService:
    """A Service on a thread (signals belong to the main thread: stop() instead); entered
    once its sockets are bound and its first status.json is written."""

    def __init__(self, config):
        self.service = Service(config)
        self.thread = threading.Thread(target=self.service.run, daemon=True)

    def __enter__(self) -> Service:
        self.thread.start()
        status = Path(self.service.config.output.directory) / "status.json"
        assert wait_until(lambda: self.service.endpoints and status.exists(), 60)
        return self.service

    def __exit__(self, *exc):
        self.service.stop()
        self.thread.join(timeout=60)
