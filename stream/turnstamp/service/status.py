"""The service's status: one document, written to ``status.json`` and published.

The document (format ``turnstamp.status``, version 1) is what the live view, the
report and the control socket's ``status`` read: state, counters and rejects by
reason, rates and update latency, per-source sequence numbers, per-target
statistics and clock verdicts, table coverage, notes, warnings and the endpoints
the service is bound to. ``json_text`` turns it into strict JSON once (numpy
values made plain, non-finite numbers as null); that one text is written to the
file and sent on the PUB socket.
"""

from __future__ import annotations

import json
import math
from collections import deque
from typing import TYPE_CHECKING, Any

import numpy as np

from .. import __version__
from ..core.timebase import NS_PER_DAY, unix_to_ns

if TYPE_CHECKING:
    from ..assemble import Environment
    from ..core.pipeline import Pipeline
    from .loop import Service

__all__ = ["STATUS_FILE", "STATUS_FORMAT", "Activity", "status_document", "table_warnings",
           "quality_warnings", "json_text"]

STATUS_FILE = "status.json"
STATUS_FORMAT = "turnstamp.status"
RATE_WINDOW_S = 10.0  # events per second over the last ten seconds of messages
SHOWN = 20  # notes and warnings shown, the newest


class Activity:
    """Arrival rate of events and latency of the statistics updates (wall clock, s)."""

    def __init__(self):
        self._rate: deque[tuple[float, int]] = deque(maxlen=4096)  # > 10 s of messages
        self._latencies: deque[float] = deque(maxlen=10_000)
        self._pending_since: float | None = None

    def arrived(self, received: float) -> None:
        """A message arrived at ``received``: the next update will reflect it."""
        if self._pending_since is None:
            self._pending_since = received

    def counted(self, now: float, events_received: int) -> None:
        """The running total of events received, after a message at ``now``."""
        self._rate.append((now, events_received))

    def updated(self, now: float) -> None:
        """Statistics were updated at ``now``: the latency of the oldest message since."""
        if self._pending_since is not None:
            self._latencies.append(now - self._pending_since)
            self._pending_since = None

    def events_per_s(self, now: float) -> float:
        """Events received per second over the last ``RATE_WINDOW_S``."""
        recent = [(t, n) for t, n in self._rate if now - t <= RATE_WINDOW_S]
        if len(recent) < 2 or recent[-1][0] == recent[0][0]:
            return 0.0
        return (recent[-1][1] - recent[0][1]) / (recent[-1][0] - recent[0][0])

    def latency(self) -> dict[str, float] | None:
        """Median, 99th percentile and maximum update latency, s (None before any)."""
        latency = sorted(self._latencies)
        if not latency:
            return None
        return {"p50": latency[len(latency) // 2],
                "p99": latency[int(0.99 * (len(latency) - 1))], "max": latency[-1]}


def status_document(service: Service, state: str) -> dict:
    """The status of ``service`` in ``state`` ("running" or "stopped")."""
    pipeline = service.pipeline
    now = service.clock()
    return {
        "format": STATUS_FORMAT, "version": 1, "state": state,
        "computed_at_utc_ns": unix_to_ns(now), "started_utc": service.started_utc,
        "software": f"turnstamp {__version__}", "output": str(service.out),
        "endpoints": service.endpoints,
        "counters": service.counters.totals(),
        "rejected_by_reason": dict(service.counters.rejected_by_reason),
        "tagged_with_problems": pipeline.quality.totals(),
        "events_per_s": service.activity.events_per_s(now),
        "sources": service.admission.source_status(),
        "targets": _targets(service), "trials": pipeline.trials,
        "update_latency_s": service.activity.latency(),
        "tables": {n: [t.tagger.table.start_ns, t.tagger.table.stop_ns]
                   for n, t in pipeline.targets.items()},
        "notes": list(service.notes)[-SHOWN:],
        "warnings": list(service.warnings)[-SHOWN:] + quality_warnings(pipeline)
        + table_warnings(pipeline, service.env),
    }


def _targets(service: Service) -> list[dict]:
    """Per target: models, frequency, each recipe's windows and profile, the clock."""
    pipeline = service.pipeline
    rows = service.significance or pipeline.significance()
    profiles = {(p["target"], p["recipe"]): p for p in service.profiles}
    clock = {name: (recipe, verdict) for name, recipe, verdict, _ in service.clock_verdicts}
    targets = []
    for name, setup in pipeline.targets.items():
        recipes = []
        for recipe in setup.recipes:
            windows = {r["window"]: {"events": r["events"], "h": r["h_statistic"],
                                     "harmonics": r["h_harmonics"], "sigma": r["h_sigma"],
                                     "sigma_post_trials": r["h_sigma_post_trials"]}
                       for r in rows if r["target"] == name and r["recipe"] == recipe.name}
            profile = profiles.get((name, recipe.name), {})
            recipes.append({"name": recipe.name, "weighted": recipe.use_weights,
                            "events": windows.get("cumulative", {}).get("events", 0),
                            "windows": windows,
                            "profile": {"counts": profile.get("counts", []),
                                        "errors": profile.get("errors", [])}})
        entry = {"name": name, "model_ids": setup.tagger.model_ids,
                 "frequency_hz": pipeline.frequency_hz(name), "recipes": recipes,
                 "tagged_with_problems": pipeline.quality.of(name),
                 "excluded_from_statistics": pipeline.quality.excluded(name)}
        if name in clock:
            recipe, verdict = clock[name]
            entry["clock"] = {"recipe": recipe, "status": verdict.status,
                              "kind": verdict.kind, "lines": list(verdict.lines)}
        targets.append(entry)
    return targets


def quality_warnings(pipeline: Pipeline) -> list[str]:
    """Targets with events tagged outside their spin models' validity windows."""
    out = []
    for name, setup in pipeline.targets.items():
        excluded = pipeline.quality.excluded(name)
        if excluded:
            windows = ", ".join(f"{c.model_id} MJD {c.model.validity.start_mjd_tdb} to "
                                f"{c.model.validity.end_mjd_tdb} TDB"
                                for c in setup.tagger.calculators)
            out.append(f"{name}: {excluded:,} events outside the validity window of its spin "
                       f"model ({windows}): phases extrapolated and left out of the "
                       "statistics; load a model valid for these dates")
    return out


def table_warnings(pipeline: Pipeline, env: Environment) -> list[str]:
    """What the bundled tables say about the data's dates (stated, never fatal)."""
    latest = max((m.latest_ns or 0 for ms in pipeline.moments.values() for m in ms),
                 default=0)
    if not latest:
        return []
    mjd = 51_544.5 + latest / NS_PER_DAY
    out = []
    orientation = env.orientation
    if mjd > orientation.last_mjd:
        out.append(f"Earth orientation table ends at MJD {orientation.last_mjd:.0f}: UT1 and "
                   "polar motion held (barycentric times off by up to ~1.4 µs; events "
                   "flagged EARTH_ORIENTATION_HELD). Point site.earth_orientation_file "
                   "to a newer IERS finals2000A file.")
    elif mjd >= orientation.predicted_from_mjd:
        out.append(f"Earth orientation from IERS predictions since MJD "
                   f"{orientation.predicted_from_mjd:.0f} (a few ns at most)")
    if mjd > env.leaps.expires_mjd:
        out.append(f"leap-second table expired at MJD {env.leaps.expires_mjd}: a leap "
                   "second announced since would be missed (events flagged "
                   "LEAP_TABLE_EXPIRED); update astropy-iers-data")
    return out


def json_text(value: Any, indent: int | None = 2) -> str:
    """``value`` as strict JSON text, serialised once: numpy scalars and arrays as
    plain numbers and lists, non-finite numbers as null, anything else unknown as
    its ``str``. Keys sorted; with a trailing newline when indented."""
    text = json.dumps(_plain(value), indent=indent, sort_keys=True, ensure_ascii=False,
                      allow_nan=False)
    return text + "\n" if indent is not None else text


def _plain(value: Any) -> Any:
    if isinstance(value, dict):
        return {key: _plain(item) for key, item in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(item) for item in value]
    if isinstance(value, np.ndarray):
        return _plain(value.tolist())
    if value is None or isinstance(value, str | bool):
        return value
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, int | np.integer):
        return int(value)
    if isinstance(value, float | np.floating):
        return float(value) if math.isfinite(value) else None
    return str(value)
