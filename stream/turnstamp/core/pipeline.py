"""The core's one entry point: feed batches of events, read statistics.

Theory of operation
-------------------
``Pipeline.feed(batch)`` runs the whole chain on one batch, column-wise:

1. value checks (``batch.check_values``): bad events are refused with a reason;
2. time base: the site clock chain, then the instrument's scale to TT;
3. per target (``targets``): the region cut (when the stream has directions),
   barycentric time and phase (``tagger``), the recipe cuts (a bit per recipe);
4. accounting: every event is *tagged* (written to the archive for at least
   one target), *filtered* (valid but selected by no target) or *rejected*;
5. the moment accumulators of each recipe (``timebinned.TimeBinnedMoments``,
   binned by TT event time so that windows and clock-check chunks are deterministic).

Steps 1 to 4 and the recipes' share of step 5 are the pure per-batch functions of
``chain``, which offline tagging runs as well; this object keeps what lasts between
batches (statistics, the clock check's reservoir, the counters).

The result is returned as plain columns; the shell writes them. Statistics are
read with ``significance()``, ``profiles()`` and ``clock_check()`` whenever the
shell's cadence asks (rows built by ``readout``; a missing or smeared pulse is
refolded under alternative hypotheses by ``refold``). Nothing here reads a clock
or touches a file, so feeding a night whole or split at any points gives the
same outputs (the statistics to float rounding).
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from .accounting import Counters, FeedResult, QualityCounts
from .batch import EventBatch
from .chain import ChainSettings, add_recipe_moments, join_timed, tag_parts, time_base
from .clock.apparent import SiteSpin
from .clock.check import CheckSettings, check_target
from .clock.chunks import ChunkOffset
from .clock.joint import attribute
from .clock.verdict import ClockVerdict
from .clock.wording import utc_text
from .moments import DEFAULT_BINS, MAX_HARMONICS, PhaseMoments
from .readout import profile_row, significance_row
from .refold import MIN_EVENTS, Reservoir, refold_scores
from .stacking import STATE_VERSION, resume_problem
from .tagger import TargetTagger
from .targets import TargetSetup
from .template import PulseTemplate
from .timebase import NS_PER_S, ClockCorrection, LeapSecondTable
from .timebinned import TimeBinnedMoments

__all__ = ["PipelineSettings", "Pipeline"]


@dataclass(frozen=True)
class PipelineSettings:
    """Time base and statistics settings (built from the configuration by the shell)."""

    leaps: LeapSecondTable
    clock_chain: tuple[ClockCorrection, ...] = ()
    earliest_ns: int = -10 * 365 * 86_400 * NS_PER_S
    latest_ns: int = 100 * 365 * 86_400 * NS_PER_S
    harmonics: int = MAX_HARMONICS
    bins: int = DEFAULT_BINS
    interval_ns: int = 10 * NS_PER_S
    windows_ns: tuple[int, ...] = (300 * NS_PER_S, 3600 * NS_PER_S)
    retain_ns: int = 24 * 3600 * NS_PER_S
    clock_chunk_ns: int | None = 60 * NS_PER_S
    tolerance_cycles: float = 0.02
    tolerance_us: float | None = None
    reservoir_events: int = 1 << 18
    """Recent clock-recipe events kept for refolding under alternative hypotheses."""
    checked_columns: frozenset[str] | None = None
    """Optional event columns whose values are checked (None: every one present)."""


class Pipeline:
    """Event batches in; archive columns, rejects and live statistics out."""

    def __init__(self, settings: PipelineSettings, targets: list[TargetSetup]):
        names = [t.name for t in targets]
        if not targets or len(set(names)) != len(names):
            raise ValueError(f"targets must be non-empty with unique names: {names}")
        self.settings = settings
        self.chain = ChainSettings(settings.leaps, settings.clock_chain, settings.earliest_ns,
                                   settings.latest_ns, settings.checked_columns)
        self.targets = {t.name: t for t in targets}
        self.counters = Counters()
        self.quality = QualityCounts()  # tagged events with a quality problem, by flag
        self.moments: dict[str, list[TimeBinnedMoments]] = {}
        self.reservoirs: dict[str, Reservoir] = {}
        self.phase_reference: dict[str, str] = {}
        self._chunk_cache: dict[str, dict] = {}
        self._refolds: dict[str, tuple[int, dict]] = {}
        for target in targets:
            self._reset_statistics(target)

    # -- configuration while running ------------------------------------------------
    def _reset_statistics(self, target: TargetSetup) -> None:
        s = self.settings
        self.moments[target.name] = [
            TimeBinnedMoments(s.interval_ns, s.harmonics, s.bins, s.retain_ns)
            for _ in target.recipes]
        self.reservoirs[target.name] = Reservoir(s.reservoir_events)
        self.phase_reference[target.name] = target.tagger.phase_reference
        self._chunk_cache.pop(target.name, None)
        self._refolds.pop(target.name, None)

    def replace_models(self, name: str, tagger: TargetTagger) -> bool:
        """Swap a target's spin models (hot reload). Statistics restart when the new
        models change the phase reference; returns True when they did."""
        target = self.targets[name]
        target.tagger = tagger
        if tagger.phase_reference != self.phase_reference[name]:
            self._reset_statistics(target)
            return True
        return False

    def replace_template(self, name: str, template: PulseTemplate | None) -> None:
        """Swap a target's pulse template (None: no clock check for it)."""
        self.targets[name].template = template

    # -- the hot path -------------------------------------------------------------
    def feed(self, batch: EventBatch) -> FeedResult:
        """Process one batch; see the module docstring."""
        return self.feed_joined([batch])[0]

    def feed_joined(self, batches: Sequence[EventBatch]) -> tuple[FeedResult, list[FeedResult]]:
        """Process joinable batches (``EventBatch.joinable``, e.g. messages queued
        together) as one: each batch's value checks and time base alone (an event id
        repeats only within its batch), then one pass of tagging and statistics over
        them all. Returns the result of the whole and of each batch (as ``feed`` of
        that batch would give it; the statistics agree to float rounding)."""
        timed = join_timed([time_base(batch, self.chain) for batch in batches])
        result, parts = tag_parts(EventBatch.join(batches), timed, self.targets.values(),
                                  [len(batch) for batch in batches])
        for name, columns in result.archive.items():
            self.accumulate(name, columns["site_tt_ns"], columns["phase"], columns["weight"],
                            columns["recipe_flags"], columns["quality_flags"],
                            columns["barycentric_correction_s"])
        self.counters.add_feed(result)
        return result, parts

    def accumulate(self, name: str, tt_ns, phase, weight, recipe_flags, quality, correction_s):
        """Add tagged events to a target's statistics (``chain.add_recipe_moments``):
        each recipe takes the rows with its bit set, except those tagged outside their
        model's validity (counted in ``quality`` with every other flag). Used by
        ``feed`` and to replay archive rows after a restart."""
        target = self.targets[name]
        self.quality.add(name, quality)
        chosen = add_recipe_moments(self.moments[name],
                                    [recipe.use_weights for recipe in target.recipes], tt_ns,
                                    phase, weight, recipe_flags, quality)
        rows = chosen[target.clock_recipe]
        if rows is not None:
            recipe = target.recipes[target.clock_recipe]
            self.reservoirs[name].add(tt_ns[rows], correction_s[rows],
                                      weight[rows] if recipe.use_weights
                                      else np.ones(len(tt_ns[rows])))

    # -- statistics ---------------------------------------------------------------
    @property
    def trials(self) -> int:
        """Independent (target, recipe) pairs watched: the trials factor."""
        return sum(len(t.recipes) for t in self.targets.values())

    def windows(self, target: str, recipe: int):
        """(label, length_s, PhaseMoments) for the cumulative total and each window."""
        moments = self.moments[target][recipe]
        out = [("cumulative", 0, moments.total())]
        for length in self.settings.windows_ns:
            label = f"{length // NS_PER_S // 60}min"
            window = (moments.window(length) if moments.latest_ns is not None
                      else PhaseMoments(self.settings.harmonics, self.settings.bins))
            out.append((label, length // NS_PER_S, window))
        return out

    def significance(self) -> list[dict]:
        """One row per target x recipe x window (see ``files.schemas.SIGNIFICANCE``)."""
        rows = []
        trials = self.trials
        for name, target in self.targets.items():
            for r, recipe in enumerate(target.recipes):
                latest = self.moments[name][r].latest_ns
                for label, length_s, m in self.windows(name, r):
                    rows.append(significance_row(
                        m, trials, data_until_tt_ns=latest if latest is not None else 0,
                        target=name, recipe=recipe.name, window=label, window_s=length_s,
                        phase_reference=self.phase_reference[name]))
        return rows

    def _latest(self, target: str) -> int | None:
        times = [m.latest_ns for m in self.moments[target] if m.latest_ns is not None]
        return max(times) if times else None

    def frequency_hz(self, target: str) -> float:
        """Spin frequency at the barycentre at the latest event (Hz)."""
        tagger = self.targets[target].tagger
        latest = self._latest(target) or tagger.table.start_ns
        return float(tagger.calculators[-1].frequency_at(np.array([latest]))[0])

    def profiles(self) -> list[dict]:
        """One row per target x recipe for the cumulative fold (``files.schemas.PROFILES``)."""
        rows = []
        for name, target in self.targets.items():
            for r, recipe in enumerate(target.recipes):
                binned = self.moments[name][r]
                rows.append(profile_row(
                    binned.total(), target.template, lambda name=name: self.frequency_hz(name),
                    data_until_tt_ns=binned.latest_ns or 0, target=name, recipe=recipe.name))
        return rows

    def clock_check(self) -> list[tuple[str, str, ClockVerdict, list[ChunkOffset]]]:
        """The clock-chain verdict per target that has a template (``clock.check``); with
        several such targets, each verdict also says whether its effect is shared by all
        (the clock) or its own (its model) (``clock.joint``)."""
        out = []
        s = self.settings
        settings = CheckSettings(s.clock_chunk_ns, s.tolerance_cycles, s.tolerance_us)
        text = utc_text(s.leaps)
        spins: dict[str, SiteSpin] = {}
        for name, target in self.targets.items():
            if target.template is None:
                continue
            spins[name] = spin = SiteSpin(target.tagger)
            verdict, chunks = check_target(
                self.moments[name][target.clock_recipe], target.template, spin, settings,
                refold=functools.partial(self._refold, name), time_text=text,
                cache=self._chunk_cache.setdefault(name, {}))
            excluded = self.quality.excluded(name)
            if excluded:  # said first: "no signal" may only mean no usable events
                verdict = replace(verdict, lines=[
                    f"{excluded:,} events of {name} fell outside its spin model's validity "
                    "window: not in this check.", *verdict.lines])
            out.append((name, target.recipes[target.clock_recipe].name, verdict, chunks))
        return attribute(out, spins, text)

    def _refold(self, name: str) -> tuple[dict, int] | None:
        """H-tests of recent events folded as tagged and under each hypothesis of
        ``refold.REFOLDS`` (None with too few events); refolded again only after a tenth
        of the reservoir is new."""
        reservoir = self.reservoirs[name]
        tt, correction, weight = reservoir.contents()
        target = self.targets[name]
        if tt.size < MIN_EVENTS:
            return None
        last = self._refolds.get(name)
        if last is not None and reservoir.added - last[0] < reservoir.size // 10:
            return last[1], tt.size
        weighted = target.recipes[target.clock_recipe].use_weights
        scores = refold_scores(target.tagger, tt, correction, weight, weighted,
                               self.settings.harmonics, self.settings.bins)
        self._refolds[name] = (reservoir.added, scores)
        return scores, tt.size

    # -- checkpoints --------------------------------------------------------------
    def to_state(self) -> dict:
        """Checkpoint: counters and every target's moments, JSON-serialisable."""
        return {
            "version": STATE_VERSION,
            "counters": self.counters.to_state(),
            "quality": self.quality.to_state(),
            "targets": {
                name: {"phase_reference": self.phase_reference[name],
                       "recipes": [t.recipes[i].name for i in range(len(t.recipes))],
                       "moments": [m.to_state() for m in self.moments[name]]}
                for name, t in self.targets.items()},
        }

    def restore(self, state: dict) -> list[str]:
        """Resume from ``to_state()``. Targets whose phase reference or recipes changed
        start afresh; returns a note for each."""
        notes = []
        self.counters = Counters.from_state(state["counters"])
        self.quality = QualityCounts.from_state(state.get("quality"))
        for name, saved in state.get("targets", {}).items():
            target = self.targets.get(name)
            problem = resume_problem(name, saved, None if target is None else (
                self.phase_reference[name], [r.name for r in target.recipes]))
            if problem is not None:
                notes.append(problem)
                continue
            self.moments[name] = [TimeBinnedMoments.from_state(m)
                                  for m in saved["moments"]]
        return notes
