"""Failing fast and loud: taken or invalid addresses, the banner and the summary, and
a status that says "failed" or "stopped" when it is."""

import json
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import zmq

from turnstamp.config import load_config
from turnstamp.service.loop import Service
from turnstamp.service.sockets import beyond_loopback
from turnstamp.wire.encode import encode_message


def _run(path: Path, timeout: float = 120) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "turnstamp", "run", str(path)],
                          capture_output=True, text=True, timeout=timeout)


@pytest.mark.parametrize("where", ["intake", "publish", "control"])
def test_a_taken_address_ends_the_run_at_once_naming_it(service_config, where):
    context = zmq.Context()
    with context.socket(zmq.PULL) as holder:
        port = holder.bind_to_random_port("tcp://127.0.0.1")
        taken = f"tcp://127.0.0.1:{port}"
        path = service_config(control=True, publish=True,
                              **({"intake": taken} if where == "intake" else {}))
        text = path.read_text()
        if where != "intake":
            key = "publish_endpoint" if where == "publish" else "endpoint"
            old = f'{key} = "tcp://127.0.0.1:*"'
            assert old in text
            path.write_text(text.replace(old, f'{key} = "{taken}"'))
        started = time.monotonic()
        result = _run(path)
        elapsed = time.monotonic() - started
    context.term()
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and taken in lines[0] and "taken" in lines[0], result.stderr
    assert "Traceback" not in result.stderr
    assert elapsed < 60  # before the tables are built, not after a silent wait


def test_an_invalid_address_is_one_line(service_config):
    path = service_config(intake="tcp://256.300.1.1:5555")
    result = _run(path)
    assert result.returncode == 2 and "Traceback" not in result.stderr
    assert "tcp://256.300.1.1:5555" in result.stderr and "intake.endpoints" in result.stderr


def test_binding_beyond_loopback_is_said(service_config):
    config = load_config(service_config(intake="tcp://0.0.0.0:*"))
    (line,) = beyond_loopback(config)
    assert "tcp://0.0.0.0:*" in line and "without CurveZMQ" in line
    assert beyond_loopback(load_config(service_config())) == []


def test_banner_at_start_summary_at_stop_and_failed_when_it_fails(service_config):
    config = load_config(service_config(control=True))
    out = Path(config.output.directory)
    said = []
    service = Service(config)
    service.say = said.append
    thread = threading.Thread(target=service.run, daemon=True)
    thread.start()
    deadline = time.time() + 60
    while not said and time.time() < deadline:
        time.sleep(0.02)
    banner = said[0]
    assert service.endpoints["intake"][0] in banner and service.endpoints["control"] in banner
    assert str(out) in banner and "lantern" in banner and "models" in banner
    service.stop()
    thread.join(timeout=60)
    assert "stopped" in said[-1] and "events" in said[-1]
    assert json.loads((out / "status.json").read_text())["state"] == "stopped"

    failing = Service(config)  # a bug of ours while running: said, files closed

    def broken(messages):
        raise RuntimeError("a broken invariant")

    failing.handle_queued = broken
    errors = []
    thread = threading.Thread(target=lambda: _catch(failing.run, errors), daemon=True)
    thread.start()
    deadline = time.time() + 60
    while not failing.endpoints and time.time() < deadline:
        time.sleep(0.02)
    context = zmq.Context()
    with context.socket(zmq.PUSH) as push:
        push.setsockopt(zmq.LINGER, 2000)
        push.connect(failing.endpoints["intake"][0])
        push.send_multipart(encode_message("b", 0, "UTC", {
            "event_id": np.arange(2, dtype=np.uint64), "time_ns": np.zeros(2, np.int64)}))
    context.term()
    thread.join(timeout=60)
    assert not thread.is_alive() and isinstance(errors[0], RuntimeError)
    status = json.loads((out / "status.json").read_text())
    assert status["state"] == "failed" and "a broken invariant" in status["error"]
    assert all(writer.closed for writer in failing.writers.values())


def _catch(function, errors):
    try:
        function()
    except Exception as exc:
        errors.append(exc)


def test_a_service_that_cannot_start_says_failed(tmp_path, service_config):
    path = service_config()
    (tmp_path / "lantern.toml").write_text("not a spin model")
    result = _run(path)
    assert result.returncode == 2 and "Traceback" not in result.stderr
    status = json.loads((tmp_path / "out" / "status.json").read_text())
    assert status["state"] == "failed" and "lantern.toml" in status["error"]
