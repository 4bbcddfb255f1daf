"""Stacking the statistics of several runs (nights) saved by ``Pipeline.to_state``.

Moments add, so the stacked significance is that of all the events folded
together, provided every run defines phase the same way (the spin models' phase
reference); otherwise the stack is refused with the reason.
"""

from __future__ import annotations

from ..errors import InputError
from .timebinned import TimeBinnedMoments

__all__ = ["STATE_VERSION", "stack_states", "resume_problem"]

STATE_VERSION = 1
"""Version of the pipeline state (``Pipeline.to_state``) this code reads and writes."""


def stack_states(states: list[dict], labels: list[str] | None = None) -> dict:
    """Stack the statistics of several runs (nights) saved by ``Pipeline.to_state``.

    Moments add, so the stacked significance is that of all the events folded
    together. Only runs whose spin models share the phase reference may stack:
    otherwise the same phase would not mean the same rotation, and the stack is
    refused with the reason. Targets present in only some runs are stacked over
    those. Counters add too.
    """
    labels = labels or [f"run {i + 1}" for i in range(len(states))]
    if not states:
        raise InputError("states", [], "nothing to stack")
    merged: dict = {"version": STATE_VERSION, "counters": {}, "targets": {},
                    "stacked_from": labels}
    for label, state in zip(labels, states, strict=True):
        if state.get("version") != STATE_VERSION:
            raise InputError(f"{label}.version", state.get("version"),
                             f"expected {STATE_VERSION}")
        for key, value in state.get("counters", {}).items():
            if isinstance(value, int):
                merged["counters"][key] = merged["counters"].get(key, 0) + value
        for name, target in state["targets"].items():
            into = merged["targets"].get(name)
            if into is None:
                merged["targets"][name] = {**target, "runs": [label]}
            else:
                _add_target(into, target, f"{label}.targets.{name}", label)
    return merged


def _add_target(into: dict, target: dict, where: str, label: str) -> None:
    """Add one run's saved target (``where`` names it in errors) to the stack ``into``."""
    if target["phase_reference"] != into["phase_reference"]:
        raise InputError(
            f"{where}.phase_reference", target["phase_reference"],
            f"differs from {into['phase_reference']!r} of {', '.join(into['runs'])}: "
            "the spin models define phase differently (frequency, epoch, phase zero, "
            "glitches, orbit or position), so their folds cannot be added")
    if target["recipes"] != into["recipes"]:
        raise InputError(f"{where}.recipes", target["recipes"],
                         f"differ from {into['recipes']} of {', '.join(into['runs'])}")
    into["moments"] = [
        (TimeBinnedMoments.from_state(a) + TimeBinnedMoments.from_state(b)).to_state()
        for a, b in zip(into["moments"], target["moments"], strict=True)]
    into["runs"].append(label)


def resume_problem(name: str, saved: dict,
                   configured: tuple[str, list[str]] | None) -> str | None:
    """Why a saved target's statistics cannot be resumed, or None when they can.

    ``configured`` is the target's (phase reference, recipe names) as configured now,
    None when the target is no longer configured.
    """
    if configured is None:
        return f"target {name}: in the checkpoint but not configured; dropped"
    phase_reference, recipes = configured
    if saved["phase_reference"] != phase_reference:
        return (f"target {name}: spin model phase reference changed; statistics "
                "restart (states from different phase references cannot stack)")
    if saved["recipes"] != recipes:
        return f"target {name}: recipes changed; statistics restart"
    return None
