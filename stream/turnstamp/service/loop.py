"""``turnstamp run``: the live service.

Theory of operation
-------------------
One thread runs the loop: poll the sockets with a timeout, drain the intake
(receive -> decode -> ``Pipeline.feed_joined`` -> write), then run what is due (statistics
updates, clock check, status, checkpoint, model reload, table extension). A
second thread only builds barycentre tables ahead of need; the loop installs them.
SIGINT/SIGTERM set a flag: the loop drains what ZeroMQ already holds, writes the
last updates and a checkpoint, closes every file, then the sockets.

Every message ends as exactly one ledger row (accepted, or the reason it was
refused) after its archive and rejects rows (``ledger``); see ``recovery`` for why
this makes a ``kill -9`` lose at most the messages in flight. Messages that queued
up while the loop was busy are taken together (``QUEUED_MESSAGES``): each is
decoded and checked alone, then those admitted are tagged, added to the statistics
and committed as one batch, so that the fixed cost of a message (about 2 ms) is
paid once per batch when the service falls behind. The rooms:
``intake`` (sockets, decoding, sequence checks), ``ledger`` (the commit),
``checkpoint`` and ``recovery``, ``control`` (the REQ/REP commands), ``status``,
``upkeep`` (reloads, tables), ``startup`` (configuration to pipeline and writers),
``outputs`` (results to Arrow tables).
"""

from __future__ import annotations

import gc
import logging
import signal
import sys
import threading
import time
from collections import deque
from collections.abc import Callable
from contextlib import ExitStack
from pathlib import Path

import zmq

from ..assemble import Environment, TableCache
from ..config import ServiceConfig, load_config
from ..core.accounting import MessageRecord
from ..core.timebase import unix_to_ns
from ..files import schemas
from ..files.durable import atomic_write_text
from ..files.ledger import Ledger
from ..files.outputs import archive_tables, clock_table, rejects_table, rows_table
from . import control
from .checkpoint import Checkpointer, checkpoint_state
from .intake import Admission, Admitted, Refused, drain
from .lifecycle import banner, failed, failed_at_start, summary
from .recovery import resume
from .sockets import Sockets, beyond_loopback, check_endpoints, open_sockets
from .startup import build_pipeline, open_writers, output_metadata
from .status import STATUS_FILE, Activity, json_text, status_document
from .upkeep import Upkeep, file_times

__all__ = ["Service", "run_service"]

log = logging.getLogger(__name__)

DRAIN_MESSAGES = 64  # messages handled per poll wake-up before periodic work gets a turn
QUEUED_MESSAGES = 16  # messages taken from the queue at once (``handle_queued``)
JOIN_EVENTS = 1 << 16  # events of queued messages fed and committed together, at most
DRAIN_AT_STOP_S = 2.0  # at stop, what ZeroMQ already holds is taken for this long at most
POLL_MS = 100
RELOAD_CHECK_S = 2.0
STATUS_EVERY_S = 1.0
COLLECT_EVERY_S = 60.0  # full garbage collection: keeps resident memory flat over a night


class Service:
    """The service: set up (and resumed from its output folder) on construction;
    ``run()`` serves until ``stop()`` and returns 0.

    Parameters
    ----------
    config : ServiceConfig
        The whole configuration.
    clock : callable, optional
        Wall clock, s since 1970 (UTC); ``time.time`` by default.
    stop : threading.Event, optional
        The stop flag, when it must exist before the service (signal handlers
        installed before a long set-up); ``stop()`` sets it.
    """

    def __init__(self, config: ServiceConfig, clock: Callable[[], float] = time.time,
                 stop: threading.Event | None = None):
        self.config = config
        self.clock = clock
        self.out = Path(config.output.directory)
        self.out.mkdir(parents=True, exist_ok=True)
        self.started_utc = time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(clock()))
        self.notes: deque[str] = deque(maxlen=100)
        self.warnings: deque[str] = deque(maxlen=100)
        self.env = Environment.from_site(config.site)
        self.tables = TableCache(self.out / "tables", self.env, config.barycentre)
        mtimes = file_times(config.targets)
        self.pipeline = build_pipeline(config, self.env, self.tables, clock())
        self.upkeep = Upkeep(config.targets, self.pipeline, self.tables, self.warnings, mtimes)
        tracker, self.counters, notes = resume(self.out, self.pipeline)
        self._note(notes)
        self.admission = Admission(config.intake, tracker)
        self.writers = open_writers(self.out, config, self._metadata(), clock)
        self.checkpointer = Checkpointer(self.out)
        self.ledger = Ledger(self.writers["archive"], self.writers["rejects"],
                             self.writers["ledger"], self.counters)
        self.activity = Activity()
        self.significance: list[dict] = []  # the latest statistics, for the status
        self.profiles: list[dict] = []
        self.clock_verdicts: list[tuple] = []
        self.sockets: Sockets | None = None  # while running
        self.endpoints: dict = {}  # as bound: "intake" (a list), "publish", "control"
        self.commands = control.commands(self)
        self._stop = stop if stop is not None else threading.Event()
        self.say: Callable[[str], None] = log.info  # the banner and the summary
        self._due: dict[str, float] = {}
        self._schedule = (
            ("update", config.statistics.update_every_s, self._update),
            ("clock", config.clock_check.every_s, self._clock_check),
            ("status", STATUS_EVERY_S, self._status_and_rotation),
            ("checkpoint", config.output.checkpoint_every_s,
             lambda now: self.checkpoint(wait=False)),
            ("reload", RELOAD_CHECK_S, self._upkeep),
            ("collect", COLLECT_EVERY_S, lambda now: gc.collect()),  # frees per-message cycles
        )

    # -- the loop -----------------------------------------------------------------
    def stop(self, *_) -> None:
        """Ask the loop to finish (a signal handler)."""
        self._stop.set()

    def run(self) -> int:
        """Serve until stopped; then drain, write the last updates and a checkpoint,
        close every file, then the sockets. On any failure ``status.json`` says
        "failed" and every file is closed before the error propagates."""
        try:
            return self._serve()
        except BaseException as exc:
            failed(self, exc)
            raise

    def _serve(self) -> int:
        with zmq.Context() as context, ExitStack() as stack:
            stack.callback(self.upkeep.close)
            self.sockets = sockets = open_sockets(context, self.config, stack)
            self.endpoints = sockets.endpoints
            self.say(banner(self))
            self._write_status("running")
            poller = zmq.Poller()
            for socket in (sockets.intake, sockets.control):
                if socket is not None:
                    poller.register(socket, zmq.POLLIN)
            while not self._stop.is_set():
                ready = dict(poller.poll(POLL_MS))
                if sockets.intake in ready:
                    drain(sockets.intake, self.handle_queued, self.clock,
                          limit=DRAIN_MESSAGES, group=QUEUED_MESSAGES)
                if sockets.control is not None and sockets.control in ready:
                    control.answer(sockets.control, self.commands)
                self._periodic(self.clock())
            drain(sockets.intake, self.handle_queued, self.clock,
                  deadline=self.clock() + DRAIN_AT_STOP_S, group=QUEUED_MESSAGES)
            self._finish()
        return 0

    def handle(self, frames, received: float) -> None:
        """One message (``handle_queued``)."""
        self.handle_queued([(frames, received)])

    def handle_queued(self, messages: list[tuple[list, float]]) -> None:
        """Messages taken from the queue together, as (frames, received): each is
        decoded and its sequence checked alone; those admitted are fed and committed
        together (up to ``JOIN_EVENTS`` events of one time scale and the same columns;
        a refused message commits alone, in its place). One ledger row each."""
        joined: list[tuple[Admitted, int]] = []
        for frames, received in messages:
            received_ns = unix_to_ns(received)
            self.activity.arrived(received)
            admitted = self.admission.admit(frames, received_ns)
            refused = isinstance(admitted, Refused)
            if joined and (refused or not _joins(joined, admitted)):
                self._feed(joined)
                joined = []
            if refused:
                self.ledger.commit(admitted.record, rejects=[admitted.row])
            else:
                joined.append((admitted, received_ns))
        self._feed(joined)
        self.activity.counted(self.clock(), self.counters.events_received)

    def _feed(self, joined: list[tuple[Admitted, int]]) -> None:
        """Feed admitted messages as one batch; commit their rows and ledger records."""
        if not joined:
            return
        batches = [admitted.batch for admitted, _ in joined]
        result, parts = self.pipeline.feed_joined(batches)
        records, rejects = [], []
        for (admitted, received_ns), part in zip(joined, parts, strict=True):
            batch = admitted.batch
            rejects += admitted.notes
            if part.rejected:
                rejects.append(rejects_table(batch, part, received_ns, admitted.message_bytes))
            records.append(MessageRecord.accepted(received_ns, batch.source, batch.sequence,
                                                  part, admitted.missing))
        self.ledger.commit_many(
            records, archive_tables(batches, parts, self.pipeline.targets, result), rejects)

    # -- periodic work ------------------------------------------------------------
    def _periodic(self, now: float) -> None:
        for name, period, action in self._schedule:
            if now >= self._due.get(name, 0.0):
                self._due[name] = now + period
                action(now)

    def _update(self, now: float) -> None:
        """Significance and profiles rows; the significance is published too."""
        computed = unix_to_ns(now)
        self.significance = self.pipeline.significance()
        self.writers["significance"].write(rows_table(self.significance, schemas.SIGNIFICANCE,
                                                      computed_at_utc_ns=computed))
        self.profiles = self.pipeline.profiles()
        self.writers["profiles"].write(rows_table(self.profiles, schemas.PROFILES,
                                                  computed_at_utc_ns=computed))
        self.activity.updated(self.clock())
        self._publish(b"significance", json_text(self.significance, indent=None))

    def _clock_check(self, now: float) -> None:
        self.clock_verdicts = self.pipeline.clock_check()
        if self.clock_verdicts:
            self.writers["clock"].write(clock_table(self.clock_verdicts, unix_to_ns(now)))

    def _status_and_rotation(self, now: float) -> None:
        self._write_status("running")
        for writer in self.writers.values():
            writer.check_rotation()

    def _upkeep(self, now: float) -> None:
        self.reload()
        self.upkeep.extend_tables()

    def checkpoint(self, wait: bool = True) -> None:
        """Checkpoint the state between two messages (``checkpoint``): the snapshot
        now, the file on the checkpoint thread (``wait``: before returning)."""
        self.checkpointer.submit(checkpoint_state(self.pipeline, self.admission.tracker,
                                                  self.counters, self.writers))
        if wait:
            self.checkpointer.wait()

    def reload(self, force: bool = False) -> list[str]:
        """Reload models and templates whose files changed (all, with ``force``);
        returns the changes. A bad file keeps the old model and becomes a warning."""
        changes, refused = self.upkeep.reload_changed(force)
        for line in (*refused, *changes):
            log.warning("%s", line)
        if changes:
            metadata = self._metadata()
            for writer in self.writers.values():
                writer.set_metadata(metadata)
        return changes

    # -- status and shutdown ------------------------------------------------------
    def status(self, state: str) -> dict:
        """The status document (``status``)."""
        return status_document(self, state)

    def _write_status(self, state: str) -> None:
        text = json_text(self.status(state))
        atomic_write_text(self.out / STATUS_FILE, text)
        self._publish(b"status", text)

    def _publish(self, topic: bytes, text: str) -> None:
        if self.sockets is not None and self.sockets.publisher is not None:
            self.sockets.publisher.send_multipart([topic, text.encode()])

    def _metadata(self) -> dict[str, str]:
        return output_metadata(self.config, self.env, self.pipeline)

    def _note(self, notes: list[str]) -> None:
        self.notes.extend(notes)
        for note in notes:
            log.warning("%s", note)

    def _finish(self) -> None:
        now = self.clock()
        self._update(now)
        self._clock_check(now)
        self.checkpoint()
        self.checkpointer.close()
        for writer in self.writers.values():
            writer.close()
        self._write_status("stopped")
        self.say(summary(self))


def _joins(joined: list[tuple[Admitted, int]], admitted: Admitted) -> bool:
    """Whether ``admitted`` may be fed with the messages ``joined``."""
    batch = admitted.batch
    events = sum(len(a.batch) for a, _ in joined)
    return (events + len(batch) <= JOIN_EVENTS and joined[0][0].batch.joinable(batch)
            and all((a.batch.source, a.batch.sequence) != (batch.source, batch.sequence)
                    for a, _ in joined))


def run_service(config_path: Path) -> int:
    """Load the configuration, check its addresses (a taken one is an error at once),
    install signal handlers, run until stopped; banner and summary on stderr."""
    config = load_config(config_path)
    check_endpoints(config)
    for line in beyond_loopback(config):
        log.warning("%s", line)
    stop = threading.Event()
    for number in (signal.SIGINT, signal.SIGTERM):
        signal.signal(number, lambda *_: stop.set())
    try:
        service = Service(config, stop=stop)
    except BaseException as exc:
        failed_at_start(Path(config.output.directory), exc)
        raise
    service.say = lambda text: print(text, file=sys.stderr, flush=True)
    return service.run()
