"""One target's clock check of the night: chunks, the whole night, the diagnosis, the refold.

Theory of operation
-------------------
``check_target`` runs the check on a target's time-binned moments
(:class:`~turnstamp.core.timebinned.TimeBinnedMoments` of its clock recipe):

1. chunks of fixed length (:mod:`.chunks`) and the whole-night fit (on the events'
   phases where they are kept, as in an archive; else on the moments);
2. a faint source whose fixed chunks mostly miss the pulse (fewer than half detect
   it: those that do are then mostly upward fluctuations, timed worse than their σ
   says) is cut instead into chunks grown until each detects it (H ≥ 36, ≈ 5σ):
   drift and step can then still be tested; its offset comes from the whole night
   either way (:mod:`.diagnose`);
3. the diagnosis, with the apparent spin at the site (:mod:`.apparent`);
4. a refold of recent events under alternative hypotheses (:mod:`turnstamp.core.refold`)
   when the pulse is missing or smeared, *or* whenever the night's fold is far
   weaker than the chunks' combined detection (ΣZ²ₘ of the chunks against
   χ²_{2mC}): a pulse present in every chunk but smeared over the night is what a
   barycentric correction of the wrong sign does;
5. each chunk's pulse arrival time at the barycentre (TDB) with its σ.

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace

import numpy as np

from ..eventfit import refine_with_events
from ..moments import PhaseMoments
from ..periodicity import TestResult, z2_test
from ..refold import refolded_verdict
from ..significance import sigma_from_log_p
from ..template import PulseTemplate
from ..templatefit import OffsetFit, fit_offset
from ..timebinned import TimeBinnedMoments
from .apparent import SpinView
from .chunks import ChunkOffset, EventPhases, chunk_offsets
from .diagnose import diagnose
from .series import chi2_log_sf
from .verdict import SIGNIFICANT_SIGMA, ClockVerdict

__all__ = ["CheckSettings", "check_target", "smeared_over_night", "REFOLD_KINDS"]

REFOLD_KINDS = ("no_signal", "smeared", "insufficient_signal")
"""Verdict kinds after which recent events are always refolded."""
_WEAKER_BY_SIGMA = 3.0  # the night's fold this far below the chunks' combined detection
_DETECTED_FRACTION = 0.5  # fewer fixed chunks than this detect: grow them instead

Refold = Callable[[], tuple[dict[str, TestResult], int] | None]
"""() -> (H-test per hypothesis, "nominal" included, and the events refolded), or None."""


@dataclass(frozen=True)
class CheckSettings:
    """How the night is cut and judged (chunk length in ns; tolerance in cycles and µs)."""

    chunk_ns: int | None = 60 * 10**9
    tolerance_cycles: float = 0.02
    tolerance_us: float | None = None


def check_target(binned: TimeBinnedMoments, template: PulseTemplate, spin: SpinView,
                 settings: CheckSettings = CheckSettings(), *, refold: Refold | None = None,
                 time_text: Callable[[int], str] | None = None,
                 cache: dict | None = None,
                 events: EventPhases | None = None) -> tuple[ClockVerdict, list[ChunkOffset]]:
    """The clock verdict of one target and the chunks it was judged on.

    Parameters
    ----------
    binned : TimeBinnedMoments
        Moments of the target's clock recipe by time interval (site TT ns).
    template : PulseTemplate
        The expected pulse.
    spin : SpinView
        The pulsar at the site (apparent frequency, mistake predictions; arrival times
        when it can give them).
    settings : CheckSettings
        Chunk length and tolerance.
    refold : callable, optional
        Scores of recent events under the hypotheses of :mod:`turnstamp.core.refold`.
    time_text : callable, optional
        Instant (ns TT) -> text for the verdict's lines (UTC calendar times).
    cache : dict, optional
        Chunk fits kept between calls (see :func:`.chunks.chunk_offsets`).
    events : EventPhases, optional
        The events' phases by time range, where they are kept (an archive): every
        offset, the night's too, is then fitted to them (:mod:`turnstamp.core.eventfit`).
    """
    chunks = chunk_offsets(binned, template, chunk_ns=settings.chunk_ns, cache=cache,
                           latest_ns=binned.latest_ns, events=events)
    total = binned.total()
    night = fit_offset(total, template) if total.sum_w > 0 else None
    if night is not None and events is not None:
        starts = [start for start, _ in binned.intervals()]
        phases, weights = events(min(starts), max(starts) + binned.interval_ns)
        night = refine_with_events(night, phases, template, weights)
    if night is not None and night.detected \
            and sum(c.detected for c in chunks) < _DETECTED_FRACTION * len(chunks):
        chunks = chunk_offsets(binned, template, chunk_ns=None, latest_ns=binned.latest_ns,
                               events=events)
    ends = np.array([chunks[0].mid_ns, chunks[-1].mid_ns] if chunks
                    else [binned.latest_ns or 0], dtype=np.int64)
    nu = float(np.mean(spin.frequency_hz(ends)))
    verdict = diagnose(chunks, night, nu, settings.tolerance_cycles, settings.tolerance_us,
                       spin=spin, time_text=time_text)
    if refold is not None and (verdict.kind in REFOLD_KINDS
                               or smeared_over_night(binned, chunks, night)):
        found = refold()
        if found is not None:
            verdict = refolded_verdict(verdict, *found)
    return verdict, with_arrival_times(chunks, spin)


def smeared_over_night(binned: TimeBinnedMoments, chunks: list[ChunkOffset],
                       night: OffsetFit | None) -> bool:
    """The night's fold is far weaker than the chunks' combined detection.

    The chunks' Z²ₘ (m: the template's harmonics) add to χ²_{2mC} under no pulse;
    a pulse steady over the night makes the night's own Z²ₘ much the more
    significant, a pulse whose phase wanders from chunk to chunk the reverse. A night
    whose own fit is significant is coherent enough, and is not looked at.
    """
    if night is None or len(chunks) < 2 or night.significance_sigma >= SIGNIFICANT_SIGMA:
        return False
    m = int(night.harmonics_used)
    intervals = binned.intervals()
    starts = np.array([start for start, _ in intervals], dtype=np.int64)
    edges = np.array([c.start_ns for c in chunks] + [chunks[-1].end_ns], dtype=np.int64)
    owner = np.searchsorted(edges, starts, side="right") - 1
    sums: dict[int, PhaseMoments] = {}
    for (_, part), j in zip(intervals, owner, strict=True):
        if 0 <= j < len(chunks):
            if int(j) in sums:
                sums[int(j)] += part
            else:
                sums[int(j)] = part.copy()
    statistics = [z2_test(moments, m).statistic for moments in sums.values()
                  if moments.sum_w2 > 0]
    if len(statistics) < 2:
        return False
    combined = max(sigma_from_log_p(chi2_log_sf(float(np.sum(statistics)),
                                                2 * m * len(statistics))), 0.0)
    alone = z2_test(binned.total(), m).sigma
    return bool(combined >= SIGNIFICANT_SIGMA and alone < combined - _WEAKER_BY_SIGMA)


def with_arrival_times(chunks: list[ChunkOffset], spin: SpinView) -> list[ChunkOffset]:
    """Chunks with the barycentric arrival time (TDB ns) of their pulse and its σ (µs),
    when ``spin`` can carry instants to the barycentre."""
    arrival = getattr(spin, "arrival_tdb_ns", None)
    if arrival is None or not chunks:
        return chunks
    mids = np.array([c.mid_ns for c in chunks], dtype=np.int64)
    shifts = np.array([c.shift_cycles for c in chunks], dtype=float)
    times = arrival(mids, shifts)
    nu = spin.frequency_hz(mids)
    out = []
    for c, toa, f in zip(chunks, times, nu, strict=True):
        good = np.isfinite(c.shift_cycles) and np.isfinite(c.sigma_cycles)
        out.append(replace(c, arrival_tdb_ns=int(toa) if good else None,
                           arrival_sigma_us=float(c.sigma_cycles / f * 1e6) if good else None))
    return out
