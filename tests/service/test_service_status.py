"""The status document's serialisation, the activity figures and the control socket."""

import json

import numpy as np
import pytest
import zmq

from turnstamp.service.control import answer
from turnstamp.service.status import Activity, json_text


def test_status_text_is_strict_json_made_once():
    document = {"counts": np.arange(3), "h": np.float64("nan"), "sigma": float("inf"),
                "n": np.int64(7), "ok": np.bool_(True), "kind": None,
                "pairs": (1.5, np.float32(2.5)), "name": "µs"}
    text = json_text(document)
    assert text.endswith("\n") and "NaN" not in text and "Infinity" not in text
    assert json.loads(text) == {"counts": [0, 1, 2], "h": None, "sigma": None, "n": 7,
                                "ok": True, "kind": None, "pairs": [1.5, 2.5], "name": "µs"}
    assert "\n" not in json_text(document, indent=None)


def test_event_rate_and_update_latency():
    activity = Activity()
    assert activity.events_per_s(100.0) == 0.0 and activity.latency() is None
    activity.arrived(100.0)
    activity.counted(100.0, 1_000)
    activity.arrived(101.0)  # still waiting since 100.0
    activity.counted(102.0, 5_000)
    assert activity.events_per_s(102.0) == pytest.approx(2_000.0)
    assert activity.events_per_s(200.0) == 0.0  # nothing in the last ten seconds
    activity.updated(102.5)
    assert activity.latency() == {"p50": 2.5, "p99": 2.5, "max": 2.5}


def test_control_answers_known_commands_and_names_them_otherwise():
    context = zmq.Context()
    try:
        with context.socket(zmq.ROUTER) as server, context.socket(zmq.REQ) as client:
            server.bind("inproc://control")
            client.connect("inproc://control")
            known = {"status": lambda: '{"state": "running"}', "stop": lambda: '{"ok": true}'}
            client.send(b"status\n")
            assert server.poll(5000)
            answer(server, known)
            assert json.loads(client.recv()) == {"state": "running"}
            client.send(b"dance")
            assert server.poll(5000)
            answer(server, known)
            assert json.loads(client.recv()) == {
                "error": "unknown command 'dance'; allowed: status, stop"}
    finally:
        context.term()
