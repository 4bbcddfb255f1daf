"""Each recipe's share of a batch's tagged events added to its moments: the last step
of the chain (``chain``), in a module of its own that imports numpy and the moments
alone, for a process that adds up statistics and does nothing else
(``tagging.aside``).

A recipe is known here by its bit in the ``recipe_flags`` column (recipe i has bit
i) and by whether it weights its events: ``weighted``, one flag per recipe, in order
(``[recipe.use_weights for recipe in target.recipes]``).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from .accounting import EXCLUDED_FROM_STATISTICS
from .timebinned import TimeBinnedMoments, update_together

__all__ = ["recipe_rows", "add_recipe_moments"]


def recipe_rows(recipes: int, recipe_flags: np.ndarray,
                quality: np.ndarray) -> list[np.ndarray | slice | None]:
    """Per recipe (of ``recipes``), the rows its statistics take: those with its bit
    set, except the ones tagged outside their model's validity. ``slice(None)`` when
    that is every row (no copy needed), None when none."""
    usable = (quality & EXCLUDED_FROM_STATISTICS) == 0
    everything = bool(usable.all())
    chosen: list[np.ndarray | slice | None] = []
    for bit in range(recipes):
        mask = ((recipe_flags >> np.uint32(bit)) & 1).astype(bool)
        if everything:
            chosen.append(slice(None) if mask.all() else mask if mask.any() else None)
            continue
        mask &= usable
        chosen.append(mask if mask.any() else None)
    return chosen


def add_recipe_moments(moments: Sequence[TimeBinnedMoments], weighted: Sequence[bool],
                       tt_ns, phase, weight, recipe_flags,
                       quality) -> list[np.ndarray | slice | None]:
    """Add tagged events (archive columns) to each recipe's moments, weighted where
    ``weighted`` says so; returns the rows each recipe took (``recipe_rows``).

    Recipes that take every row share one pass of the moments' kernel
    (``timebinned.update_together``)."""
    chosen = recipe_rows(len(weighted), recipe_flags, quality)
    every = [i for i, rows in enumerate(chosen) if isinstance(rows, slice)]
    if every:
        update_together([moments[i] for i in every], tt_ns, phase,
                        [weight if weighted[i] else None for i in every])
    for rows, uses_weights, binned in zip(chosen, weighted, moments, strict=True):
        if rows is not None and not isinstance(rows, slice):
            binned.update(tt_ns[rows], phase[rows], weight[rows] if uses_weights else None)
    return chosen
