"""The control socket: one-word commands on a REQ/REP socket, JSON replies.

=============  ==============================================================
``status``     the status document (as in ``status.json``)
``sources``    per source: committed through, missing ranges (all), highest
``reload``     reload every model and template now: ``{"changes": [...]}``
``checkpoint`` write a checkpoint now: ``{"ok": true}``
``stop``       stop as SIGTERM would (drain, flush, close): ``{"ok": true}``
=============  ==============================================================

Anything else is answered with ``{"error": ...}`` naming the allowed commands.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING

import zmq

from .status import json_text

if TYPE_CHECKING:
    from .loop import Service

__all__ = ["OK", "commands", "answer"]

OK = '{"ok": true}'

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


def answer(socket: zmq.Socket, known: Mapping[str, Command]) -> None:
    """Receive one command on the REP ``socket`` and send its reply."""
    command = socket.recv().decode(errors="replace").strip()
    action = known.get(command)
    if action is None:
        reply = json.dumps({"error": f"unknown command {command!r}; allowed: "
                                     f"{', '.join(known)}"})
    else:
        reply = action()
    socket.send(reply.encode())
