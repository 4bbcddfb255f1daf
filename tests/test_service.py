"""The live service on loopback with real sockets and real files."""

import json
import os
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
import zmq

from turnstamp.config import ServiceConfig
from turnstamp.core.simulate import NightPlan, simulate_night
from turnstamp.core.timebase import unix_to_ns
from turnstamp.files import schemas
from turnstamp.files.reader import read_stream, stream_files
from turnstamp.service.loop import Service
from turnstamp.wire.encode import encode_message


def load(path: Path) -> ServiceConfig:
    from turnstamp.config import load_config

    return load_config(path)


class Running:
    """A Service on a thread (signals belong to the main thread: stop() instead)."""

    def __init__(self, config: ServiceConfig):
        self.service = Service(config)
        self.thread = threading.Thread(target=self.service.run, daemon=True)

    def __enter__(self):
        self.thread.start()
        status = Path(self.service.config.output.directory) / "status.json"
        assert wait_for(lambda: self.service.endpoints and status.exists(), 60)
        return self.service

    def __exit__(self, *exc):
        self.service.stop()
        self.thread.join(timeout=60)
        assert not self.thread.is_alive()


def night_batches(demo_env, lantern, night_start_tt, seconds=30, seed=5):
    plan = NightPlan(start_tt_ns=night_start_tt, duration_s=seconds, pulsed_rate_hz=100,
                     background_rate_hz=900, template=lantern.template, batch_seconds=2.0,
                     seed=seed, source="kestrel-test")
    return list(simulate_night(plan, lantern.tagger, lantern.position, demo_env.leaps))


def push(endpoint: str, messages: list[list[bytes]]) -> None:
    context = zmq.Context()
    with context.socket(zmq.PUSH) as sock:
        sock.setsockopt(zmq.LINGER, 5000)
        sock.connect(endpoint)
        for frames in messages:
            sock.send_multipart(frames)
    context.term()


def frames_of(batch, sequence=None):
    return encode_message(batch.source, batch.sequence if sequence is None else sequence,
                          "UTC", batch.columns())


def wait_for(predicate, timeout=30.0):
    deadline = time.time() + timeout
    while time.time() < deadline:
        if predicate():
            return True
        time.sleep(0.05)
    return False


def status(out: Path) -> dict:
    return json.loads((out / "status.json").read_text())


def test_every_event_sent_is_accounted_for_in_the_files(tmp_path, service_config, demo_env,
                                                        lantern, night_start_tt):
    out = tmp_path / "out"
    batches = night_batches(demo_env, lantern, night_start_tt)
    messages = [frames_of(b) for b in batches]
    good = sum(len(b) for b in batches)
    bad = batches[3].take(np.arange(20))
    bad_times = bad.time_ns.copy()
    bad_times[:5] = np.iinfo(np.int64).min  # null times
    messages += [
        [b"not json", b"\x00\x01"],                                    # malformed
        [json.dumps({"format": "turnstamp.events", "version": 99, "source": "x", "sequence": 0,
                     "time_scale": "UTC", "events": 0}).encode(), b""],  # wrong version
        frames_of(batches[1]),                    # duplicate (0 again would mean a restart)
        encode_message("kestrel-test", len(batches) + 3, "UTC",         # a gap of 3, 5 bad
                       {**bad.columns(), "time_ns": bad_times,
                        "event_id": np.arange(10**9, 10**9 + 20, dtype=np.uint64)}),
    ]
    with Running(load(service_config())) as service:
        endpoint = service.endpoints["intake"][0]
        assert not endpoint.endswith(":*")  # the port ZeroMQ chose, also in status.json
        assert status(out)["endpoints"]["intake"] == [endpoint]
        push(endpoint, messages)
        expected = good + len(batches[1]) + 20
        assert wait_for(lambda: status(out)["counters"].get("events_received") == expected)
    counters = status(out)["counters"]
    assert status(out)["state"] == "stopped"
    assert counters["messages_received"] == len(messages)
    assert counters["messages_rejected"] == 3
    assert counters["missing_messages"] == 3
    assert counters["events_received"] == (counters["events_tagged"] + counters["events_filtered"]
                                           + counters["events_rejected"])
    archive = read_stream(out, "archive")
    rejects = read_stream(out, "rejects")
    ledger = read_stream(out, "ledger")
    # the files alone account for every event
    assert archive.num_rows == counters["events_tagged"]
    assert ledger["events"].to_numpy().sum() == expected
    assert sum(rejects["events"].to_pylist()) == counters["events_rejected"]
    reasons = set(rejects["reason"].to_pylist())
    assert {"malformed_message", "wrong_version", "duplicate_message", "sequence_gap",
            "bad_time"} <= reasons
    # every output follows its documented schema (field names and types)
    for stem, schema in schemas.OUTPUTS.items():
        files = stream_files(out, stem)
        assert files, stem
        for path in files:
            table = pa.ipc.open_stream(str(path)).read_all()  # closed files are complete
            assert table.schema.remove_metadata().equals(schema.remove_metadata()), stem


def test_statistics_in_the_files_match_the_archive(tmp_path, service_config, demo_env, lantern,
                                                  night_start_tt):
    out = tmp_path / "out"
    batches = night_batches(demo_env, lantern, night_start_tt, seconds=20)
    with Running(load(service_config())) as service:
        push(service.endpoints["intake"][0], [frames_of(b) for b in batches])
        total = sum(len(b) for b in batches)
        assert wait_for(lambda: status(out)["counters"].get("events_received") == total)
    archive = read_stream(out, "archive")
    significance = read_stream(out, "significance")
    last = {(r["recipe"], r["window"]): r for r in significance.to_pylist()}
    flags = archive["recipe_flags"].to_numpy()
    assert last[("all", "cumulative")]["events"] == int(((flags & 1) == 1).sum())
    assert last[("hard", "cumulative")]["events"] == int(((flags & 2) == 2).sum())
    profiles = read_stream(out, "profiles").to_pylist()
    final = [p for p in profiles if p["recipe"] == "all"][-1]
    assert sum(final["counts"]) == pytest.approx(float(((flags & 1) == 1).sum()))
    clock = read_stream(out, "clock").to_pylist()[-1]
    assert clock["status"] in ("OK", "WARN", "FAIL") and clock["summary"]


def test_kill_minus_nine_then_restart_loses_nothing_with_resend(tmp_path, service_config,
                                                                demo_env, lantern,
                                                                night_start_tt):
    # A kill -9 loses what the service had not committed (at most the message it was
    # processing, plus what ZeroMQ had queued in its memory). The recovery procedure:
    # restart, read what the service lacks per source, resend exactly that.
    from turnstamp.wire.publisher import EventPublisher

    out = tmp_path / "out"
    context = zmq.Context()
    # the event builder binds (and keeps its port over the restart); the service connects
    publisher = EventPublisher("tcp://127.0.0.1:*", "kestrel-test", bind=True,
                               context=context, keep_last=1000)
    config = service_config(control=True, intake=publisher.last_endpoint, bind=False)
    batches = night_batches(demo_env, lantern, night_start_tt, seconds=60, seed=9)
    first, second = batches[:15], batches[15:]
    command = [sys.executable, "-m", "turnstamp", "run", str(config)]

    service, _ = _start_process(command, out)
    for batch in first:
        publisher.send(**batch.columns())
    assert wait_for(lambda: status(out)["counters"].get("messages_received", 0) >= 3)
    service.send_signal(signal.SIGKILL)  # in the middle of the stream
    service.wait(timeout=30)
    for stem in schemas.OUTPUTS:  # the open files read up to their last complete batch
        read_stream(out, stem)

    service, started = _start_process(command, out)
    try:
        resumed = _ask(context, started["endpoints"]["control"], b"status")
        counters = resumed["counters"]
        assert counters["events_received"] == (counters["events_tagged"]
                                               + counters["events_filtered"]
                                               + counters["events_rejected"])
        publisher.resend(resumed["sources"].get("kestrel-test", {}))  # the README's recipe
        for batch in second:
            publisher.send(**batch.columns())
        total = sum(len(b) for b in batches)
        assert wait_for(lambda: status(out)["counters"]["events_received"]
                        - _duplicate_events(out) >= total, 60)
    finally:
        service.send_signal(signal.SIGTERM)
        assert service.wait(timeout=60) == 0
        publisher.close(linger_ms=0)
        context.term()
    _check_complete_after_restart(out, total)


def _start_process(command: list[str], out: Path) -> tuple[subprocess.Popen, dict]:
    """``turnstamp run`` in its own process; returns it and its first status (a status
    file left by an earlier run is older than this start)."""
    since = unix_to_ns(time.time())
    environment = {**os.environ, "PYTHONUNBUFFERED": "1"}
    process = subprocess.Popen(command, env=environment, stderr=subprocess.DEVNULL)
    fresh = {}

    def started() -> bool:
        try:
            fresh.update(status(out))
        except FileNotFoundError:
            return False
        return fresh["state"] == "running" and fresh["computed_at_utc_ns"] >= since

    assert wait_for(started, 60)
    return process, fresh


def _ask(context: zmq.Context, endpoint: str, command: bytes) -> dict:
    """One command on the service's control socket; its JSON reply."""
    with context.socket(zmq.REQ) as request:
        request.setsockopt(zmq.RCVTIMEO, 30000)
        request.setsockopt(zmq.LINGER, 0)
        request.connect(endpoint)
        request.send(command)
        return json.loads(request.recv())


def _check_complete_after_restart(out: Path, total: int) -> None:
    counters = status(out)["counters"]
    assert counters["events_received"] == (counters["events_tagged"]
                                           + counters["events_filtered"]
                                           + counters["events_rejected"])
    # nothing lost, nothing archived twice: duplicates (a resend overlapping what
    # arrived before the kill was noticed) are refused and counted
    assert counters["events_received"] - _duplicate_events(out) == total
    archive = read_stream(out, "archive")
    assert archive.num_rows == counters["events_tagged"]
    ids = archive["event_id"].to_numpy()
    assert np.unique(ids).size == ids.size
    # after SIGTERM every file is complete, with its end-of-stream marker
    for stem in schemas.OUTPUTS:
        for path in stream_files(out, stem):
            assert path.read_bytes()[-8:] == b"\xff\xff\xff\xff\0\0\0\0"
            pa.ipc.open_stream(str(path)).read_all()
    # statistics resumed: the final cumulative fold counts every archived 'all' event
    significance = read_stream(out, "significance").to_pylist()
    final = [r for r in significance if r["recipe"] == "all" and r["window"] == "cumulative"][-1]
    assert final["events"] == int((archive["recipe_flags"].to_numpy() & 1).sum())


def _duplicate_events(out: Path) -> int:
    ledger = read_stream(out, "ledger")
    outcome = np.array(ledger["outcome"].to_pylist())
    return int(ledger["events"].to_numpy()[outcome == "duplicate_message"].sum())


def test_models_reload_while_running_and_every_row_names_its_model(tmp_path, service_config,
                                                                   demo_env, lantern,
                                                                   night_start_tt):
    out = tmp_path / "out"
    config = load(service_config(control=True))
    batches = night_batches(demo_env, lantern, night_start_tt, seconds=20)
    model = tmp_path / "lantern.toml"
    with Running(config) as service:
        endpoint, control = service.endpoints["intake"][0], service.endpoints["control"]
        push(endpoint, [frames_of(b) for b in batches[:5]])
        assert wait_for(lambda: status(out)["counters"].get("messages_received") == 5)
        model.write_text(model.read_text().replace('"lantern-2026a"', '"lantern-2026b"'))
        context = zmq.Context()
        reply = _ask(context, control, b"reload")
        context.term()
        assert any("lantern-2026b" in change for change in reply["changes"])
        push(endpoint, [frames_of(b) for b in batches[5:]])
        assert wait_for(lambda: status(out)["counters"].get("messages_received")
                        == len(batches))
        model.write_text("frequency_hz = 'broken'")  # a bad file must not stop anything
        assert wait_for(lambda: any("reload refused" in w for w in status(out)["warnings"]))
    archive = read_stream(out, "archive")
    models = archive["model_id"].to_pylist()
    sequences = archive["sequence"].to_numpy()
    assert set(models[: int((sequences < 5).sum())]) == {"lantern-2026a"}
    assert set(np.array(models)[sequences >= 5]) == {"lantern-2026b"}


def test_live_updates_are_published(service_config, demo_env, lantern, night_start_tt):
    config = load(service_config(publish=True))
    batches = night_batches(demo_env, lantern, night_start_tt, seconds=10)
    context = zmq.Context()
    sub = context.socket(zmq.SUB)
    sub.setsockopt(zmq.SUBSCRIBE, b"status")
    sub.setsockopt(zmq.RCVTIMEO, 10000)
    try:
        with Running(config) as service:
            sub.connect(service.endpoints["publish"])
            push(service.endpoints["intake"][0], [frames_of(b) for b in batches])
            total = sum(len(b) for b in batches)
            message = None
            deadline = time.time() + 30
            while time.time() < deadline:
                topic, body = sub.recv_multipart()
                message = json.loads(body)
                if message["counters"].get("events_received") == total:
                    break
            assert message["format"] == "turnstamp.status"
            assert message["counters"]["events_received"] == total
            assert message["targets"][0]["recipes"][0]["profile"]["counts"]
    finally:
        sub.close(linger=0)
        context.term()


def test_curve_keys_authenticate_and_encrypt_the_intake(tmp_path, service_config, demo_env,
                                                        lantern, night_start_tt):
    import zmq.auth

    out = tmp_path / "out"
    keys = tmp_path / "keys"
    allowed = tmp_path / "allowed"
    keys.mkdir()
    allowed.mkdir()
    server_public, server_secret = zmq.auth.create_certificates(keys, "server")
    client_public, client_secret = zmq.auth.create_certificates(keys, "client")
    _, stranger_secret = zmq.auth.create_certificates(keys, "stranger")
    shutil.copy(client_public, allowed)
    path = service_config(curve=(server_secret, allowed))
    batches = night_batches(demo_env, lantern, night_start_tt, seconds=6)

    def send(endpoint, secret_file, batch_list):
        context = zmq.Context()
        public, secret = zmq.auth.load_certificate(str(secret_file))
        server_key, _ = zmq.auth.load_certificate(str(server_public))
        with context.socket(zmq.PUSH) as sock:
            sock.curve_publickey, sock.curve_secretkey = public, secret
            sock.curve_serverkey = server_key
            sock.setsockopt(zmq.LINGER, 2000)
            sock.connect(endpoint)
            for b in batch_list:
                sock.send_multipart(frames_of(b))
        context.term()

    with Running(load(path)) as service:
        endpoint = service.endpoints["intake"][0]
        send(endpoint, keys / "stranger.key_secret", batches[:1])
        send(endpoint, keys / "client.key_secret", batches[1:])
        expected = sum(len(b) for b in batches[1:])
        assert wait_for(lambda: status(out)["counters"].get("events_received") == expected)
        time.sleep(0.5)
        assert status(out)["counters"]["events_received"] == expected  # stranger refused
    del stranger_secret, client_secret, server_secret


def test_live_view_draws_the_running_service(tmp_path, service_config, demo_env, lantern,
                                             night_start_tt):
    # Issue acceptance: the live view driven against a running service on loopback,
    # its rendered output read as a string (no terminal needed).
    import io

    from turnstamp.views.live import run_watch

    out = tmp_path / "out"
    config = load(service_config(publish=True))
    batches = night_batches(demo_env, lantern, night_start_tt, seconds=20)
    total = sum(len(b) for b in batches)
    with Running(config) as service:
        push(service.endpoints["intake"][0], [frames_of(b) for b in batches])
        assert wait_for(lambda: status(out)["counters"].get("events_received") == total)
        time.sleep(1.5)  # the next published status carries the final counts
        screen = io.StringIO()
        assert run_watch(endpoint=service.endpoints["publish"], once=True, out=screen,
                         color=False, timeout_s=20) == 0
        folder_screen = io.StringIO()
        assert run_watch(folder=str(out), once=True, out=folder_screen, color=False) == 0
    text = screen.getvalue()
    assert "lantern" in text and "hard" in text
    assert f"{total:,}" in text  # the counters line
    assert "\x1b[" not in text  # plain text when not a terminal
    assert "clock" in text.lower()
    assert "lantern" in folder_screen.getvalue()


def test_reject_counts_by_reason_survive_a_restart(tmp_path, service_config, demo_env,
                                                   lantern, night_start_tt):
    out = tmp_path / "out"
    batches = night_batches(demo_env, lantern, night_start_tt, seconds=6)
    bad = batches[0].take(np.arange(20))
    bad_times = bad.time_ns.copy()
    bad_times[:5] = np.iinfo(np.int64).min  # null times
    messages = [encode_message("kestrel-test", 0, "UTC", {**bad.columns(), "time_ns": bad_times}),
                [b"not json", b"\x00\x01"]]
    config = load(service_config())
    with Running(config) as service:
        push(service.endpoints["intake"][0], messages)
        assert wait_for(lambda: status(out)["counters"].get("messages_received") == 2)
    before = status(out)["rejected_by_reason"]
    assert before == {"bad_time": 5, "malformed_message": 1}
    with Running(config):
        assert wait_for(lambda: status(out)["state"] == "running")
    assert status(out)["rejected_by_reason"] == before
