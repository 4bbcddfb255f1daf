"""Errors: bad input from outside versus broken invariants of our own.

``InputError`` (and its subclasses) means something handed to turnstamp is wrong:
a model file, an event file, a configuration, a message. Its text names the
field and the offending value, and where it makes sense the allowed set. Our own
bugs raise ordinary exceptions (``AssertionError``, ``RuntimeError``) and are
never caught by the service loop's peer-error handling.

Every error class of the package lives here: the input errors, the wire
format's refusal (``WireError``), the errors of the Arrow files
(``SchemaMismatchError``, ``ArrowFileError``, ``ArrowMetadataError``), and the
report's (``ReportError``).
"""

from __future__ import annotations

from enum import StrEnum
from pathlib import Path

__all__ = [
    "InputError",
    "loaded",
    "ModelError",
    "ConfigError",
    "EventFileError",
    "RejectReason",
    "WireError",
    "SchemaMismatchError",
    "ArrowFileError",
    "ArrowMetadataError",
    "ReportError",
]


class InputError(ValueError):
    """Bad data from outside; the message names the field and the value."""

    def __init__(self, field: str, value: object, problem: str, message: str | None = None):
        self.field = field
        self.value = value
        self.problem = problem
        super().__init__(message or f"{field} = {value!r}: {problem}")


def loaded(field: str, load, path):
    """``load(path)``; a file that is missing or unreadable is named by ``field`` (the
    option or configuration key that gave it: ``--model``, ``targets.x.models``), not
    by the loader's own word for a path."""
    try:
        return load(path)
    except InputError as exc:
        if exc.field in ("path", "config"):
            raise type(exc)(field, exc.value, exc.problem) from None
        raise


class ModelError(InputError):
    """A spin-model or template file is invalid."""


class ConfigError(InputError):
    """The service configuration is invalid."""


class EventFileError(InputError):
    """An event file for offline tagging is invalid."""


class RejectReason(StrEnum):
    """Reason codes written to the rejects output (one per refused message or event)."""

    MALFORMED_MESSAGE = "malformed_message"
    OVERSIZED_MESSAGE = "oversized_message"
    WRONG_VERSION = "wrong_version"
    BAD_SCHEMA = "bad_schema"
    DUPLICATE_MESSAGE = "duplicate_message"
    SEQUENCE_GAP = "sequence_gap"
    BAD_TIME = "bad_time"
    DUPLICATE_EVENT_ID = "duplicate_event_id"
    BAD_VALUE = "bad_value"
    OUTSIDE_TABLE_COVERAGE = "outside_table_coverage"
    NO_MODEL = "no_model"
    SOURCE_NOT_AUTHORISED = "source_not_authorised"
    SEQUENCE_RESTART = "sequence_restart"


class WireError(InputError):
    """A message was refused as a whole (the peer's fault, never ours).

    Parameters
    ----------
    reason : RejectReason
        Code for the rejects output.
    detail : str
        What was wrong, naming the field and the value.
    source, sequence : str or None, int or None
        From the header, as far as it could be read.
    events : int
        The header's event count when it could be read, else 0: a claim only.
    received : int
        Events actually decoded from the body (0 when it was not read): what
        accounting counts, never the header's claim.
    """

    def __init__(self, reason: RejectReason, detail: str, source: str | None = None,
                 sequence: int | None = None, events: int = 0, received: int = 0):
        self.reason = RejectReason(reason)
        self.detail = detail
        self.source = source
        self.sequence = sequence
        self.events = events
        self.received = received
        where = f" (source {source!r}, sequence {sequence})" if source is not None else ""
        super().__init__("message", None if source is None else f"{source}#{sequence}", detail,
                         message=f"{self.reason.value}: {detail}{where}")

    def __reduce__(self):
        return (type(self), (self.reason, self.detail, self.source, self.sequence, self.events))


class SchemaMismatchError(ValueError):
    """Data handed to a writer does not fit the stream's schema.

    Parameters
    ----------
    stem : str
        Output stream concerned.
    field : str
        Offending column name.
    problem : str
        What is wrong with it.
    """

    def __init__(self, stem: str, field: str, problem: str):
        self.stem = stem
        self.field = field
        self.problem = problem
        super().__init__(f"{stem}: column {field!r}: {problem}")


class ArrowFileError(ValueError):
    """A file cannot be read as an Arrow IPC file at all (no complete schema)."""

    def __init__(self, path: str | Path, problem: str):
        self.path = Path(path)
        self.problem = problem
        super().__init__(f"{path}: {problem}")


class ArrowMetadataError(ValueError):
    """The FlatBuffers metadata of an Arrow IPC message cannot be read (bad data, not ours)."""


class ReportError(RuntimeError):
    """The report cannot be built (missing optional dependency, no outputs)."""
