"""Checks of saved accumulator states (``to_state`` output read back from a checkpoint).

A state comes from outside (a checkpoint file, another run to stack), so every
field is checked before it is trusted; a bad one raises ``InputError`` naming the
field as ``<field>.<key>`` and the offending value.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping

import numpy as np

from turnstamp.errors import InputError

__all__ = ["STATE_VERSION", "check_keys", "state_int", "state_bool", "state_float",
           "state_floats"]

STATE_VERSION = 1
"""Version written into, and required of, every accumulator state."""


def check_keys(state: object, field: str, kind: str, keys: Iterable[str]) -> None:
    """Require a mapping with exactly ``keys``, of ``kind`` and the current version."""
    if not isinstance(state, Mapping):
        raise InputError(field, type(state).__name__, "must be a mapping (from to_state)")
    expected = set(keys)
    missing = sorted(expected - set(state))
    unknown = sorted(set(state) - expected)
    if missing:
        raise InputError(field, missing, "is missing these keys")
    if unknown:
        raise InputError(field, unknown, "has unknown keys")
    if state["kind"] != kind:
        raise InputError(f"{field}.kind", state["kind"], f"must be {kind!r}")
    if state["version"] != STATE_VERSION:
        raise InputError(f"{field}.version", state["version"], f"supported: {STATE_VERSION}")


def state_int(state, field, key, minimum=None, optional=False):
    """``state[key]`` as an int (>= ``minimum``); None allowed when ``optional``."""
    value = state[key]
    if value is None and optional:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise InputError(f"{field}.{key}", value, "must be an integer")
    if minimum is not None and value < minimum:
        raise InputError(f"{field}.{key}", value, f"must be >= {minimum}")
    return int(value)


def state_bool(state, field, key):
    """``state[key]``, which must be a bool."""
    value = state[key]
    if not isinstance(value, bool):
        raise InputError(f"{field}.{key}", value, "must be true or false")
    return value


def state_float(state, field, key, nonnegative=False):
    """``state[key]`` as a finite float (and >= 0 when ``nonnegative``)."""
    value = state[key]
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)):
        raise InputError(f"{field}.{key}", value, "must be a number")
    value = float(value)
    if not math.isfinite(value) or (nonnegative and value < 0.0):
        problem = "must be finite and >= 0" if nonnegative else "must be finite"
        raise InputError(f"{field}.{key}", value, problem)
    return value


def state_floats(state, field, key, length, nonnegative=False):
    """``state[key]`` as a float64 array of ``length`` finite numbers (>= 0 if asked)."""
    value = state[key]
    if isinstance(value, (str, bytes, Mapping)) or not isinstance(value, (list, tuple, np.ndarray)):
        raise InputError(f"{field}.{key}", type(value).__name__, "must be a list of numbers")
    if len(value) != length:
        raise InputError(f"{field}.{key}", f"{len(value)} values", f"must hold {length}")
    if any(isinstance(v, bool) or not isinstance(v, (int, float, np.floating, np.integer))
           for v in value):
        raise InputError(f"{field}.{key}", list(value)[:8], "must hold only numbers")
    array = np.array(value, dtype=np.float64)
    if not np.isfinite(array).all():
        raise InputError(f"{field}.{key}", "non-finite value", "must be finite")
    if nonnegative and (array < 0.0).any():
        raise InputError(f"{field}.{key}", float(array.min()), "must be >= 0")
    return array
