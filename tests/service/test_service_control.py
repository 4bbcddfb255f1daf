"""The control socket of a running service: no client can crash or stall it."""

import json
from pathlib import Path

import numpy as np
import zmq
from running import RunningService, wait_until

from turnstamp.config import load_config
from turnstamp.wire.encode import encode_message


def _reply(socket, timeout_ms=3000):
    assert socket.poll(timeout_ms, zmq.POLLIN), "no reply within the time limit"
    return socket.recv_multipart()


def test_hostile_control_clients_neither_crash_nor_stall_the_service(service_config):
    config = load_config(service_config(control=True))
    context = zmq.Context()
    running = RunningService(config)
    with running as service:
        endpoint = service.endpoints["control"]
        # a REQ client sending two frames: answered with an error, the service lives
        with context.socket(zmq.REQ) as req:
            req.connect(endpoint)
            req.send_multipart([b"status", b"x"])
            (reply,) = _reply(req)
            assert "one frame" in json.loads(reply)["error"]
        # a DEALER without the empty delimiter: answered at once, in its own envelope
        with context.socket(zmq.DEALER) as dealer:
            dealer.connect(endpoint)
            dealer.send(b"status")
            (reply,) = _reply(dealer)
            assert json.loads(reply)["state"] == "running"
            dealer.send_multipart([b"", b"\xff\xfe"])  # not UTF-8
            assert "UTF-8" in json.loads(_reply(dealer)[-1])["error"]
            dealer.send_multipart([b"a", b"b", b"c", b"d"])
            assert "error" in json.loads(_reply(dealer)[-1])
            dealer.send(b"")  # an empty delimiter and no command
            assert "got 0 frames" in json.loads(_reply(dealer)[-1])["error"]
            dealer.send_multipart([b"", b"dance"])
            assert "unknown command" in json.loads(_reply(dealer)[-1])["error"]
        # a huge frame is dropped by ZeroMQ; a client that never reads its replies
        with context.socket(zmq.DEALER) as huge, context.socket(zmq.DEALER) as deaf:
            huge.connect(endpoint)
            huge.send(b"s" * 10_000_000)
            deaf.connect(endpoint)
            for _ in range(500):
                deaf.send(b"status", flags=zmq.NOBLOCK)
            # meanwhile the intake still takes events and a good client is answered
            with context.socket(zmq.PUSH) as push, context.socket(zmq.REQ) as req:
                push.connect(service.endpoints["intake"][0])
                push.send_multipart(encode_message(
                    "control-test", 0, "UTC", {"event_id": np.arange(3, dtype=np.uint64),
                                               "time_ns": np.zeros(3, np.int64)}))
                assert wait_until(lambda: service.counters.messages_received == 1, 5)
                req.connect(endpoint)
                req.send(b"sources")
                (reply,) = _reply(req)
                assert "control-test" in json.loads(reply)["sources"]
        assert running.thread.is_alive()
    context.term()
    status = json.loads((Path(config.output.directory) / "status.json").read_text())
    assert status["state"] == "stopped"  # the loop ran to its normal end
