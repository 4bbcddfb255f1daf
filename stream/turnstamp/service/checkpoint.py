"""Checkpoints: the service's state between two messages, in one JSON file.

A checkpoint (``checkpoint.json`` in the output folder, replaced atomically) holds:

``version``
    1.
``pipeline``
    ``Pipeline.to_state()``: the statistics (also read by ``turnstamp stack``).
``tracker``
    ``SequenceTracker.to_state()``: what each source sent last.
``counters``
    ``Counters.to_state()``: every count, reject reasons included.
``positions``
    Per output stream, [file name, record batches written]: where the replay of a
    restart begins (``recovery.resume``).
"""

from __future__ import annotations

import json
import logging
from collections.abc import Mapping
from pathlib import Path

from ..core.accounting import Counters
from ..core.pipeline import Pipeline
from ..files.durable import atomic_write_json
from ..files.writer import RotatingArrowWriter
from ..wire.sequence import SequenceTracker

__all__ = ["CHECKPOINT", "VERSION", "checkpoint_state", "write_checkpoint", "read_checkpoint"]

log = logging.getLogger(__name__)

CHECKPOINT = "checkpoint.json"
VERSION = 1


def checkpoint_state(pipeline: Pipeline, tracker: SequenceTracker, counters: Counters,
                     writers: Mapping[str, RotatingArrowWriter]) -> dict:
    """The checkpoint document of the state between two messages."""
    return {
        "version": VERSION,
        "pipeline": pipeline.to_state(),
        "tracker": tracker.to_state(),
        "counters": counters.to_state(),
        "positions": {stem: list(writer.position) for stem, writer in writers.items()},
    }


def write_checkpoint(directory: Path, state: dict) -> None:
    """Replace the checkpoint of ``directory`` atomically."""
    atomic_write_json(directory / CHECKPOINT, state)


def read_checkpoint(directory: Path) -> dict | None:
    """The checkpoint of ``directory``; None when there is none or it is unreadable."""
    path = directory / CHECKPOINT
    if not path.exists():
        return None
    try:
        return json.loads(path.read_text())
    except (OSError, json.JSONDecodeError) as exc:
        log.warning("checkpoint %s unreadable (%s): starting statistics afresh", path, exc)
        return None
