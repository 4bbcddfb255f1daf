"""What is watched: a target (tagger, position, template) and the recipes selecting its events.

A recipe is a set of cuts (energy, distance from the target, classifier score,
telescopes); each recipe of a target keeps statistics of its own. Distances are
compared as cosines of the great-circle distance, so no inverse trigonometric
function is evaluated per event.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from .barycentre import SkyPosition
from .batch import EventBatch
from .harmonicsums import exp_two_pi_i
from .tagger import TargetTagger

if TYPE_CHECKING:
    from .template import PulseTemplate

__all__ = ["Recipe", "TargetSetup", "cos_angular_distance"]


@dataclass(frozen=True)
class Recipe:
    """Cuts selecting the events of one statistic. ``None`` disables a cut.

    Energies in keV, the distance from the target in degrees, the score on the
    instrument's scale; ``telescopes_any`` is a bit mask of which at least one
    telescope must have seen the event.
    """

    name: str
    energy_min_kev: float | None = None
    energy_max_kev: float | None = None
    max_distance_deg: float | None = None
    min_score: float | None = None
    use_weights: bool = False
    telescopes_any: int | None = None

    def select(self, batch: EventBatch, cos_distance: np.ndarray | None) -> np.ndarray:
        """Boolean mask of the events passing every cut. ``cos_distance`` is the cosine
        of each event's angular distance from the target. A cut on a column the
        stream does not carry selects nothing."""
        keep = np.ones(len(batch), bool)
        for mask in (self._energy_cut(batch.energy_kev), self._distance_cut(cos_distance),
                     self._score_cut(batch.score), self._telescope_cut(batch.telescope_mask)):
            if mask is None:
                continue
            if mask is False:
                return np.zeros(len(batch), bool)
            keep &= mask
        return keep

    def columns(self) -> frozenset[str]:
        """The optional event columns this recipe's cuts and weights read."""
        used = {"energy_kev": self.energy_min_kev is not None or self.energy_max_kev is not None,
                "ra_deg": self.max_distance_deg is not None,
                "dec_deg": self.max_distance_deg is not None,
                "score": self.min_score is not None, "weight": self.use_weights,
                "telescope_mask": self.telescopes_any is not None}
        return frozenset(name for name, needed in used.items() if needed)

    # Each cut: None when disabled, False when the stream lacks its column, else a mask.

    def _energy_cut(self, energy):
        if self.energy_min_kev is None and self.energy_max_kev is None:
            return None
        if energy is None:
            return False
        keep = np.ones(energy.shape, bool)
        if self.energy_min_kev is not None:
            keep &= energy >= self.energy_min_kev
        if self.energy_max_kev is not None:
            keep &= energy < self.energy_max_kev
        return keep

    def _distance_cut(self, cos_distance):
        if self.max_distance_deg is None:
            return None
        if cos_distance is None:
            return False
        return cos_distance >= np.cos(np.radians(self.max_distance_deg))

    def _score_cut(self, score):
        if self.min_score is None:
            return None
        return False if score is None else score >= self.min_score

    def _telescope_cut(self, telescopes):
        if self.telescopes_any is None:
            return None
        if telescopes is None:
            return False
        return (telescopes & np.uint64(self.telescopes_any)) != 0


@dataclass
class TargetSetup:
    """One watched pulsar: its tagger, sky position, recipes and (optional) template.

    ``region_radius_deg`` (degrees) keeps only events that close to the target when
    the stream carries directions; ``clock_recipe`` indexes the recipe whose events
    feed the clock check.
    """

    tagger: TargetTagger
    position: SkyPosition
    recipes: list[Recipe]
    template: PulseTemplate | None = None
    region_radius_deg: float | None = None
    clock_recipe: int = 0

    @property
    def name(self) -> str:
        """The target's name (that of its tagger)."""
        return self.tagger.name

    def columns(self) -> frozenset[str]:
        """The optional event columns its region cut and recipes read."""
        region = {"ra_deg", "dec_deg"} if self.region_radius_deg is not None else set()
        return frozenset(region.union(*(recipe.columns() for recipe in self.recipes)))


def cos_angular_distance(ra_deg, dec_deg, position: SkyPosition) -> np.ndarray:
    """Cosine of the great-circle distance from the target (spherical law of cosines).

    Cuts compare it with cos(radius): no inverse function per event. Near 1 its
    rounding (a few 1e-16) corresponds to 3e-8 rad, far below any cut's meaning.
    Sines and cosines come from ``exp_two_pi_i`` of the angles in turns."""
    dec0 = np.radians(position.declination_deg)
    dec = exp_two_pi_i(np.asarray(dec_deg) / 360.0)
    delta_ra = exp_two_pi_i((np.asarray(ra_deg) - position.right_ascension_deg) / 360.0)
    return dec.imag * np.sin(dec0) + dec.real * np.cos(dec0) * delta_ra.real
