"""The control socket: one-word commands, JSON replies, whatever a client sends.

=============  ==============================================================
``status``     the status document (as in ``status.json``)
``sources``    per source: committed through, missing ranges (all), highest
``reload``     reload every model and template now: ``{"changes": [...]}``
``checkpoint`` write a checkpoint now: ``{"ok": true}``
``stop``       stop as SIGTERM would (drain, flush, close): ``{"ok": true}``
=============  ==============================================================

Anything else is answered with ``{"error": ...}`` naming the allowed commands.

The socket is a ROUTER (``sockets``), so no client can wedge it: REQ clients
(``[id, "", command]``) and DEALER clients with or without the empty delimiter are
all answered in their own envelope; a request of several frames, bytes that are
not UTF-8 or a command that fails is answered with an error; replies are sent
without blocking (a client that never reads loses its replies, nobody waits for
it); at most ``ANSWERED_PER_WAKE`` requests are taken per poll so the intake keeps
its turn. Frames above ``sockets.CONTROL_MAX_BYTES`` never reach us.
"""

from __future__ import annotations

import json
import logging
from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING

import zmq

from .status import json_text

if TYPE_CHECKING:
    from .loop import Service

__all__ = ["OK", "ANSWERED_PER_WAKE", "commands", "answer", "reply_to"]

log = logging.getLogger(__name__)

OK = '{"ok": true}'
ANSWERED_PER_WAKE = 16

Command = Callable[[], str]


def commands(service: Service) -> dict[str, Command]:
    """The commands of ``service``, in the order the error message lists them."""

    def checkpoint() -> str:
        service.checkpoint()
        return OK

    def stop() -> str:
        service.stop()
        return OK

    return {
        "status": lambda: json_text(service.status("running"), indent=None),
        "reload": lambda: json.dumps({"changes": service.reload(force=True)}),
        "sources": lambda: json_text({"sources": service.admission.source_status(None)},
                                     indent=None),
        "checkpoint": checkpoint,
        "stop": stop,
    }


def answer(socket: zmq.Socket, known: Mapping[str, Command],
           limit: int = ANSWERED_PER_WAKE) -> int:
    """Answer up to ``limit`` requests waiting on the ROUTER ``socket``, without ever
    blocking or raising on what a client sent; returns how many were answered."""
    answered = 0
    while answered < limit:
        try:
            frames = socket.recv_multipart(flags=zmq.NOBLOCK)
        except zmq.Again:
            break
        answered += 1
        if len(frames) < 2:  # an identity alone: nothing to answer
            continue
        identity, rest = frames[0], frames[1:]
        envelope = [identity, b""] if rest[0] == b"" else [identity]
        body = rest[1:] if rest[0] == b"" else rest
        try:
            socket.send_multipart([*envelope, reply_to(body, known).encode()], flags=zmq.NOBLOCK)
        except zmq.ZMQError:  # the client is gone or reads nothing: its reply is dropped
            pass
    return answered


def reply_to(body: list[bytes], known: Mapping[str, Command]) -> str:
    """The reply to one request (its frames after the envelope); never raises."""
    if len(body) != 1:
        return _error(f"a request is one frame holding a command; got {len(body)} frames")
    try:
        command = body[0].decode("utf-8").strip()
    except UnicodeDecodeError as exc:
        return _error(f"the request is not UTF-8 (byte {exc.start})")
    action = known.get(command)
    if action is None:
        shown = command if len(command) <= 40 else command[:40] + "..."
        return _error(f"unknown command {shown!r}; allowed: {', '.join(known)}")
    try:
        return action()
    except Exception as exc:  # a command of ours failed: say so, keep serving
        log.exception("control command %r failed", command)
        return _error(f"command {command!r} failed: {exc}")


def _error(text: str) -> str:
    return json.dumps({"error": text})
