"""What a night holds, gathered once for every section of the report: the targets and
their recipes, whether each recipe is weighted, the archive reduced to a time grid,
the last profile and clock rows, and the UTC time axis of the figures."""

from __future__ import annotations

from dataclasses import dataclass

from .figuredata import last_rows
from .night import NightFolder, config_targets, recipes_from_metadata
from .timegrid import ArchiveSummary, UtcHours, first_data_ns, last_data_ns, reduce_archive

__all__ = ["NightContent", "gather"]


@dataclass
class NightContent:
    """The night as the sections of the report see it.

    Attributes
    ----------
    night : NightFolder
        The folder as read (its ``notes`` collect what the report could not show).
    targets : dict of str to list of str
        Recipe names per target, in bit order.
    weighted : dict of (str, str) to bool
        Whether the statistics of each (target, recipe) use weights.
    archive : ArchiveSummary
        The archive reduced to a time grid.
    profile_rows, clock_rows : dict
        The last ``profiles`` row per (target, recipe), ``clock`` row per (target,).
    trials : int
        Number of (target, recipe) pairs: the trials factor of computed curves.
    hours : UtcHours or None
        The figures' time axis (None when no instant of data is known).
    start_ns, end_ns : int or None
        First and last instant of data, TT ns since 2000-01-01T12:00:00.
    """

    night: NightFolder
    targets: dict[str, list[str]]
    weighted: dict[tuple[str, str], bool]
    archive: ArchiveSummary
    profile_rows: dict[tuple, dict]
    clock_rows: dict[tuple, dict]
    trials: int
    hours: UtcHours | None
    start_ns: int | None
    end_ns: int | None


def gather(night: NightFolder) -> NightContent:
    """Targets, weights, the reduced archive and the time axis of one night."""
    from ...files.bundled import bundled_leap_seconds

    targets = _targets(night)
    weighted = _weighted_flags(night)
    profile_rows = last_rows(night.table("profiles"), ("target", "recipe"))
    bins = {(str(t), str(r)): len(row["counts"]) for (t, r), row in profile_rows.items()
            if row.get("counts")}
    with_moments = night.table("significance") is None or night.table("profiles") is None
    archive = reduce_archive(night, weighted, bins, with_moments, targets)
    for target, recipe in archive.grids:
        _add_recipe(targets, target, recipe)
    start_ns = first_data_ns(night, archive)
    end_ns = last_data_ns(night, archive)
    hours = None
    if start_ns is not None:
        hours = UtcHours(bundled_leap_seconds(), start_ns)
        if end_ns is not None:
            hours.use_days_beyond(end_ns - start_ns)
    return NightContent(
        night=night, targets=targets, weighted=weighted, archive=archive,
        profile_rows=profile_rows, clock_rows=last_rows(night.table("clock"), ("target",)),
        trials=max(1, sum(len(r) for r in targets.values())), hours=hours,
        start_ns=start_ns, end_ns=end_ns)


def _add_recipe(targets: dict[str, list[str]], target, recipe) -> None:
    names = targets.setdefault(str(target), [])
    if str(recipe) not in names:
        names.append(str(recipe))


def _targets(night: NightFolder) -> dict[str, list[str]]:
    """Recipes per target: file metadata, then the small streams, then ``status.json``."""
    targets = dict(recipes_from_metadata(night.metadata))
    for stem in ("significance", "profiles", "clock"):
        table = night.table(stem)
        if table is None:
            continue
        for target, recipe in zip(table["target"].to_pylist(), table["recipe"].to_pylist(),
                                  strict=True):
            _add_recipe(targets, target, recipe)
    for target in (night.status or {}).get("targets") or []:
        targets.setdefault(str(target.get("name")), [])
        for recipe in target.get("recipes") or []:
            _add_recipe(targets, target.get("name"), recipe.get("name"))
    return targets


def _weighted_flags(night: NightFolder) -> dict[tuple[str, str], bool]:
    """Whether each recipe's statistics use weights (config, then rows, then status)."""
    out: dict[tuple[str, str], bool] = {}
    for name, target in config_targets(night.metadata).items():
        for recipe in target.get("recipes") or []:
            if isinstance(recipe, dict) and "use_weights" in recipe:
                out[(name, str(recipe.get("name")))] = bool(recipe["use_weights"])
    significance = night.table("significance")
    if significance is not None:
        for (target, recipe), row in last_rows(significance, ("target", "recipe")).items():
            if row.get("events"):
                out[(str(target), str(recipe))] = bool(row["weighted"])
    for target in (night.status or {}).get("targets") or []:
        for recipe in target.get("recipes") or []:
            if isinstance(recipe, dict) and "weighted" in recipe:
                out.setdefault((str(target.get("name")), str(recipe.get("name"))),
                               bool(recipe["weighted"]))
    return out
