"""The README's resend recipe, run as written: a sender at full rate with messages
queued at it, the service killed with SIGKILL and restarted, the recipe applied ->
every message committed once, every event archived once."""

import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time

import numpy as np
import zmq
from running import wait_until

from turnstamp.core.simulate import NightPlan, simulate_night
from turnstamp.core.timebase import unix_to_ns
from turnstamp.files.reader import read_stream
from turnstamp.wire.publisher import EventPublisher, ask_sources

SOURCE = "kestrel-test"
MESSAGES = 1500


def _free_port() -> int:
    """A loopback port free now (the sender must reconnect to the same one)."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]




def _status(out):
    try:
        return json.loads((out / "status.json").read_text())
    except (FileNotFoundError, json.JSONDecodeError):
        return {}


def _start(command, out):
    since = unix_to_ns(time.time())
    process = subprocess.Popen(command, env={**os.environ, "PYTHONUNBUFFERED": "1"},
                               stderr=subprocess.DEVNULL, stdout=subprocess.DEVNULL)
    assert wait_until(lambda: _status(out).get("state") == "running"
                      and _status(out)["computed_at_utc_ns"] >= since, 60, 0.05)
    return process


def _messages(demo_env, lantern, night_start_tt):
    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=300, pulsed_rate_hz=100,
                     background_rate_hz=900, template=lantern.template, batch_seconds=2.0,
                     seed=11, source=SOURCE)
    batches = list(simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps))
    columns = {k: np.concatenate([b.columns()[k] for b in batches])
               for k in batches[0].columns()}
    columns["event_id"] = np.arange(len(columns["event_id"]), dtype=np.uint64)
    parts = np.array_split(np.arange(len(columns["event_id"])), MESSAGES)
    return [{k: v[part] for k, v in columns.items()} for part in parts]


class Sender(threading.Thread):
    """Sends every message at full rate; after ``restarted`` is set it applies the
    recipe once, from its own thread (a ZeroMQ socket belongs to one thread)."""

    def __init__(self, publisher, messages, control):
        super().__init__(daemon=True)
        self.publisher, self.messages, self.control = publisher, messages, control
        self.restarted = threading.Event()
        self.resent = None
        self.failure = None

    def run(self):
        try:
            for columns in self.messages:
                self._recipe_when_due()
                while True:
                    try:
                        self.publisher.send(**columns)
                        break
                    except zmq.Again:  # the service is down: its queue here is full
                        self._recipe_when_due()
            while self.resent is None:
                self._recipe_when_due()
                time.sleep(0.01)
        except Exception as exc:  # reported by the test
            self.failure = exc

    def _recipe_when_due(self):
        if self.resent is not None or not self.restarted.is_set():
            return
        # the recipe of the README: ask the service what it lacks, resend exactly that
        report = ask_sources(self.control).get(SOURCE, {})
        self.resent = self.publisher.resend(report)
        while self.publisher.resend_pending:  # a send timed out partway: resume
            self.resent += self.publisher.resend()


def test_the_readme_resend_recipe_after_a_kill_with_a_sender_at_full_rate(
        tmp_path, service_config, demo_env, lantern, night_start_tt):
    out = tmp_path / "out"
    intake = f"tcp://127.0.0.1:{_free_port()}"
    control = f"tcp://127.0.0.1:{_free_port()}"
    path = service_config(intake=intake)
    path.write_text(path.read_text() + f'\n[control]\nendpoint = "{control}"\n')
    messages = _messages(demo_env, lantern, night_start_tt)
    total = sum(len(m["event_id"]) for m in messages)
    command = [sys.executable, "-m", "turnstamp", "run", str(path)]
    context = zmq.Context()
    publisher = EventPublisher(intake, SOURCE, context=context, keep_last=MESSAGES,
                               send_timeout_ms=20, high_water_mark=50)
    service = _start(command, out)
    sender = Sender(publisher, messages, control)
    sender.start()
    try:
        # frozen mid-stream, once it has committed some messages (before the first one
        # it cannot know what it lacks), so that what the sender pushes then waits in
        # its socket buffers and queues: running, it keeps up with this sender
        assert wait_until(lambda: ask_sources(control).get(SOURCE, {})
                          .get("committed_through", -1) >= 20, 60, 0.001)
        service.send_signal(signal.SIGSTOP)
        assert wait_until(lambda: _stalled(publisher), 30)
        service.send_signal(signal.SIGKILL)  # messages in its memory and buffers are lost
        service.wait(timeout=30)
        wait_until(lambda: publisher.sequence >= 200 or not sender.is_alive(), 20)
        service = _start(command, out)
        # the messages queued at the sender arrive first, past what the kill lost: the
        # highest number alone would hide the gap (resend_after(highest) loses it)
        wait_until(lambda: _status(out).get("sources", {}).get(SOURCE, {})
                   .get("missing_ranges"), 15, 0.05)
        sender.restarted.set()
        sender.join(timeout=120)
        assert not sender.is_alive() and sender.failure is None, sender.failure
        assert wait_until(lambda: _committed(out) == set(range(MESSAGES)), 60)
    finally:
        service.send_signal(signal.SIGTERM)
        assert service.wait(timeout=60) == 0
        publisher.close(linger_ms=0)
        context.term()
    ledger = read_stream(out, "ledger").to_pylist()
    accepted = [r["sequence"] for r in ledger if r["outcome"] == "accepted"]
    assert sorted(accepted) == list(range(MESSAGES))  # each message committed once
    archive = read_stream(out, "archive")
    ids = archive["event_id"].to_numpy()
    assert np.unique(ids).size == ids.size  # no event archived twice
    counters = _status(out)["counters"]
    duplicates = sum(r["events"] for r in ledger if r["outcome"] == "duplicate_message")
    assert counters["events_received"] - duplicates == total
    assert archive.num_rows == counters["events_tagged"]
    assert sender.resent > 0


def _stalled(publisher, seconds=0.3) -> bool:
    """The sender sent nothing for ``seconds``: its queue to the service is full."""
    before = publisher.sequence
    time.sleep(seconds)
    return publisher.sequence == before


def _committed(out) -> set:
    try:
        ledger = read_stream(out, "ledger")
    except Exception:  # a file being written: try again
        return set()
    return {s for s, o in zip(ledger["sequence"].to_pylist(), ledger["outcome"].to_pylist(),
                              strict=True) if o == "accepted"}
