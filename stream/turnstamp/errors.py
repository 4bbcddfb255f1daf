"""Errors: bad input from outside versus broken invariants of our own.

``InputError`` (and its subclasses) means something handed to turnstamp is wrong:
a model file, an event file, a configuration, a message. Its text names the
field and the offending value, and where it makes sense the allowed set. Our own
bugs raise ordinary exceptions (``AssertionError``, ``RuntimeError``) and are
never caught by the service loop's peer-error handling.
"""

from __future__ import annotations

from enum import StrEnum

__all__ = ["InputError", "ModelError", "ConfigError", "EventFileError", "RejectReason"]


class InputError(ValueError):
    """Bad data from outside; the message names the field and the value."""

    def __init__(self, field: str, value: object, problem: str, message: str | None = None):
        self.field = field
        self.value = value
        self.problem = problem
        super().__init__(message or f"{field} = {value!r}: {problem}")


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
