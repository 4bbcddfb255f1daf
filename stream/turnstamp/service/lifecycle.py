"""What the service says at start and at stop, and how it ends when it fails.

At start a banner names every endpoint as bound, the output folder, the targets
and their models; at stop a summary gives the counts. A service that fails (at
start-up or while running) says so in ``status.json`` ("failed", with the error),
and closes every output file first, so that nothing claims "running" for a dead
process (a failure in the middle of a message's rows leaves the archive, rejects and
ledger files open instead: the next start cuts that message's rows).
"""

from __future__ import annotations

import logging
import time
from pathlib import Path
from typing import TYPE_CHECKING

from .. import __version__
from ..core.timebase import unix_to_ns
from ..files.durable import atomic_write_text
from .status import STATUS_FILE, STATUS_FORMAT, json_text

if TYPE_CHECKING:
    from .loop import Service

__all__ = ["banner", "summary", "failed", "failed_at_start"]

log = logging.getLogger(__name__)


def banner(service: Service) -> str:
    """Endpoints, output folder, targets and models of a service that has bound."""
    endpoints = service.endpoints
    c = service.config
    curve = "CurveZMQ" if c.intake.curve is not None else "no CurveZMQ"
    lines = [f"turnstamp {__version__} running",
             f"  intake   {', '.join(endpoints.get('intake') or [])} ({c.intake.pattern}, "
             f"{'bound' if c.intake.bind else 'connected'}, {curve})",
             f"  control  {endpoints.get('control') or 'off'}",
             f"  publish  {endpoints.get('publish') or 'off'}",
             f"  output   {service.out}"]
    for name, setup in service.pipeline.targets.items():
        recipes = ", ".join(r.name for r in setup.recipes)
        lines.append(f"  target   {name}: models {', '.join(setup.tagger.model_ids)}; "
                     f"recipes {recipes}")
    return "\n".join(lines)


def summary(service: Service) -> str:
    """The counts of a run, at its normal stop."""
    n = service.counters
    return (f"turnstamp stopped: {n.messages_received:,} messages ({n.messages_rejected:,} "
            f"refused, {n.missing_messages:,} missing), {n.events_received:,} events: "
            f"{n.events_tagged:,} tagged, {n.events_filtered:,} filtered, "
            f"{n.events_rejected:,} rejected; files in {service.out}")


def failed(service: Service, error: BaseException) -> None:
    """Close every file and write a "failed" status; never raises (the error that
    brought us here is what the caller re-raises)."""
    mid_message = service.ledger.in_commit
    for stem, writer in service.writers.items():
        try:
            if mid_message and stem in ("archive", "rejects", "ledger"):
                writer.release()
            else:
                writer.close()
        except Exception:  # closing the others matters more
            log.exception("closing %s after a failure", writer)
    try:
        document = service.status("failed")
    except Exception:
        document = _minimal("failed")
    document["error"] = _error_text(error)
    _write(service.out, document)


def failed_at_start(out: Path, error: BaseException) -> None:
    """A "failed" status for a service that could not be set up."""
    document = _minimal("failed")
    document["error"] = _error_text(error)
    _write(out, document)


def _minimal(state: str) -> dict:
    return {"format": STATUS_FORMAT, "version": 1, "state": state,
            "computed_at_utc_ns": unix_to_ns(time.time()), "software": f"turnstamp {__version__}"}


def _error_text(error: BaseException) -> str:
    if isinstance(error, KeyboardInterrupt):
        return "interrupted"
    return f"{type(error).__name__}: {error}"


def _write(out: Path, document: dict) -> None:
    try:
        out.mkdir(parents=True, exist_ok=True)
        atomic_write_text(out / STATUS_FILE, json_text(document))
    except Exception:  # the status is a courtesy; the error itself still propagates
        log.exception("writing the failed status")
