"""Barycentre tables for offline tagging: one per TT day, built as the days appear.

Offline tagging reads its input once, so it cannot know beforehand which days hold
events. Before a batch is tagged, ``DayTables.cover`` looks at the TT instants of
its valid events and adds a table for each day not yet covered (from the on-disk
cache when one is given, else built from the direct computation). A night's file
costs one or two tables; a file spanning years with gaps, one per day with data.
Tables are [day, day + 1) in TT, so every event is evaluated in its own day's table
whatever other days are present: the result does not depend on the batching.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from ..assemble import Environment, TableCache
from ..config import BarycentreConfig
from ..core.correctiontable import CorrectionTable, TableSet
from ..core.targets import TargetSetup
from ..core.timebase import NS_PER_DAY

__all__ = ["DayTables", "present_days"]

_FEW_DAYS = 64  # a batch spanning up to this many days is binned, not sorted


def present_days(tt_ns: np.ndarray) -> list[int]:
    """Day numbers (``tt_ns // NS_PER_DAY``) that hold at least one instant, ascending."""
    if tt_ns.size == 0:
        return []
    first, last = int(tt_ns.min()) // NS_PER_DAY, int(tt_ns.max()) // NS_PER_DAY
    if first == last:
        return [first]
    if last - first < _FEW_DAYS:
        counts = np.bincount(tt_ns // NS_PER_DAY - first, minlength=last - first + 1)
        return (np.flatnonzero(counts) + first).tolist()
    return np.unique(tt_ns // NS_PER_DAY).tolist()


class DayTables:
    """A target's barycentre tables, a TT day at a time (module docstring).

    Parameters
    ----------
    setup : TargetSetup
        The target; its tagger's table set is filled here.
    env : Environment
        Site tables (observer, ephemeris, Earth orientation).
    table_cache : Path, optional
        Folder of cached tables (read when present, written when built).
    """

    def __init__(self, setup: TargetSetup, env: Environment, table_cache: Path | None):
        self._cache = TableCache(table_cache, env, BarycentreConfig())
        self._position = setup.position
        self.tables = setup.tagger.table = TableSet()
        self.days: set[int] = set()

    def cover(self, tt_ns: np.ndarray) -> None:
        """Add the tables of the days of ``tt_ns`` (TT ns) that have none yet."""
        if tt_ns.size == 0:
            return
        first, last = int(tt_ns.min()) // NS_PER_DAY, int(tt_ns.max()) // NS_PER_DAY
        if first == last and first in self.days:
            return
        for day in present_days(tt_ns):
            if day not in self.days:
                self.tables.add(self.day_table(day))
                self.days.add(day)

    def day_table(self, day: int) -> CorrectionTable:
        """The table of TT day ``day`` ([day, day + 1) in TT ns // NS_PER_DAY), from the
        cache or built (it is not added to the set)."""
        start = day * NS_PER_DAY
        return self._cache.table(self._position, start, start + NS_PER_DAY)

    def provenance(self) -> str:
        """What determines the tables (JSON, for output metadata; built per TT day)."""
        return json.dumps({**self._cache.provenance(self._position),
                           "pieces": "one per TT day holding events, [day, day + 1)"})
