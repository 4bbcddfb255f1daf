"""Configuration of the service's sockets: the intake (with CurveZMQ and the sources'
keys) and the control socket. Part of ``config`` (which re-exports every model)."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

__all__ = ["CurveConfig", "IntakeConfig", "ControlConfig"]

_FROZEN = ConfigDict(frozen=True, extra="forbid", use_attribute_docstrings=True)
"""As in ``config``: immutable, unknown keys refused, docstrings in the schema."""


class CurveConfig(BaseModel):
    """CurveZMQ: authenticated, encrypted intake and control socket."""

    model_config = _FROZEN
    server_secret_key_file: Path
    """Written by ``zmq.auth.create_certificates`` (or ``turnstamp keys``)."""
    authorized_clients_directory: Path
    """Public certificates of the event builders allowed to connect."""


class IntakeConfig(BaseModel):
    """Where the event stream comes in."""

    model_config = _FROZEN
    endpoints: tuple[str, ...] = ("tcp://127.0.0.1:5555",)
    """ZeroMQ endpoints of the event stream (loopback unless you say otherwise)."""
    pattern: Literal["pull", "sub"] = "pull"
    """pull: back-pressure, nothing lost (use for the archive). sub: best effort."""
    topics: tuple[str, ...] = ("",)
    """With pattern sub: topic prefixes to subscribe to ("" is every message)."""
    bind: bool = True
    """True: turnstamp binds and event builders connect (several may). False: connect."""
    receive_high_water_mark: int = Field(default=200, ge=1)
    """Messages queued in ZeroMQ; with max_message_bytes this bounds intake memory.
    200 batches of 10 000 events is 2 s at 1 M events/s: room for a slow disk flush."""
    max_message_bytes: int = Field(default=64 * 2**20, ge=1024)
    """Larger messages are refused with a rejects row (64 MiB is ~1 M events). ZeroMQ
    closes the connection of a sender of a frame above 16 times this (bounding
    memory): that message leaves no row, and the sender's next one shows the gap."""
    max_events_per_message: int = Field(default=1_000_000, ge=1)
    """Messages with more events are refused whole (and counted)."""
    plausible_from: str = "1990-01-01"
    """Event times before this UTC date are rejected as implausible (a wrong epoch)."""
    plausible_until: str = "2100-01-01"
    """Event times after this UTC date are rejected as implausible (a wrong unit)."""
    curve: CurveConfig | None = None
    """CurveZMQ authentication and encryption of the intake and the control socket
    (off when absent)."""
    max_sequence_jump: int = Field(default=1_000_000, ge=1)
    """A sequence number further than this from its source's highest, either way,
    starts a new run (a sender restart, or a header not to be trusted) instead of
    counting the numbers between as missing."""
    source_keys: dict[str, str] = {}
    """Source name -> the CurveZMQ public key (40 Z85 characters, as in the client's
    .key file) that alone may send under that name. Needs [intake.curve]."""

    @field_validator("endpoints")
    @classmethod
    def _endpoints(cls, value):
        for endpoint in value:
            if not re.match(r"^(tcp|ipc|inproc)://\S+$", endpoint):
                raise ValueError(f"{endpoint!r} is not a ZeroMQ endpoint like tcp://host:port")
        return value

    @model_validator(mode="after")
    def _keys(self):
        if self.source_keys and self.curve is None:
            raise ValueError("source_keys needs [intake.curve]: without CurveZMQ no "
                             "sender has a key")
        for name, key in self.source_keys.items():
            if not re.fullmatch(r"[0-9A-Za-z.\-:+=^!/*?&<>()\[\]{}@%$#]{40}", key):
                raise ValueError(f"source_keys.{name} = {key!r} is not a 40-character "
                                 "Z85 CurveZMQ public key")
        return self


class ControlConfig(BaseModel):
    """The control socket."""

    model_config = _FROZEN
    endpoint: str | None = None
    """ZeroMQ endpoint (ROUTER) taking 'status', 'sources', 'reload', 'checkpoint' and
    'stop' (loopback recommended; CurveZMQ with [intake.curve])."""
