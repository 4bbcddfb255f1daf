"""Refolding recent events under alternative hypotheses, to name a fault in the time chain.

Theory of operation
-------------------
When the clock check finds the pulse missing or smeared, or the night's fold far
weaker than its chunks' combined detection (:mod:`turnstamp.core.clock.check`), the
most recent events of the target's clock recipe (kept in a :class:`Reservoir`, a ring
buffer of TT instants, barycentric corrections and weights; for an archive, its own
rows) are folded again with the correction changed as each hypothesis in ``REFOLDS``
says: applied with the
opposite sign, or not applied at all. A pulse that appears (H-test ≥ 5σ, and 3σ
above the fold as tagged) only under one of them names the fault: the verdict
becomes FAIL with that hypothesis as its kind.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace

import numpy as np

from .clock.verdict import ClockVerdict
from .moments import PhaseMoments
from .periodicity import TestResult, h_test
from .tagger import CHUNK, TargetTagger

__all__ = ["REFOLDS", "MIN_EVENTS", "Reservoir", "refold_scores", "refolded_verdict"]

REFOLDS: dict[str, tuple[str, Callable[[np.ndarray], np.ndarray]]] = {
    "barycentre_sign": ("the barycentric correction applied with the opposite sign",
                        lambda c: -c),
    "no_barycentre": ("no barycentric correction at all (topocentric times)",
                      lambda c: np.zeros_like(c)),
}
"""Hypothesis name: (what it means, how it changes the correction in seconds)."""
MIN_EVENTS = 100
"""Fewest reservoir events worth refolding."""
_FOUND_SIGMA = 5.0  # the pulse must reach this one-sided σ under the hypothesis ...
_MARGIN_SIGMA = 3.0  # ... and exceed the fold as tagged by this much


class Reservoir:
    """The most recent events of a target's clock-check recipe (a ring buffer), kept
    so that the clock check can refold them under alternative hypotheses.

    Per event: the TT instant at the site (int64 ns), the barycentric correction (s)
    and the weight.
    """

    def __init__(self, size: int):
        self.size = size
        self.tt_ns = np.zeros(size, np.int64)
        self.correction_s = np.zeros(size)
        self.weight = np.ones(size)
        self.filled = 0
        self.added = 0  # events ever added
        self._next = 0

    def add(self, tt_ns, correction_s, weight) -> None:
        """Append events (the oldest are overwritten once the ring is full)."""
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
        """(tt_ns, correction_s, weight) of the events held, in ring order."""
        rows = slice(0, self.filled)
        return self.tt_ns[rows], self.correction_s[rows], self.weight[rows]


def refold_scores(tagger: TargetTagger, tt, correction, weight, weighted: bool,
                  harmonics: int, bins: int) -> dict[str, TestResult]:
    """H-test of the events folded as tagged ("nominal") and under each of ``REFOLDS``."""
    scores = {}
    for kind, (_, change) in {"nominal": ("", lambda c: c), **REFOLDS}.items():
        moments = PhaseMoments(harmonics, bins)
        for lo in range(0, tt.size, CHUNK):  # chunks: no large temporaries
            part = slice(lo, lo + CHUNK)
            index = tagger.choose_models(tt[part])
            for i in np.unique(index):
                rows = index == i
                phase = tagger.calculators[i].phase(
                    tt[part][rows], change(correction[part][rows]))[1]
                moments.update(phase, weight[part][rows] if weighted else None)
        scores[kind] = h_test(moments)
    return scores


def refolded_verdict(verdict: ClockVerdict, scores: dict[str, TestResult],
                     events: int) -> ClockVerdict:
    """``verdict``, or FAIL naming the hypothesis under which alone the pulse appears."""
    best = max(REFOLDS, key=lambda k: scores[k].sigma)
    if scores[best].sigma < _FOUND_SIGMA \
            or scores[best].sigma < scores["nominal"].sigma + _MARGIN_SIGMA:
        return verdict
    lines = [f"FAIL: the pulse appears only with {REFOLDS[best][0]}: H = "
             f"{scores[best].statistic:.1f} ({scores[best].sigma:.1f}σ) on the last "
             f"{events} events, against H = {scores['nominal'].statistic:.1f} "
             f"({scores['nominal'].sigma:.1f}σ) as tagged.", *verdict.lines]
    return replace(verdict, status="FAIL", kind=best, lines=lines)
