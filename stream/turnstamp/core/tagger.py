"""Tag TT instants at the site with barycentric time and rotational phase, per target.

One ``TargetTagger`` holds a target's barycentre table and its spin models
(several may be loaded, each with a validity window). Each event is tagged by the
model whose window contains it, or, failing that, by the nearest one, with the
OUTSIDE_MODEL_VALIDITY flag. Work is done in chunks of ``CHUNK`` events so that
the temporaries of the double-double arithmetic stay in cache.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .correctiontable import CorrectionTable, TableSet
from .phase import PhaseCalculator

__all__ = ["CHUNK", "TagResult", "TargetTagger"]

CHUNK = 1 << 14  # events per vectorised step: its dozen temporaries fit a 2 MB L2 cache


@dataclass(frozen=True)
class TagResult:
    """Columns for tagged events (same order as the input).

    ``inside`` is False where the barycentre table does not cover the instant;
    those rows carry NaN correction and must be rejected by the caller.
    """

    correction_s: np.ndarray  # TDB(SSB) - TT(site) plus clock remainder, seconds
    barycentric_tdb_ns: np.ndarray  # rounded to the nearest ns
    pulse_number: np.ndarray
    phase: np.ndarray
    model_index: np.ndarray  # index into TargetTagger.calculators
    flags: np.ndarray
    inside: np.ndarray


class TargetTagger:
    """Barycentre table plus spin models for one target."""

    def __init__(self, name: str, calculators: list[PhaseCalculator],
                 table: CorrectionTable | TableSet | None = None):
        if not calculators:
            raise ValueError(f"target {name!r}: needs at least one spin model")
        self.name = name
        self.calculators = sorted(calculators, key=lambda p: p.valid_from_ns)
        self.table = table

    @property
    def table(self) -> TableSet:
        """The barycentre tables (a ``TableSet``; a single table is wrapped)."""
        return self._tables

    @table.setter
    def table(self, value: CorrectionTable | TableSet | None) -> None:
        self._tables = value if isinstance(value, TableSet) else \
            TableSet(() if value is None else (value,))
        self._starts = np.array([p.valid_from_ns for p in self.calculators], dtype=np.int64)
        self._stops = np.array([p.valid_until_ns for p in self.calculators], dtype=np.int64)

    @property
    def phase_reference(self) -> str:
        """Fingerprint of how the models define phase; folds with different ones do not add."""
        return "+".join(sorted({p.model.phase_reference_key() for p in self.calculators}))

    @property
    def model_ids(self) -> list[str]:
        """Model ids in the order of ``calculators`` (what ``model_index`` counts)."""
        return [p.model_id for p in self.calculators]

    def choose_models(self, tdb_ns: np.ndarray) -> np.ndarray:
        """Index of the model for each instant: the latest-starting one whose window
        contains it, else the one whose window is nearest."""
        if len(self.calculators) == 1:
            return np.zeros(tdb_ns.shape, np.int64)
        row = np.clip(np.searchsorted(self._starts, tdb_ns, side="right") - 1, 0, None)
        inside = tdb_ns <= self._stops[row]
        distance = np.minimum(np.abs(tdb_ns[:, None] - self._starts[None, :]),
                              np.abs(tdb_ns[:, None] - self._stops[None, :]))
        return np.where(inside, row, np.argmin(distance, axis=1))

    def tag(self, tt_ns: np.ndarray, extra_s: np.ndarray | None = None) -> TagResult:
        """Tag TT instants at the site.

        Parameters
        ----------
        tt_ns : int64 array
            Arrival instants at the site, ns since 2000-01-01T12:00:00 TT.
        extra_s : float64 array, optional
            Sub-nanosecond remainder of the clock corrections (seconds).
        """
        tt_ns = np.asarray(tt_ns, dtype=np.int64)
        n = tt_ns.size
        out = TagResult(np.empty(n), np.empty(n, np.int64), np.empty(n, np.int64),
                        np.empty(n), np.empty(n, np.int64), np.empty(n, np.uint32),
                        np.empty(n, bool))
        for lo in range(0, n, CHUNK):
            part = slice(lo, min(lo + CHUNK, n))
            t = tt_ns[part]
            correction, flags, inside = self.table.evaluate(t)
            everywhere = inside.all()  # the usual case: no per-event masking
            if extra_s is not None:
                correction = correction + extra_s[part]
            if not everywhere:
                correction = np.where(inside, correction, 0.0)
            single = len(self.calculators) == 1
            choice = 0 if single else self.choose_models(t)
            for index in (0,) if single else np.unique(choice):
                rows = slice(None) if single else choice == index
                pulse, phase, model_flags = self.calculators[index].phase(t[rows], correction[rows])
                out.pulse_number[part][rows] = pulse
                out.phase[part][rows] = phase
                flags[rows] |= model_flags
            whole = np.rint(correction * 1e9)
            np.add(t, whole.astype(np.int64), out=out.barycentric_tdb_ns[part])
            out.correction_s[part] = correction if everywhere else np.where(inside, correction,
                                                                            np.nan)
            out.model_index[part] = choice
            out.flags[part] = flags
            out.inside[part] = inside
        return out
