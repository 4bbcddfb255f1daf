"""The service's sockets: intake, control and publish, set up in one place.

Theory of operation
-------------------
``open_sockets`` makes every socket of the service on one context and hands each
to an ``ExitStack``, so they close (linger 0) however the loop ends, before the
context terminates. Endpoints may name port ``*``; the ports ZeroMQ chose are read
back (``LAST_ENDPOINT``) into ``Sockets.endpoints``.

Fail fast: an address that is taken or invalid raises a ``ConfigError`` naming the
configuration field and the address (one line, exit status 2), never a traceback
or a silent wait. ``check_endpoints`` tries every address the service binds before
the long set-up (tables, recovery), so a taken port is reported at once. Binding
beyond loopback is allowed but said (``beyond_loopback``).

With CurveZMQ (``[intake.curve]``), the intake and the control socket are both
CurveZMQ servers with the same key, and the one authenticator admits the clients
whose public certificates are in ``authorized_clients_directory``. The publish
socket (live updates, read-only) stays open to every local viewer.
"""

from __future__ import annotations

import re
from contextlib import ExitStack
from dataclasses import dataclass, field

import zmq

from ..config import CurveConfig, IntakeConfig, ServiceConfig
from ..errors import ConfigError

__all__ = ["ZMQ_SIZE_LIMIT_FACTOR", "CONTROL_MAX_BYTES", "Sockets", "open_sockets",
           "check_endpoints", "beyond_loopback", "bound_endpoints"]

ZMQ_SIZE_LIMIT_FACTOR = 16
"""ZeroMQ itself closes a sender's connection on a frame above this many
``max_message_bytes`` (a bound on intake memory); messages between the limit and
this are received and refused with a rejects row."""
CONTROL_MAX_BYTES = 64 * 1024  # a control request is one word: larger frames are dropped
CONTROL_HIGH_WATER_MARK = 100  # replies queued per client; a client that never reads loses them
PUBLISH_HIGH_WATER_MARK = 100  # viewers get the newest updates, not a backlog
_LOOPBACK = re.compile(r"^tcp://(127\.\d+\.\d+\.\d+|localhost|\[::1\]|::1):")


@dataclass
class Sockets:
    """The open sockets of a running service (publisher and control are optional)."""

    intake: zmq.Socket
    publisher: zmq.Socket | None = None
    control: zmq.Socket | None = None
    endpoints: dict = field(default_factory=dict)
    """Endpoints as bound or connected: ``intake`` (a list), ``publish``, ``control``."""


def bound_endpoints(config: ServiceConfig) -> list[tuple[str, str]]:
    """(configuration field, endpoint) of every address the service binds."""
    out = [("intake.endpoints", e) for e in config.intake.endpoints] if config.intake.bind \
        else []
    if config.output.publish_endpoint:
        out.append(("output.publish_endpoint", config.output.publish_endpoint))
    if config.control.endpoint:
        out.append(("control.endpoint", config.control.endpoint))
    return out


def beyond_loopback(config: ServiceConfig) -> list[str]:
    """A warning per TCP address bound beyond loopback (reachable from other hosts)."""
    return [f"{name} = {endpoint} is reachable beyond this host"
            + ("" if name == "intake.endpoints" and config.intake.curve is not None
               else " without CurveZMQ") + "; bind 127.0.0.1 unless that is intended"
            for name, endpoint in bound_endpoints(config)
            if endpoint.startswith("tcp://") and not _LOOPBACK.match(endpoint)]


def check_endpoints(config: ServiceConfig) -> None:
    """Bind and release every address the service binds; ConfigError at the first
    one that is taken or invalid."""
    context = zmq.Context()
    try:
        for name, endpoint in bound_endpoints(config):
            with context.socket(zmq.PULL) as probe:
                probe.setsockopt(zmq.LINGER, 0)
                _attach(probe, endpoint, name, bind=True)
    finally:
        context.term()


def _attach(socket: zmq.Socket, endpoint: str, name: str, bind: bool = True) -> str:
    """Bind (or connect) ``socket``; the endpoint as attached. ConfigError otherwise."""
    try:
        (socket.bind if bind else socket.connect)(endpoint)
    except zmq.ZMQError as exc:
        problem = ("the address is taken (another turnstamp or program is using it)"
                   if exc.errno == zmq.EADDRINUSE else f"cannot {'bind' if bind else 'connect'}:"
                   f" {exc.strerror}")
        raise ConfigError(name, endpoint, problem) from None
    return socket.getsockopt_string(zmq.LAST_ENDPOINT)


def open_sockets(context: zmq.Context, config: ServiceConfig, stack: ExitStack) -> Sockets:
    """Every socket the configuration asks for; ``stack`` closes them."""
    curve = config.intake.curve
    if curve is not None:  # the authenticator outlives the sockets it guards
        from zmq.auth.thread import ThreadAuthenticator

        authenticator = ThreadAuthenticator(context)
        authenticator.start()
        stack.callback(authenticator.stop)
        authenticator.configure_curve(domain="*",
                                      location=str(curve.authorized_clients_directory))
    intake, endpoints = _intake(context, config.intake, stack)
    sockets = Sockets(intake, endpoints={"intake": endpoints, "publish": None,
                                         "control": None})
    if config.output.publish_endpoint:
        sockets.publisher = stack.enter_context(context.socket(zmq.PUB))
        sockets.publisher.setsockopt(zmq.SNDHWM, PUBLISH_HIGH_WATER_MARK)
        sockets.publisher.setsockopt(zmq.LINGER, 0)
        sockets.endpoints["publish"] = _attach(sockets.publisher,
                                               config.output.publish_endpoint,
                                               "output.publish_endpoint")
    if config.control.endpoint:
        sockets.control = control = stack.enter_context(context.socket(zmq.ROUTER))
        control.setsockopt(zmq.LINGER, 0)
        control.setsockopt(zmq.MAXMSGSIZE, CONTROL_MAX_BYTES)
        control.setsockopt(zmq.SNDHWM, CONTROL_HIGH_WATER_MARK)
        control.setsockopt(zmq.RCVHWM, CONTROL_HIGH_WATER_MARK)
        _curve_server(control, curve)
        sockets.endpoints["control"] = _attach(control, config.control.endpoint,
                                               "control.endpoint")
    return sockets


def _curve_server(socket: zmq.Socket, curve: CurveConfig | None) -> None:
    if curve is not None:
        from zmq.auth import load_certificate

        public, secret = load_certificate(str(curve.server_secret_key_file))
        socket.curve_publickey, socket.curve_secretkey = public, secret
        socket.curve_server = True


def _intake(context: zmq.Context, c: IntakeConfig, stack: ExitStack):
    """The intake socket (PULL or SUB, CurveZMQ when configured) and its endpoints."""
    kind = zmq.PULL if c.pattern == "pull" else zmq.SUB
    intake = stack.enter_context(context.socket(kind))
    intake.setsockopt(zmq.RCVHWM, c.receive_high_water_mark)
    intake.setsockopt(zmq.MAXMSGSIZE, ZMQ_SIZE_LIMIT_FACTOR * c.max_message_bytes)
    intake.setsockopt(zmq.LINGER, 0)
    if kind == zmq.SUB:
        for topic in c.topics:
            intake.setsockopt(zmq.SUBSCRIBE, topic.encode())
    _curve_server(intake, c.curve)
    endpoints = [_attach(intake, endpoint, "intake.endpoints", bind=c.bind)
                 for endpoint in c.endpoints]
    return intake, endpoints
