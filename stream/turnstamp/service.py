"""``turnstamp run``: the live service.

Theory of operation
-------------------
One thread runs the loop: poll the sockets with a timeout, drain the intake
(receive -> decode -> ``Pipeline.feed`` -> write), then run what is due (statistics
updates, clock check, status, checkpoint, model reload, table extension). A
second thread only builds barycentre tables ahead of need; the loop installs them.
SIGINT/SIGTERM set a flag: the loop drains what ZeroMQ already holds, writes the
last updates and a checkpoint, closes every file, then the sockets.

Every message ends as exactly one ledger row (accepted, or the reason it was
refused) after its archive and rejects rows; see ``recovery`` for why this makes a
``kill -9`` lose at most the message in flight.
"""

from __future__ import annotations

import gc
import json
import logging
import signal
import threading
import time
from collections import OrderedDict, deque
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path

import numpy as np
import zmq

from . import __version__, recovery
from .assemble import Environment, TableCache, build_target, load_phase_calculators
from .config import ServiceConfig, load_config
from .core.correctiontable import TableSet
from .core.pipeline import Pipeline, PipelineSettings
from .core.tagger import TargetTagger
from .core.timebase import NS_PER_DAY, NS_PER_S, Scale, parse_instant, to_tt, unix_to_ns
from .errors import InputError, RejectReason
from .io import schemas
from .io.files import load_template
from .io.sinks import RotatingArrowWriter, atomic_write_json
from .io.wire import SequenceKind, SequenceTracker, WireError, decode_message
from .outputs import (
    archive_table,
    clock_table,
    ledger_table,
    message_reject_table,
    rejects_table,
    rows_table,
)

__all__ = ["Service", "run_service"]

log = logging.getLogger(__name__)

DRAIN_MESSAGES = 64  # messages handled per poll wake-up before periodic work gets a turn
POLL_MS = 100
RELOAD_CHECK_S = 2.0
STATUS_EVERY_S = 1.0
HARD_MESSAGE_LIMIT = 4  # ZeroMQ drops messages above this many max_message_bytes
MAX_SOURCES = 10_000  # per-source counters kept, like the sequence tracker's limit
COLLECT_EVERY_S = 60.0  # full garbage collection: keeps resident memory flat over a night


class Service:
    """The service; ``run()`` returns when asked to stop."""

    def __init__(self, config: ServiceConfig, clock=time.time):
        self.config = config
        self.clock = clock
        self.out = Path(config.output.directory)
        self.out.mkdir(parents=True, exist_ok=True)
        self._stop = threading.Event()
        self.counters: dict[str, int] = {}
        self.rejected_by_reason: dict[str, int] = {}
        self.sources: OrderedDict[str, dict] = OrderedDict()  # bounded: MAX_SOURCES
        self.warnings: deque[str] = deque(maxlen=100)
        self.notes: deque[str] = deque(maxlen=100)
        self._rate = deque(maxlen=4096)  # (wall time, events received): > 10 s of messages
        self._latencies = deque(maxlen=10_000)
        self._pending_since: float | None = None
        self._due: dict[str, float] = {}
        self._mtimes: dict[Path, float] = {}
        self._builder = ThreadPoolExecutor(max_workers=1, thread_name_prefix="tables")
        self._building: Future | None = None
        self.started_utc = time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(clock()))

    # -- set-up -------------------------------------------------------------------
    def _now_tt_ns(self) -> int:
        utc = unix_to_ns(self.clock())
        return int(to_tt(np.array([utc]), Scale.UTC, self.env.leaps)[0][0])

    def _coverage(self) -> tuple[int, int]:
        b = self.config.barycentre
        now = self._now_tt_ns()
        start = now - int(b.hours_before * 3600 * NS_PER_S)
        stop = now + int(b.hours_after * 3600 * NS_PER_S)
        if b.cover_from:
            start = int(to_tt(np.array([parse_instant(b.cover_from)]), Scale.UTC,
                              self.env.leaps)[0][0])
        if b.cover_until:
            stop = int(to_tt(np.array([parse_instant(b.cover_until)]), Scale.UTC,
                             self.env.leaps)[0][0])
        return start, stop

    def setup(self) -> None:
        c = self.config
        self.env = Environment.from_site(c.site)
        self.tables = TableCache(self.out / "tables", self.env, c.barycentre)
        start, stop = self._coverage()
        targets = []
        for target in c.targets:
            setup = build_target(target)
            setup.tagger.table = TableSet([self.tables.table(setup.position, start, stop)])
            targets.append(setup)
            for path in (*target.models, *([target.template] if target.template else [])):
                self._mtimes[Path(path)] = Path(path).stat().st_mtime
        s = c.statistics
        interval = int(s.interval_s * NS_PER_S)
        settings = PipelineSettings(
            leaps=self.env.leaps, clock_chain=self.env.clock_chain,
            earliest_ns=int(to_tt(np.array([parse_instant(c.intake.plausible_from)]),
                                  Scale.UTC, self.env.leaps)[0][0]),
            latest_ns=int(to_tt(np.array([parse_instant(c.intake.plausible_until)]),
                                Scale.UTC, self.env.leaps)[0][0]),
            harmonics=s.harmonics, bins=s.bins, interval_ns=interval,
            windows_ns=tuple(int(m * 60 * NS_PER_S) for m in s.windows_minutes),
            retain_ns=int(s.retain_hours * 3600 * NS_PER_S),
            clock_chunk_ns=(None if c.clock_check.chunk_seconds is None
                            else int(c.clock_check.chunk_seconds * NS_PER_S)),
            tolerance_cycles=c.clock_check.tolerance_cycles,
            tolerance_us=c.clock_check.tolerance_us)
        self.pipeline = Pipeline(settings, targets)
        self.tracker, notes = recovery.resume(self.out, self.pipeline, SequenceTracker(),
                                              self.counters)
        self.notes.extend(notes)
        for note in notes:
            log.warning("%s", note)
        self.writers = {
            stem: RotatingArrowWriter(self.out, stem, schema,
                                      rotate_seconds=c.output.rotate_minutes * 60,
                                      rotate_bytes=int(c.output.rotate_megabytes * 2**20),
                                      metadata=self._metadata(), clock=self.clock)
            for stem, schema in schemas.OUTPUTS.items()}

    def _metadata(self) -> dict[str, str]:
        targets = self.pipeline.targets
        return {
            **self.env.provenance(),
            "config": self.config.model_dump_json(),
            "models": json.dumps({n: t.tagger.model_ids for n, t in targets.items()}),
            "recipes_by_target": json.dumps({n: [r.name for r in t.recipes]
                                             for n, t in targets.items()}),
            "table": json.dumps({n: {k: v for k, v in t.tagger.table.tables[0].provenance.items()
                                     if k not in ("start_ns", "stop_ns")}
                                 for n, t in targets.items()}),
        }

    def _sockets(self, context: zmq.Context):
        c = self.config.intake
        kind = zmq.PULL if c.pattern == "pull" else zmq.SUB
        intake = context.socket(kind)
        intake.setsockopt(zmq.RCVHWM, c.receive_high_water_mark)
        intake.setsockopt(zmq.MAXMSGSIZE, HARD_MESSAGE_LIMIT * c.max_message_bytes)
        intake.setsockopt(zmq.LINGER, 0)
        if kind == zmq.SUB:
            for topic in c.topics:
                intake.setsockopt(zmq.SUBSCRIBE, topic.encode())
        if c.curve is not None:
            from zmq.auth import load_certificate
            from zmq.auth.thread import ThreadAuthenticator

            self._auth = ThreadAuthenticator(context)
            self._auth.start()
            self._auth.configure_curve(domain="*",
                                       location=str(c.curve.authorized_clients_directory))
            public, secret = load_certificate(str(c.curve.server_secret_key_file))
            intake.curve_publickey, intake.curve_secretkey = public, secret
            intake.curve_server = True
        for endpoint in c.endpoints:
            (intake.bind if c.bind else intake.connect)(endpoint)
        self.intake = intake
        self.publisher = None
        if self.config.output.publish_endpoint:
            self.publisher = context.socket(zmq.PUB)
            self.publisher.setsockopt(zmq.SNDHWM, 100)  # viewers get the newest, not a backlog
            self.publisher.setsockopt(zmq.LINGER, 0)
            self.publisher.bind(self.config.output.publish_endpoint)
        self.control = None
        if self.config.control.endpoint:
            self.control = context.socket(zmq.REP)
            self.control.setsockopt(zmq.LINGER, 0)
            self.control.bind(self.config.control.endpoint)

    # -- the loop -----------------------------------------------------------------
    def stop(self, *_) -> None:
        self._stop.set()

    def run(self) -> int:
        self.setup()
        context = zmq.Context()
        try:
            self._sockets(context)
            poller = zmq.Poller()
            poller.register(self.intake, zmq.POLLIN)
            if self.control is not None:
                poller.register(self.control, zmq.POLLIN)
            log.info("turnstamp %s listening on %s", __version__, self.config.intake.endpoints)
            self._write_status("running")
            while not self._stop.is_set():
                ready = dict(poller.poll(POLL_MS))
                if self.intake in ready:
                    self._drain(DRAIN_MESSAGES)
                if self.control is not None and self.control in ready:
                    self._control()
                self._periodic(self.clock())
            self._drain(None, deadline=self.clock() + 2.0)  # what ZeroMQ already holds
            self._finish()
        finally:
            for sock in (getattr(self, "intake", None), getattr(self, "publisher", None),
                         getattr(self, "control", None)):
                if sock is not None:
                    sock.close(linger=0)
            if getattr(self, "_auth", None) is not None:
                self._auth.stop()
            context.term()
            self._builder.shutdown(wait=False, cancel_futures=True)
        return 0

    def _drain(self, limit: int | None, deadline: float | None = None) -> None:
        handled = 0
        while limit is None or handled < limit:
            if deadline is not None and self.clock() > deadline:
                break
            try:
                frames = self.intake.recv_multipart(flags=zmq.NOBLOCK, copy=False)
            except zmq.Again:
                break
            self.handle(frames, self.clock())
            handled += 1

    def handle(self, frames, received: float) -> None:
        """One message: decode, check its sequence, feed, write; one ledger row."""
        received_ns = unix_to_ns(received)
        if self._pending_since is None:
            self._pending_since = received
        try:
            message = decode_message(frames, has_topic=self.config.intake.pattern == "sub",
                                     max_message_bytes=self.config.intake.max_message_bytes,
                                     max_events=self.config.intake.max_events_per_message)
        except WireError as exc:
            size = sum(len(f) for f in frames)
            self._refuse(received_ns, exc.source, exc.sequence, exc.reason.value, exc.detail,
                         exc.events, size)
            return
        batch = message.batch
        status = self.tracker.observe(batch.source, batch.sequence)
        source = self.sources.get(batch.source)
        if source is None:
            if len(self.sources) >= MAX_SOURCES:  # as the sequence tracker: forget the oldest
                self.sources.popitem(last=False)
            source = self.sources[batch.source] = {"messages": 0, "events": 0,
                                                   "last_sequence": None, "missing": 0}
        source["messages"] += 1
        source["events"] += len(batch)
        if status.kind == SequenceKind.DUPLICATE:
            self._refuse(received_ns, batch.source, batch.sequence,
                         RejectReason.DUPLICATE_MESSAGE.value,
                         f"sequence {batch.sequence} from {batch.source!r} was already received",
                         len(batch), message.message_bytes)
            return
        missing = status.missing if status.kind == SequenceKind.GAP else 0
        if missing:
            source["missing"] += missing
            self.writers["rejects"].write(message_reject_table(
                received_ns, batch.source, batch.sequence, RejectReason.SEQUENCE_GAP.value,
                f"{missing} message(s) missing before sequence {batch.sequence} "
                f"(expected {status.expected})", 0, 0))
        source["last_sequence"] = batch.sequence
        result = self.pipeline.feed(batch)
        for name, columns in result.archive.items():
            self.writers["archive"].write(archive_table(
                columns, batch.source, batch.sequence, name,
                self.pipeline.targets[name].tagger.model_ids))
        if result.rejected:
            self.writers["rejects"].write(rejects_table(batch, result, received_ns,
                                                        message.message_bytes))
            for reason in result.rejected_reason:
                self.rejected_by_reason[reason] = self.rejected_by_reason.get(reason, 0) + 1
        self._ledger(received_ns, batch.source, batch.sequence, "accepted", result.events,
                     result.tagged, result.filtered, result.rejected, missing,
                     result.first_tt_ns, result.last_tt_ns)

    def _refuse(self, received_ns, source, sequence, reason, detail, events, size) -> None:
        self.writers["rejects"].write(message_reject_table(received_ns, source, sequence,
                                                           reason, detail, events, size))
        self.rejected_by_reason[reason] = self.rejected_by_reason.get(reason, 0) + max(events, 1)
        self._ledger(received_ns, source, sequence, reason, events, 0, 0, events, 0, None, None)

    def _ledger(self, received_ns, source, sequence, outcome, events, tagged, filtered,
                rejected, missing, first, last) -> None:
        row = {"received_utc_ns": received_ns, "source": source, "sequence": sequence,
               "outcome": outcome, "events": events, "tagged": tagged, "filtered": filtered,
               "rejected": rejected, "missing_before": missing, "first_tt_ns": first,
               "last_tt_ns": last}
        self.writers["ledger"].write(ledger_table([row]))
        recovery.count_ledger_row(self.counters, row)
        self._rate.append((self.clock(), self.counters.get("events_received", 0)))

    # -- periodic work ------------------------------------------------------------
    def _every(self, name: str, period: float, now: float) -> bool:
        if now >= self._due.get(name, 0.0):
            self._due[name] = now + period
            return True
        return False

    def _periodic(self, now: float) -> None:
        c = self.config
        if self._every("update", c.statistics.update_every_s, now):
            self._updates(now)
        if self._every("clock", c.clock_check.every_s, now):
            self._clock_check(now)
        if self._every("status", STATUS_EVERY_S, now):
            self._write_status("running")
            for writer in self.writers.values():
                writer.check_rotation()
        if self._every("checkpoint", c.output.checkpoint_every_s, now):
            self._checkpoint()
        if self._every("reload", RELOAD_CHECK_S, now):
            self._reload_changed()
            self._extend_tables()
        if self._every("collect", COLLECT_EVERY_S, now):
            gc.collect()  # small per-message cycles otherwise wait for a rare full collection

    def _updates(self, now: float) -> None:
        computed = unix_to_ns(now)
        self._significance = self.pipeline.significance()
        self.writers["significance"].write(rows_table(self._significance, schemas.SIGNIFICANCE,
                                                      computed_at_utc_ns=computed))
        self._profiles = self.pipeline.profiles()
        self.writers["profiles"].write(rows_table(self._profiles, schemas.PROFILES,
                                                  computed_at_utc_ns=computed))
        if self._pending_since is not None:
            self._latencies.append(self.clock() - self._pending_since)
            self._pending_since = None
        if self.publisher is not None:
            self.publisher.send_multipart([b"significance", json.dumps(
                self._significance, default=_json_default).encode()])

    def _clock_check(self, now: float) -> None:
        self._clock = self.pipeline.clock_check()
        if self._clock:
            self.writers["clock"].write(clock_table(self._clock, unix_to_ns(now)))

    def _checkpoint(self) -> None:
        state = {
            "version": 1,
            "pipeline": self.pipeline.to_state(),
            "tracker": self.tracker.to_state(),
            "counters": dict(self.counters),
            "positions": {stem: list(w.position) for stem, w in self.writers.items()},
        }
        recovery.write_checkpoint(self.out, state)

    def _reload_changed(self, force: bool = False) -> list[str]:
        """Reload models and templates whose files changed (or all, with force).
        A bad file keeps the old model in use and is reported, never fatal."""
        changes = []
        for target in self.config.targets:
            paths = [Path(p) for p in target.models]
            changed = [p for p in paths if force or _mtime(p) != self._mtimes.get(p)]
            setup = self.pipeline.targets[target.name]
            try:
                if changed:
                    calculators = load_phase_calculators(paths)
                    for p in paths:
                        self._mtimes[p] = _mtime(p)
                    tagger = TargetTagger(target.name, calculators, setup.tagger.table)
                    restarted = self.pipeline.replace_models(target.name, tagger)
                    changes.append(f"{target.name}: models reloaded ({', '.join(tagger.model_ids)})"
                                   + ("; statistics restarted (new phase reference)"
                                      if restarted else ""))
                if target.template and (force or _mtime(target.template)
                                        != self._mtimes.get(Path(target.template))):
                    self._mtimes[Path(target.template)] = _mtime(target.template)
                    self.pipeline.replace_template(target.name, load_template(target.template))
                    changes.append(f"{target.name}: template reloaded")
            except (InputError, OSError) as exc:
                for p in paths:
                    self._mtimes[p] = _mtime(p)
                message = f"{target.name}: reload refused, previous model kept: {exc}"
                self.warnings.append(message)
                log.warning("%s", message)
        for change in changes:
            log.warning("%s", change)
        if changes:
            for writer in self.writers.values():
                writer.set_metadata(self._metadata())
        return changes

    def _extend_tables(self) -> None:
        """Keep the tables a day ahead of the latest event, built in the background."""
        if self._building is not None:
            if not self._building.done():
                return
            for name, table in self._building.result():
                self.pipeline.targets[name].tagger.table.add(table)
            self._building = None
        latest = max((m.latest_ns or 0 for ms in self.pipeline.moments.values() for m in ms),
                     default=0)
        stop = min(t.tagger.table.stop_ns for t in self.pipeline.targets.values())
        if latest and latest > stop - 12 * 3600 * NS_PER_S:
            jobs = [(name, t.position) for name, t in self.pipeline.targets.items()]

            def build():
                return [(name, self.tables.table(position, stop, stop + NS_PER_DAY))
                        for name, position in jobs]

            self._building = self._builder.submit(build)

    def _control(self) -> None:
        command = self.control.recv().decode(errors="replace").strip()
        if command == "status":
            reply = json.dumps(self.status("running"), default=_json_default)
        elif command == "reload":
            reply = json.dumps({"changes": self._reload_changed(force=True)})
        elif command == "checkpoint":
            self._checkpoint()
            reply = '{"ok": true}'
        elif command == "stop":
            self.stop()
            reply = '{"ok": true}'
        else:
            reply = json.dumps({"error": f"unknown command {command!r}; allowed: status, "
                                         "reload, checkpoint, stop"})
        self.control.send(reply.encode())

    # -- status and shutdown --------------------------------------------------------
    def status(self, state: str) -> dict:
        rows = getattr(self, "_significance", None) or self.pipeline.significance()
        profiles = {(p["target"], p["recipe"]): p
                    for p in (getattr(self, "_profiles", None) or [])}
        clock = {name: (recipe, verdict) for name, recipe, verdict, _ in
                 getattr(self, "_clock", [])}
        targets = []
        for name, setup in self.pipeline.targets.items():
            recipes = []
            for recipe in setup.recipes:
                windows = {r["window"]: {"events": r["events"], "h": r["h_statistic"],
                                         "harmonics": r["h_harmonics"], "sigma": r["h_sigma"],
                                         "sigma_post_trials": r["h_sigma_post_trials"]}
                           for r in rows if r["target"] == name and r["recipe"] == recipe.name}
                profile = profiles.get((name, recipe.name), {})
                recipes.append({"name": recipe.name, "weighted": recipe.use_weights,
                                "events": windows.get("cumulative", {}).get("events", 0),
                                "windows": windows,
                                "profile": {"counts": profile.get("counts", []),
                                            "errors": profile.get("errors", [])}})
            entry = {"name": name, "model_ids": setup.tagger.model_ids,
                     "frequency_hz": self.pipeline.frequency_hz(name), "recipes": recipes}
            if name in clock:
                recipe, verdict = clock[name]
                entry["clock"] = {"recipe": recipe, "status": verdict.status,
                                  "kind": verdict.kind, "lines": list(verdict.lines)}
            targets.append(entry)
        latency = sorted(self._latencies)
        return {
            "format": "turnstamp.status", "version": 1, "state": state,
            "computed_at_utc_ns": unix_to_ns(self.clock()), "started_utc": self.started_utc,
            "software": f"turnstamp {__version__}", "output": str(self.out),
            "counters": dict(self.counters), "rejected_by_reason": dict(self.rejected_by_reason),
            "events_per_s": self._events_per_s(),
            "sources": {name: {**self.sources.get(name, {}), "highest_sequence": highest}
                        for name, highest in self.tracker.highest().items()},
            "targets": targets, "trials": self.pipeline.trials,
            "update_latency_s": ({"p50": latency[len(latency) // 2],
                                  "p99": latency[int(0.99 * (len(latency) - 1))],
                                  "max": latency[-1]} if latency else None),
            "tables": {n: [t.tagger.table.start_ns, t.tagger.table.stop_ns]
                       for n, t in self.pipeline.targets.items()},
            "notes": list(self.notes)[-20:],
            "warnings": list(self.warnings)[-20:] + self._table_warnings(),
        }

    def _table_warnings(self) -> list[str]:
        """What the bundled tables say about the data's dates (stated, never fatal)."""
        latest = max((m.latest_ns or 0 for ms in self.pipeline.moments.values() for m in ms),
                     default=0)
        if not latest:
            return []
        mjd = 51_544.5 + latest / NS_PER_DAY
        out = []
        orientation = self.env.orientation
        if mjd > orientation.last_mjd:
            out.append(f"Earth orientation table ends at MJD {orientation.last_mjd:.0f}: UT1 and "
                       "polar motion held (barycentric times off by up to ~1.4 µs; events "
                       "flagged EARTH_ORIENTATION_HELD). Point site.earth_orientation_file "
                       "to a newer IERS finals2000A file.")
        elif mjd >= orientation.predicted_from_mjd:
            out.append(f"Earth orientation from IERS predictions since MJD "
                       f"{orientation.predicted_from_mjd:.0f} (a few ns at most)")
        if mjd > self.env.leaps.expires_mjd:
            out.append(f"leap-second table expired at MJD {self.env.leaps.expires_mjd}: a leap "
                       "second announced since would be missed (events flagged "
                       "LEAP_TABLE_EXPIRED); update astropy-iers-data")
        return out

    def _events_per_s(self) -> float:
        now = self.clock()
        recent = [(t, n) for t, n in self._rate if now - t <= 10.0]
        if len(recent) < 2 or recent[-1][0] == recent[0][0]:
            return 0.0
        return (recent[-1][1] - recent[0][1]) / (recent[-1][0] - recent[0][0])

    def _write_status(self, state: str) -> None:
        status = _finite(json.loads(json.dumps(self.status(state), default=_json_default)))
        atomic_write_json(self.out / "status.json", status)
        if self.publisher is not None:
            self.publisher.send_multipart([b"status", json.dumps(status).encode()])

    def _finish(self) -> None:
        now = self.clock()
        self._updates(now)
        self._clock_check(now)
        self._checkpoint()
        for writer in self.writers.values():
            writer.close()
        self._write_status("stopped")
        log.info("stopped: %s", self.counters)


def _mtime(path) -> float | None:
    try:
        return Path(path).stat().st_mtime
    except OSError:
        return None


def _finite(value):
    """Replace non-finite floats by None so that status.json is strict JSON."""
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v) for v in value]
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


def _json_default(value):
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value) if np.isfinite(value) else None
    if isinstance(value, np.ndarray):
        return value.tolist()
    return str(value)


def run_service(config_path: Path) -> int:
    """Load the configuration, install signal handlers, run until stopped."""
    service = Service(load_config(config_path))
    for number in (signal.SIGINT, signal.SIGTERM):
        signal.signal(number, service.stop)
    return service.run()
