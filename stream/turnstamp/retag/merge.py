"""Statistics and accounting of a re-tagging run, merged by addition.

Every fragment's result carries its accounting and, per recipe, a
``TimeBinnedMoments`` with one interval per TT day (the accumulators of the live
path and of ``turnstamp tag``). ``RunTotals.add`` adds them as they arrive, in
any order: the night-by-night sums are the intervals, the run's total is their
sum; nothing is recomputed from the events. ``write_statistics`` writes both
beside the output dataset, in ``OUT/_statistics.json`` (a name the dataset
readers skip): per recipe the total's and each night's events, H-test and moment
state (``TimeBinnedMoments.from_state`` / ``PhaseMoments.from_state`` read
them back).
"""

from __future__ import annotations

from collections import Counter
from datetime import datetime, timedelta
from pathlib import Path

from ..core.timebinned import TimeBinnedMoments
from ..files.durable import atomic_write_json
from ..tagging.summary import moment_values
from .work import FragmentResult

__all__ = ["RunTotals", "write_statistics", "night_label", "STATISTICS_NAME",
           "STATISTICS_SCHEMA"]

STATISTICS_NAME = "_statistics.json"
_J2000 = datetime(2000, 1, 1, 12)


def night_label(start_ns: int) -> str:
    """The TT day starting at ``start_ns`` (TT ns since J2000, a noon) as its date:
    the night of that evening."""
    return (_J2000 + timedelta(microseconds=start_ns // 1000)).date().isoformat()


class RunTotals:
    """The sum of the fragments' results (see the module docstring)."""

    def __init__(self, recipes: list[str]):
        self.events = self.tagged = self.filtered = self.rejected = 0
        self.rejected_by_reason: Counter[str] = Counter()
        self.quality: Counter[str] = Counter()
        self.statistics: dict[str, TimeBinnedMoments | None] = dict.fromkeys(recipes)
        self.done = self.skipped = 0
        self.seconds = 0.0

    def add(self, result: FragmentResult) -> None:
        """Add one fragment's accounting and statistics."""
        self.events += result.events
        self.tagged += result.tagged
        self.filtered += result.filtered
        self.rejected += result.rejected
        self.rejected_by_reason.update(result.rejected_by_reason)
        self.quality.update(result.quality)
        for recipe, binned in result.statistics.items():
            held = self.statistics.get(recipe)
            self.statistics[recipe] = binned.copy() if held is None else held + binned
        self.skipped += result.skipped
        self.done += not result.skipped
        self.seconds += result.seconds

    def recipes(self) -> dict[str, dict]:
        """Per recipe: the total and each night (events, H-test, moment state)."""
        out = {}
        for recipe, binned in self.statistics.items():
            if binned is None:
                out[recipe] = {"total": {"events": 0}, "nights": []}
                continue
            total = binned.total()
            nights = [{"night": night_label(start), "tt_start_ns": start,
                       **moment_values(moments), "moments": moments.to_state()}
                      for start, moments in binned.intervals()]
            out[recipe] = {"total": {**moment_values(total), "moments": total.to_state()},
                           "nights": nights}
        return out


_COUNT = {"type": "integer", "minimum": 0}
_H_TEST = {
    "events": _COUNT,
    "h_statistic": {"type": ["number", "null"], "description": "H-test statistic "
                    "(de Jager & Büsching 2010); null without events"},
    "h_harmonics": {"type": ["integer", "null"]},
    "h_sigma": {"type": ["number", "null"], "description": "one-sided significance; "
                "null when no number"},
    "moments": {"type": "object", "description": "PhaseMoments.to_state(): sums of "
                "w cos 2πkφ, w sin 2πkφ, phase histogram (they add)"},
}
STATISTICS_SCHEMA = {
    "$schema": "https://json-schema.org/draft/2020-12/schema",
    "title": "turnstamp retag statistics (OUT/_statistics.json)",
    "type": "object",
    "required": ["format", "provenance", "events", "tagged", "filtered", "rejected",
                 "fragments", "recipes"],
    "properties": {
        "format": {"const": "turnstamp retag statistics 1"},
        "provenance": {"type": "object", "additionalProperties": {"type": "string"},
                       "description": "as in every output file's metadata, with the "
                       "run's fingerprint"},
        "events": _COUNT, "tagged": _COUNT, "filtered": _COUNT, "rejected": _COUNT,
        "rejected_by_reason": {"type": "object", "additionalProperties": _COUNT},
        "tagged_with_quality_flag": {"type": "object", "additionalProperties": _COUNT},
        "fragments": {"type": "object", "required": ["done", "skipped", "failed"],
                      "properties": {"done": _COUNT, "skipped": _COUNT, "failed": {
                          "type": "array", "items": {
                              "type": "object", "required": ["fragment", "reason"],
                              "properties": {"fragment": {"type": "string"},
                                             "reason": {"type": "string"}}}}}},
        "nights_are": {"type": "string"},
        "recipes": {"type": "object", "additionalProperties": {
            "type": "object", "required": ["total", "nights"],
            "properties": {
                "total": {"type": "object", "properties": _H_TEST, "required": ["events"]},
                "nights": {"type": "array", "items": {
                    "type": "object", "required": ["night", "tt_start_ns", "events",
                                                   "moments"],
                    "properties": {"night": {"type": "string", "format": "date"},
                                   "tt_start_ns": {"type": "integer", "description":
                                                   "TT ns since 2000-01-01T12:00:00"},
                                   **_H_TEST}}}}}},
    },
}


def write_statistics(out: Path, totals: RunTotals, provenance: dict[str, str],
                     failed: list[tuple[str, str]]) -> Path:
    """Write the merged statistics and accounting as ``OUT/_statistics.json``."""
    path = out / STATISTICS_NAME
    atomic_write_json(path, {
        "format": "turnstamp retag statistics 1", "provenance": provenance,
        "events": totals.events, "tagged": totals.tagged, "filtered": totals.filtered,
        "rejected": totals.rejected, "rejected_by_reason": dict(totals.rejected_by_reason),
        "tagged_with_quality_flag": dict(totals.quality),
        "fragments": {"done": totals.done, "skipped": totals.skipped,
                      "failed": [{"fragment": f, "reason": r} for f, r in failed]},
        "nights_are": "TT days [noon, noon) named by the date of their evening",
        "recipes": totals.recipes(),
    })
    return path
