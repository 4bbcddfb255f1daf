"""The core's one entry point: feed batches of events, read statistics.

Theory of operation
-------------------
``Pipeline.feed(batch)`` runs the whole chain on one batch, column-wise:

1. value checks (``batch.check_values``): bad events are refused with a reason;
2. time base: the site clock chain, then the instrument's scale to TT;
3. per target: the region cut (when the stream has directions), barycentric
   time and phase (``tagger``), the recipe cuts (a bit per recipe), and the
   moment accumulators of each recipe (``stats.TimeBinnedMoments``, binned by TT
   event time so that windows and clock-check chunks are deterministic);
4. accounting: every event is *tagged* (written to the archive for at least
   one target), *filtered* (valid but selected by no target) or *rejected*.

The result is returned as plain columns; the shell writes them. Statistics are
read with ``significance()``, ``profiles()`` and ``clock_check()`` whenever the
shell's cadence asks. Nothing here reads a clock or touches a file, so feeding
a night whole or split at any points gives identical outputs.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from ..errors import InputError, RejectReason
from . import clockcheck, profile, stats
from .accounting import Counters, FeedResult
from .barycentre import SkyPosition
from .batch import VALUE_CHECKS, EventBatch, check_values
from .flags import Quality
from .tagger import CHUNK, TargetTagger
from .template import PulseTemplate, fit_offset
from .timebase import NS_PER_S, ClockCorrection, LeapSecondTable, to_tt

__all__ = ["Recipe", "TargetSetup", "PipelineSettings", "Pipeline", "stack_states"]


@dataclass(frozen=True)
class Recipe:
    """Cuts selecting the events of one statistic. ``None`` disables a cut."""

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
        nothing = np.zeros(len(batch), bool)
        energy, score, telescopes = batch.energy_kev, batch.score, batch.telescope_mask
        if self.energy_min_kev is not None or self.energy_max_kev is not None:
            if energy is None:
                return nothing
            if self.energy_min_kev is not None:
                keep &= energy >= self.energy_min_kev
            if self.energy_max_kev is not None:
                keep &= energy < self.energy_max_kev
        if self.max_distance_deg is not None:
            if cos_distance is None:
                return nothing
            keep &= cos_distance >= np.cos(np.radians(self.max_distance_deg))
        if self.min_score is not None:
            if score is None:
                return nothing
            keep &= score >= self.min_score
        if self.telescopes_any is not None:
            if telescopes is None:
                return nothing
            keep &= (telescopes & np.uint64(self.telescopes_any)) != 0
        return keep


@dataclass
class TargetSetup:
    """One watched pulsar."""

    tagger: TargetTagger
    position: SkyPosition
    recipes: list[Recipe]
    template: PulseTemplate | None = None
    region_radius_deg: float | None = None
    clock_recipe: int = 0

    @property
    def name(self) -> str:
        return self.tagger.name


@dataclass(frozen=True)
class PipelineSettings:
    """Time base and statistics settings (built from the configuration by the shell)."""

    leaps: LeapSecondTable
    clock_chain: tuple[ClockCorrection, ...] = ()
    earliest_ns: int = -10 * 365 * 86_400 * NS_PER_S
    latest_ns: int = 100 * 365 * 86_400 * NS_PER_S
    harmonics: int = stats.MAX_HARMONICS
    bins: int = stats.DEFAULT_BINS
    interval_ns: int = 10 * NS_PER_S
    windows_ns: tuple[int, ...] = (300 * NS_PER_S, 3600 * NS_PER_S)
    retain_ns: int = 24 * 3600 * NS_PER_S
    clock_chunk_ns: int | None = 60 * NS_PER_S
    tolerance_cycles: float = 0.02
    tolerance_us: float | None = None
    reservoir_events: int = 1 << 18
    """Recent clock-recipe events kept for refolding under alternative hypotheses."""


class Reservoir:
    """The most recent events of a target's clock-check recipe (a ring buffer), kept
    so that the clock check can refold them under alternative hypotheses."""

    def __init__(self, size: int):
        self.size = size
        self.tt_ns = np.zeros(size, np.int64)
        self.correction_s = np.zeros(size)
        self.weight = np.ones(size)
        self.filled = 0
        self.added = 0  # events ever added
        self._next = 0

    def add(self, tt_ns, correction_s, weight) -> None:
        n = tt_ns.size
        if n >= self.size:
            tt_ns, correction_s, weight = tt_ns[-self.size:], correction_s[-self.size:], \
                weight[-self.size:]
            n = self.size
        rows = (self._next + np.arange(n)) % self.size
        self.tt_ns[rows], self.correction_s[rows], self.weight[rows] = tt_ns, correction_s, weight
        self._next = (self._next + n) % self.size
        self.filled = min(self.filled + n, self.size)
        self.added += n

    def contents(self):
        rows = slice(0, self.filled)
        return self.tt_ns[rows], self.correction_s[rows], self.weight[rows]


def cos_angular_distance(ra_deg, dec_deg, position: SkyPosition) -> np.ndarray:
    """Cosine of the great-circle distance from the target (spherical law of cosines).

    Cuts compare it with cos(radius): no inverse function per event. Near 1 its
    rounding (1e-16) corresponds to 1e-8 rad, far below any cut's meaning."""
    dec0 = np.radians(position.declination_deg)
    dec = np.radians(dec_deg)
    delta_ra = np.radians(ra_deg - position.right_ascension_deg)
    return np.sin(dec) * np.sin(dec0) + np.cos(dec) * np.cos(dec0) * np.cos(delta_ra)


class Pipeline:
    """Event batches in; archive columns, rejects and live statistics out."""

    def __init__(self, settings: PipelineSettings, targets: list[TargetSetup]):
        names = [t.name for t in targets]
        if not targets or len(set(names)) != len(names):
            raise ValueError(f"targets must be non-empty with unique names: {names}")
        self.settings = settings
        self.targets = {t.name: t for t in targets}
        self.counters = Counters()
        self.moments: dict[str, list[stats.TimeBinnedMoments]] = {}
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
            stats.TimeBinnedMoments(s.interval_ns, s.harmonics, s.bins, s.retain_ns)
            for _ in target.recipes]
        self.reservoirs[target.name] = Reservoir(s.reservoir_events)
        self.phase_reference[target.name] = _phase_reference(target.tagger)
        self._chunk_cache.pop(target.name, None)
        self._refolds.pop(target.name, None)

    def replace_models(self, name: str, tagger: TargetTagger) -> bool:
        """Swap a target's spin models (hot reload). Statistics restart when the new
        models change the phase reference; returns True when they did."""
        target = self.targets[name]
        target.tagger = tagger
        if _phase_reference(tagger) != self.phase_reference[name]:
            self._reset_statistics(target)
            return True
        return False

    def replace_template(self, name: str, template: PulseTemplate | None) -> None:
        self.targets[name].template = template

    # -- the hot path -------------------------------------------------------------
    def feed(self, batch: EventBatch) -> FeedResult:
        """Process one batch; see the module docstring."""
        s = self.settings
        n = len(batch)
        codes = check_values(batch, s.earliest_ns, s.latest_ns)
        valid = codes == 0
        tt_ns = np.zeros(n, np.int64)
        extra = np.zeros(n) if s.clock_chain else None
        flags = np.zeros(n, np.uint32)
        if valid.any():
            readings = batch.time_ns[valid]
            clock_extra = np.zeros(readings.size)
            for link in s.clock_chain:
                readings, clock_extra, link_flags = link.apply(readings, clock_extra)
                flags[valid] |= link_flags
            tt, scale_flags = to_tt(readings, batch.time_scale, s.leaps)
            tt_ns[valid] = tt
            flags[valid] |= scale_flags
            if extra is not None:
                extra[valid] = clock_extra
        # barycentre tables must cover every valid event for every target
        covered = np.ones(n, bool)
        for target in self.targets.values():
            covered &= target.tagger.table.contains(tt_ns)
        outside = valid & ~covered
        codes[outside] = len(VALUE_CHECKS) + 1
        valid &= covered

        tagged = np.zeros(n, bool)
        archive: dict[str, dict[str, np.ndarray]] = {}
        for target in self.targets.values():
            columns = self._tag_target(target, batch, valid, tt_ns, extra, flags)
            if columns is not None:
                rows = columns.pop("_rows")
                tagged[rows] = True
                archive[target.name] = columns

        refused = np.flatnonzero(codes)
        reasons, details = _describe(codes[refused])
        valid_tt = tt_ns[valid]
        result = FeedResult(
            archive=archive, rejected_index=refused, rejected_reason=reasons,
            rejected_detail=details, events=n, tagged=int(tagged.sum()),
            filtered=int((valid & ~tagged).sum()),
            first_tt_ns=int(valid_tt.min()) if valid_tt.size else None,
            last_tt_ns=int(valid_tt.max()) if valid_tt.size else None)
        self.counters.add_feed(result)
        return result

    def _tag_target(self, target, batch, valid, tt_ns, extra, flags):
        cos_distance = None
        if batch.ra_deg is not None and batch.dec_deg is not None:
            cos_distance = np.full(len(batch), -2.0)  # below any cut
            cos_distance[valid] = cos_angular_distance(batch.ra_deg[valid], batch.dec_deg[valid],
                                                       target.position)
        rows = valid.copy()
        if target.region_radius_deg is not None and cos_distance is not None:
            rows &= cos_distance >= np.cos(np.radians(target.region_radius_deg))
        index = np.flatnonzero(rows)
        if index.size == 0:
            return None
        sub = batch if index.size == len(batch) else batch.take(index)
        sub_distance = None if cos_distance is None else cos_distance[index]
        result = target.tagger.tag(tt_ns[index], None if extra is None else extra[index])
        quality = flags[index] | result.flags
        recipe_flags = np.zeros(index.size, np.uint32)
        for bit, recipe in enumerate(target.recipes):
            recipe_flags[recipe.select(sub, sub_distance)] |= np.uint32(1 << bit)
        weights = np.ones(index.size) if sub.weight is None else sub.weight
        self.accumulate(target.name, tt_ns[index], result.phase, weights, recipe_flags, quality,
                        result.correction_s)
        return {
            "_rows": index,
            "event_id": sub.event_id,
            "site_tt_ns": tt_ns[index],
            "barycentric_tdb_ns": result.barycentric_tdb_ns,
            "barycentric_correction_s": result.correction_s,
            "phase": result.phase,
            "pulse_number": result.pulse_number,
            "weight": weights,
            "recipe_flags": recipe_flags,
            "model_index": result.model_index.astype(np.int32),  # into tagger.model_ids
            "quality_flags": quality,
        }

    def accumulate(self, name: str, tt_ns, phase, weight, recipe_flags, quality, correction_s):
        """Add tagged events to a target's statistics: each recipe takes the rows with
        its bit set, except those tagged outside their model's validity. Used by
        ``feed`` and to replay archive rows after a restart."""
        target = self.targets[name]
        usable = (quality & Quality.OUTSIDE_MODEL_VALIDITY) == 0
        for bit, (recipe, moments) in enumerate(zip(target.recipes, self.moments[name],
                                                    strict=True)):
            chosen = usable & ((recipe_flags >> np.uint32(bit)) & 1).astype(bool)
            if not chosen.any():
                continue
            w = weight[chosen] if recipe.use_weights else None
            moments.update(tt_ns[chosen], phase[chosen], w)
            if bit == target.clock_recipe:
                self.reservoirs[name].add(tt_ns[chosen], correction_s[chosen],
                                          weight[chosen] if recipe.use_weights
                                          else np.ones(int(chosen.sum())))

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
                      else stats.PhaseMoments(self.settings.harmonics, self.settings.bins))
            out.append((label, length // NS_PER_S, window))
        return out

    def significance(self) -> list[dict]:
        """One row per target x recipe x window (see ``io.schemas.SIGNIFICANCE``)."""
        rows = []
        trials = self.trials
        for name, target in self.targets.items():
            for r, recipe in enumerate(target.recipes):
                latest = self.moments[name][r].latest_ns
                for label, length_s, m in self.windows(name, r):
                    h = stats.h_test(m)
                    z2 = stats.z2_test(m, min(2, m.harmonics))
                    rayleigh = stats.rayleigh_test(m)
                    rows.append({
                        "data_until_tt_ns": latest if latest is not None else 0,
                        "target": name, "recipe": recipe.name, "window": label,
                        "window_s": length_s, "phase_reference": self.phase_reference[name],
                        "events": m.count, "sum_weights": m.sum_w, "weighted": m.weighted,
                        "h_statistic": h.statistic, "h_harmonics": h.harmonics,
                        "h_log10_p": h.log_p / np.log(10), "h_sigma": h.sigma,
                        "z2_statistic": z2.statistic, "z2_harmonics": z2.harmonics,
                        "z2_sigma": z2.sigma, "rayleigh_statistic": rayleigh.statistic,
                        "rayleigh_sigma": rayleigh.sigma, "trials": trials,
                        "h_sigma_post_trials": stats.sigma_from_log_p(
                            stats.trials_log_p(h.log_p, trials)),
                    })
        return rows

    def _latest(self, target: str) -> int | None:
        times = [m.latest_ns for m in self.moments[target] if m.latest_ns is not None]
        return max(times) if times else None

    def frequency_hz(self, target: str) -> float:
        """Spin frequency at the barycentre at the latest event (Hz)."""
        tagger = self.targets[target].tagger
        latest = self._latest(target) or tagger.table.start_ns
        return float(tagger.predictors[-1].frequency_at(np.array([latest]))[0])

    def apparent_frequency_hz(self, target: str, instants=None) -> np.ndarray:
        """Spin frequency seen at the site (Hz) at TT instants (default: the latest
        event): f (1 + dC/dt), C the barycentric correction. A site clock error dt
        shifts phase by this times dt; the Doppler factor (up to 1e-4) is why a 1 s
        error shows as frac(f dt) plus a few hundredths of a cycle."""
        tagger = self.targets[target].tagger
        if instants is None:
            instants = [self._latest(target) or tagger.table.start_ns]
        instants = np.asarray(instants, dtype=np.int64)
        before, _, inside_before = tagger.table.evaluate(instants - NS_PER_S)
        after, _, inside_after = tagger.table.evaluate(instants + NS_PER_S)
        rate = np.where(inside_before & inside_after, (after - before) / 2.0, 0.0)
        return self.frequency_hz(target) * (1.0 + rate)

    def profiles(self) -> list[dict]:
        """One row per target x recipe for the cumulative fold (``io.schemas.PROFILES``)."""
        rows = []
        for name, target in self.targets.items():
            for r, recipe in enumerate(target.recipes):
                m = self.moments[name][r].total()
                latest = self.moments[name][r].latest_ns
                row = {"data_until_tt_ns": latest or 0, "target": name, "recipe": recipe.name,
                       "events": m.count, "sum_weights": m.sum_w}
                binned = profile.binned_profile(m)
                row.update(counts=list(binned.counts), errors=list(binned.errors))
                scale = m.sum_w if m.sum_w > 0 else 1.0
                row.update(cos_moments=list(m.cos_sums / scale),
                           sin_moments=list(m.sin_sums / scale))
                if m.sum_w > 0:
                    summary = profile.summarize_profile(m)
                    row.update(harmonics=summary.harmonics,
                               background_per_bin=summary.background_per_bin,
                               pulsed_fraction=summary.pulsed_fraction_min,
                               pulsed_fraction_rms=summary.pulsed_fraction_rms,
                               peak_phase=summary.peak_phase_cycles,
                               peak_phase_sigma=summary.peak_phase_sigma_cycles)
                else:
                    row.update(harmonics=0, background_per_bin=0.0, pulsed_fraction=0.0,
                               pulsed_fraction_rms=0.0, peak_phase=0.0, peak_phase_sigma=0.0)
                shift = dict.fromkeys(("template_shift_cycles", "template_shift_sigma_cycles",
                                       "template_shift_us", "template_shift_sigma_us",
                                       "template_amplitude"))
                if target.template is not None and m.sum_w > 0:
                    fit = fit_offset(m, target.template)
                    f = self.frequency_hz(name)
                    shift.update(template_shift_cycles=fit.shift_cycles,
                                 template_shift_sigma_cycles=fit.sigma_cycles,
                                 template_shift_us=fit.shift_us(f),
                                 template_shift_sigma_us=fit.sigma_us(f),
                                 template_amplitude=fit.amplitude)
                row.update(shift)
                rows.append(row)
        return rows

    def clock_check(self) -> list[tuple[str, str, clockcheck.ClockVerdict,
                                          list[clockcheck.ChunkOffset]]]:
        """The clock-chain verdict per target that has a template."""
        out = []
        s = self.settings
        for name, target in self.targets.items():
            if target.template is None:
                continue
            moments = self.moments[name][target.clock_recipe]
            chunks = clockcheck.chunk_offsets(moments.intervals(), target.template,
                                              chunk_ns=s.clock_chunk_ns,
                                              cache=self._chunk_cache.setdefault(name, {}))
            night = fit_offset(moments.total(), target.template) \
                if moments.total().sum_w > 0 else None
            ends = [chunks[0].mid_ns, chunks[-1].mid_ns] if chunks else None
            apparent = self.apparent_frequency_hz(name, ends)
            verdict = clockcheck.diagnose(chunks, night, float(apparent.mean()),
                                          tolerance_cycles=s.tolerance_cycles,
                                          tolerance_us=s.tolerance_us,
                                          frequency_spread_hz=float(np.ptp(apparent)) / 2)
            if verdict.kind in ("no_signal", "smeared", "insufficient_signal"):
                verdict = self._refold(name, verdict)
            out.append((name, target.recipes[target.clock_recipe].name, verdict, chunks))
        return out

    REFOLDS = {
        "barycentre_sign": ("the barycentric correction applied with the opposite sign",
                            lambda c: -c),
        "no_barycentre": ("no barycentric correction at all (topocentric times)",
                          lambda c: np.zeros_like(c)),
    }

    def _refold(self, name: str, verdict):
        """When the pulse is missing or smeared, refold recent events under the
        hypotheses in ``REFOLDS``; a pulse that appears only under one of them names
        the fault (status FAIL, kind = the hypothesis)."""
        reservoir = self.reservoirs[name]
        tt, correction, weight = reservoir.contents()
        target = self.targets[name]
        if tt.size < 100:
            return verdict
        last = self._refolds.get(name)
        if last is not None and reservoir.added - last[0] < reservoir.size // 10:
            scores = last[1]  # refold again only after a tenth of the reservoir is new
        else:
            scores = self._refold_scores(target, tt, correction, weight)
            self._refolds[name] = (reservoir.added, scores)
        best = max(self.REFOLDS, key=lambda k: scores[k].sigma)
        if scores[best].sigma < 5.0 or scores[best].sigma < scores["nominal"].sigma + 3.0:
            return verdict
        lines = [f"FAIL: the pulse appears only with {self.REFOLDS[best][0]}: H = "
                 f"{scores[best].statistic:.1f} ({scores[best].sigma:.1f}σ) on the last "
                 f"{tt.size} events, against H = {scores['nominal'].statistic:.1f} "
                 f"({scores['nominal'].sigma:.1f}σ) as tagged.", *verdict.lines]
        return replace(verdict, status="FAIL", kind=best, lines=lines)

    def _refold_scores(self, target, tt, correction, weight) -> dict:
        weighted = target.recipes[target.clock_recipe].use_weights
        scores = {}
        for kind, (_, change) in {"nominal": ("", lambda c: c), **self.REFOLDS}.items():
            moments = stats.PhaseMoments(self.settings.harmonics, self.settings.bins)
            for lo in range(0, tt.size, CHUNK):  # chunks: no large temporaries
                part = slice(lo, lo + CHUNK)
                index = target.tagger.choose_models(tt[part])
                for i in np.unique(index):
                    rows = index == i
                    phase = target.tagger.predictors[i].phase(
                        tt[part][rows], change(correction[part][rows]))[1]
                    moments.update(phase, weight[part][rows] if weighted else None)
            scores[kind] = stats.h_test(moments)
        return scores

    # -- checkpoints --------------------------------------------------------------
    def to_state(self) -> dict:
        return {
            "version": 1,
            "counters": self.counters.to_state(),
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
        for name, saved in state.get("targets", {}).items():
            target = self.targets.get(name)
            if target is None:
                notes.append(f"target {name}: in the checkpoint but not configured; dropped")
                continue
            if saved["phase_reference"] != self.phase_reference[name]:
                notes.append(f"target {name}: spin model phase reference changed; statistics "
                             "restart (states from different phase references cannot stack)")
                continue
            if saved["recipes"] != [r.name for r in target.recipes]:
                notes.append(f"target {name}: recipes changed; statistics restart")
                continue
            self.moments[name] = [stats.TimeBinnedMoments.from_state(m)
                                  for m in saved["moments"]]
        return notes


def stack_states(states: list[dict], labels: list[str] | None = None) -> dict:
    """Stack the statistics of several runs (nights) saved by ``Pipeline.to_state``.

    Moments add, so the stacked significance is that of all the events folded
    together. Only runs whose spin models share the phase reference may stack:
    otherwise the same phase would not mean the same rotation, and the stack is
    refused with the reason. Targets present in only some runs are stacked over
    those. Counters add too.
    """
    labels = labels or [f"run {i + 1}" for i in range(len(states))]
    if not states:
        raise InputError("states", [], "nothing to stack")
    merged: dict = {"version": 1, "counters": {}, "targets": {}, "stacked_from": labels}
    for label, state in zip(labels, states, strict=True):
        if state.get("version") != 1:
            raise InputError(f"{label}.version", state.get("version"), "expected 1")
        for key, value in state.get("counters", {}).items():
            if isinstance(value, int):
                merged["counters"][key] = merged["counters"].get(key, 0) + value
        for name, target in state["targets"].items():
            into = merged["targets"].get(name)
            if into is None:
                merged["targets"][name] = {**target, "runs": [label]}
                continue
            if target["phase_reference"] != into["phase_reference"]:
                raise InputError(
                    f"{label}.targets.{name}.phase_reference", target["phase_reference"],
                    f"differs from {into['phase_reference']!r} of {', '.join(into['runs'])}: "
                    "the spin models define phase differently (frequency, epoch, phase zero, "
                    "glitches, orbit or position), so their folds cannot be added")
            if target["recipes"] != into["recipes"]:
                raise InputError(f"{label}.targets.{name}.recipes", target["recipes"],
                                 f"differ from {into['recipes']} of {', '.join(into['runs'])}")
            into["moments"] = [
                (stats.TimeBinnedMoments.from_state(a) + stats.TimeBinnedMoments.from_state(b))
                .to_state() for a, b in zip(into["moments"], target["moments"], strict=True)]
            into["runs"].append(label)
    return merged


def _phase_reference(tagger: TargetTagger) -> str:
    return "+".join(sorted({p.model.phase_reference_key() for p in tagger.predictors}))


_TABLE_GAP = (RejectReason.OUTSIDE_TABLE_COVERAGE, "outside the barycentre table's coverage")


def _describe(codes: np.ndarray) -> tuple[list[str], list[str]]:
    table = [*VALUE_CHECKS, _TABLE_GAP]
    reasons = [table[c - 1][0].value for c in codes]
    details = [table[c - 1][1] for c in codes]
    return reasons, details
