"""Hostile senders at the intake and the control socket of a running service:
oversized messages are counted, a source name is bound to its CurveZMQ key, and the
control socket answers only key holders when CurveZMQ is on."""

import contextlib
import shutil
from pathlib import Path

import numpy as np
import zmq
import zmq.auth
from running import RunningService, wait_until

from turnstamp.config import load_config
from turnstamp.files.reader import read_stream
from turnstamp.wire.encode import encode_message
from turnstamp.wire.publisher import ask_sources


def _frames(source, sequence, events=3):
    return encode_message(source, sequence, "UTC", {
        "event_id": np.arange(events, dtype=np.uint64),
        "time_ns": np.zeros(events, np.int64)})


def test_a_message_far_over_the_size_limit_gets_a_ledger_row(service_config):
    config = load_config(service_config())  # max_message_bytes = 2 000 000
    out = Path(config.output.directory)
    context = zmq.Context()
    with RunningService(config) as service, context.socket(zmq.PUSH) as push:
        push.setsockopt(zmq.LINGER, 5000)
        push.connect(service.endpoints["intake"][0])
        header, body = _frames("big", 0)
        push.send_multipart([header, body + b"\x00" * 10_000_000])  # 5 times the limit
        push.send_multipart(_frames("big", 1))
        assert wait_until(lambda: service.counters.messages_received == 2, 20)
    context.term()
    ledger = read_stream(out, "ledger").to_pylist()
    assert [r["outcome"] for r in ledger] == ["oversized_message", "accepted"]
    rejects = read_stream(out, "rejects").to_pylist()
    assert rejects[0]["message_bytes"] > 10_000_000 and rejects[0]["events"] == 0


def _keys(tmp_path):
    keys, allowed = tmp_path / "keys", tmp_path / "allowed"
    keys.mkdir()
    allowed.mkdir()
    server_public, server_secret = zmq.auth.create_certificates(keys, "server")
    for name in ("alpha", "beta"):
        public, _ = zmq.auth.create_certificates(keys, name)
        shutil.copy(public, allowed)
    zmq.auth.create_certificates(keys, "stranger")
    return keys, allowed, server_secret


def _client(context, kind, keys, name):
    socket = context.socket(kind)
    socket.setsockopt(zmq.LINGER, 2000)
    public, secret = zmq.auth.load_certificate(str(keys / f"{name}.key_secret"))
    server, _ = zmq.auth.load_certificate(str(keys / "server.key"))
    socket.curve_publickey, socket.curve_secretkey, socket.curve_serverkey = public, secret, server
    return socket


def test_a_source_name_bound_to_a_key_and_a_control_socket_behind_curve(tmp_path,
                                                                        service_config):
    keys, allowed, server_secret = _keys(tmp_path)
    alpha_public, _ = zmq.auth.load_certificate(str(keys / "alpha.key"))
    path = service_config(control=True, curve=(server_secret, allowed))
    text = path.read_text().replace(
        "[intake.curve]", f'[intake.source_keys]\nalpha = "{alpha_public.decode()}"\n\n'
                          "[intake.curve]")
    path.write_text(text)
    config = load_config(path)
    out = Path(config.output.directory)
    context = zmq.Context()
    with RunningService(config) as service:
        intake, control = service.endpoints["intake"][0], service.endpoints["control"]
        with _client(context, zmq.PUSH, keys, "beta") as beta:
            beta.connect(intake)
            beta.send_multipart(_frames("alpha", 0))  # beta under alpha's name: refused
            beta.send_multipart(_frames("beta", 0))   # its own (unbound) name: accepted
        with _client(context, zmq.PUSH, keys, "alpha") as alpha:
            alpha.connect(intake)
            alpha.send_multipart(_frames("alpha", 1))
        assert wait_until(lambda: service.counters.messages_received == 3, 20)
        public, secret = zmq.auth.load_certificate(str(keys / "alpha.key_secret"))
        server, _ = zmq.auth.load_certificate(str(keys / "server.key"))
        sources = ask_sources(control, context=context, curve=(server, public, secret))
        assert set(sources) == {"alpha", "beta"}  # a key holder is answered
        with context.socket(zmq.REQ) as plain, \
                _client(context, zmq.REQ, keys, "stranger") as stranger:
            for socket in (plain, stranger):  # neither is ever answered
                socket.setsockopt(zmq.LINGER, 0)
                # a refused handshake can leave a REQ socket without a peer to queue
                # to, and its send would then wait for ever (it hung CI once)
                socket.setsockopt(zmq.SNDTIMEO, 1000)
                socket.connect(control)
                with contextlib.suppress(zmq.Again):
                    socket.send(b"status")
            assert not plain.poll(1000) and not stranger.poll(200)
    context.term()
    ledger = read_stream(out, "ledger").to_pylist()
    outcomes = {(r["source"], r["sequence"]): r["outcome"] for r in ledger}
    assert outcomes == {("alpha", 0): "source_not_authorised", ("beta", 0): "accepted",
                        ("alpha", 1): "accepted"}
