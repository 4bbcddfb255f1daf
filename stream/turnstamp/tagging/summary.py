"""What a tagging run did, in the words its summary prints.

Every event read is accounted for (tagged, filtered or rejected, rejections by
reason and what exactly was wrong), events tagged with a quality problem are
counted per problem (those tagged outside their model's validity are left out of
the statistics), and each recipe's H-test is given with its significance, or "no
events" / "no excess" where a number would mislead.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

from ..core.accounting import QualityCounts
from ..core.timebinned import TimeBinnedMoments

__all__ = ["TagSummary", "recipe_lines", "h_values", "moment_values"]




@dataclass
class TagSummary:
    """Accounting of one run (events; seconds of wall clock) and its statistics."""

    events: int
    tagged: int
    filtered: int
    rejected: int
    output: Path | None
    rejects: Path | None
    seconds: float
    target: str
    rejected_by_reason: dict[str, int] = field(default_factory=dict)
    rejected_details: dict[tuple[str, str], int] = field(default_factory=dict)
    quality: dict[str, int] = field(default_factory=dict)
    statistics: dict[str, TimeBinnedMoments] = field(default_factory=dict)

    def lines(self) -> list[str]:
        """The summary as text lines."""
        rate = self.events / self.seconds if self.seconds > 0 else 0.0
        out = [f"{self.events:,} events in {self.seconds:.1f} s ({rate:,.0f}/s): "
               f"{self.tagged:,} tagged, {self.filtered:,} filtered, {self.rejected:,} rejected"]
        for (reason, detail), count in sorted(self.rejected_details.items()):
            out.append(f"  rejected ({reason}), {detail}: {count:,}")
        out += [f"  {line}" for line in
                QualityCounts({self.target: self.quality}).lines(self.target)]
        if self.tagged == 0:
            out.append("warning: no event was tagged")
        if self.output is not None:
            out.append(f"archive: {self.output}")
        if self.rejects is not None:
            out.append(f"rejects: {self.rejects}")
        out += recipe_lines(self.target, self.statistics,
                            self.quality.get("OUTSIDE_MODEL_VALIDITY", 0) == self.tagged > 0)
        return out


    def as_dict(self) -> dict:
        """The summary as JSON-ready values (None for a significance that is no number)."""
        return {
            "events": self.events, "tagged": self.tagged, "filtered": self.filtered,
            "rejected": self.rejected, "rejected_by_reason": self.rejected_by_reason,
            "rejected_by_detail": [{"reason": reason, "detail": detail, "events": count}
                                   for (reason, detail), count
                                   in sorted(self.rejected_details.items())],
            "tagged_with_quality_flag": self.quality, "target": self.target,
            "archive": None if self.output is None else str(self.output),
            "rejects": None if self.rejects is None else str(self.rejects),
            "seconds": self.seconds,
            "statistics": {recipe: h_values(binned) for recipe, binned
                           in self.statistics.items()},
        }


def h_values(binned: TimeBinnedMoments) -> dict:
    """Events and H-test of a recipe (the periodicity module is imported only when
    there are events)."""
    return moment_values(binned.total())


def moment_values(moments) -> dict:
    """Events and H-test of summed ``PhaseMoments`` (as ``h_values``)."""
    if moments.count == 0:
        return {"events": 0, "h_statistic": None, "h_harmonics": None, "h_sigma": None}
    from ..core.periodicity import h_test

    h = h_test(moments)
    sigma = h.sigma if math.isfinite(h.sigma) else None
    return {"events": moments.count, "h_statistic": h.statistic, "h_harmonics": h.harmonics,
            "h_sigma": sigma}


def recipe_lines(target: str, statistics: dict[str, TimeBinnedMoments],
                 all_outside: bool = False) -> list[str]:
    """One line per recipe: its events and H-test; a significance at or below zero
    (or none) is said as "no excess over chance", never as a negative or infinite
    sigma."""
    out = []
    for recipe, binned in statistics.items():
        values = h_values(binned)
        if values["events"] == 0:
            why = " (every event lies outside the model's validity)" if all_outside else ""
            out.append(f"{target}/{recipe}: no events in the statistics{why}")
            continue
        sigma = values["h_sigma"]
        shown = (f"{sigma:.2f} sigma" if sigma is not None and sigma > 0
                 else "no excess over chance")
        out.append(f"{target}/{recipe}: {values['events']:,} events, "
                   f"H = {values['h_statistic']:.1f} ({values['h_harmonics']} harmonics), "
                   f"{shown}")
    return out
