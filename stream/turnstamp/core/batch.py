"""The unit of work: one batch of detected events from one source, as columns.

Decoding (``turnstamp.wire.decode``) validates structure and types at the edge and
yields an ``EventBatch``; the core then checks values (``check_values``).
Missing values arrive as sentinels: ``MISSING_TIME`` in ``time_ns``,
``MISSING_ID`` in ``event_id``, NaN in float columns.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, fields, replace
from enum import IntEnum

import numpy as np

from ..errors import RejectReason
from .timebase import Scale

__all__ = ["EventBatch", "OPTIONAL_COLUMNS", "MISSING_TIME", "MISSING_ID", "RejectCode", "REJECTS",
           "describe_rejects", "check_values"]

MISSING_TIME = np.iinfo(np.int64).min
MISSING_ID = np.iinfo(np.uint64).max

OPTIONAL_COLUMNS = {
    # name: (numpy dtype, unit and meaning)
    "energy_kev": (np.float64, "reconstructed energy, keV"),
    "ra_deg": (np.float64, "reconstructed right ascension (ICRS), degrees"),
    "dec_deg": (np.float64, "reconstructed declination (ICRS), degrees"),
    "score": (np.float64, "classifier score (e.g. gamma-ness), instrument-defined scale"),
    "weight": (np.float64, "photon weight, e.g. probability of coming from the target, >= 0"),
    "telescope_mask": (np.uint64, "bit mask of the telescopes that saw the event"),
}


@dataclass(frozen=True)
class EventBatch:
    """Columns of one message. All arrays have the same length.

    Parameters
    ----------
    source : str
        The event builder's identifier.
    sequence : int
        The message's sequence number from that source (0, 1, 2, ...).
    time_scale : Scale
        Scale of ``time_ns`` (UTC labels, TAI, GPS or TT).
    event_id : uint64 array
    time_ns : int64 array
        Arrival times, ns since 2000-01-01T12:00:00 in ``time_scale``.
    """

    source: str
    sequence: int
    time_scale: Scale
    event_id: np.ndarray
    time_ns: np.ndarray
    energy_kev: np.ndarray | None = None
    ra_deg: np.ndarray | None = None
    dec_deg: np.ndarray | None = None
    score: np.ndarray | None = None
    weight: np.ndarray | None = None
    telescope_mask: np.ndarray | None = None

    def __post_init__(self):
        n = len(self.event_id)
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, np.ndarray) and len(value) != n:
                raise ValueError(f"column {f.name} has {len(value)} rows, event_id has {n}")

    def __len__(self) -> int:
        return len(self.event_id)

    def columns(self) -> dict[str, np.ndarray]:
        """The array columns that are present."""
        return {f.name: getattr(self, f.name) for f in fields(self)
                if isinstance(getattr(self, f.name), np.ndarray)}

    def take(self, index) -> EventBatch:
        """A batch of the selected rows (boolean mask or indices)."""
        return replace(self, **{name: column[index] for name, column in self.columns().items()})

    def joinable(self, other: EventBatch) -> bool:
        """Same time scale and same columns: the two can be ``join``-ed."""
        return self.time_scale == other.time_scale and \
            self.columns().keys() == other.columns().keys()

    @staticmethod
    def join(batches: Sequence[EventBatch]) -> EventBatch:
        """Joinable batches end to end as one, with the first one's source and
        sequence (``ValueError`` if they are not joinable)."""
        first = batches[0]
        if len(batches) == 1:
            return first
        if not all(first.joinable(batch) for batch in batches[1:]):
            raise ValueError("batches to join must have one time scale and the same columns")
        return replace(first, **{name: np.concatenate([getattr(batch, name) for batch in batches])
                                 for name in first.columns()})


class RejectCode(IntEnum):
    """Per-event reject codes (uint8 arrays); 0 accepts the event.

    The value checks (``check_values``) give codes 1 to 8 (the first failing check
    wins); the pipeline adds ``OUTSIDE_TABLE_COVERAGE`` for events no barycentre table
    covers. ``REJECTS`` gives each code's reason and detail for the rejects output.
    """

    ACCEPTED = 0
    MISSING_EVENT_ID = 1
    MISSING_TIME = 2
    IMPLAUSIBLE_TIME = 3
    BAD_ENERGY = 4
    BAD_DIRECTION = 5
    BAD_SCORE = 6
    BAD_WEIGHT = 7
    REPEATED_EVENT_ID = 8
    OUTSIDE_TABLE_COVERAGE = 9


REJECTS: dict[RejectCode, tuple[RejectReason, str]] = {
    RejectCode.MISSING_EVENT_ID: (RejectReason.BAD_VALUE, "event_id missing"),
    RejectCode.MISSING_TIME: (RejectReason.BAD_TIME, "time_ns missing"),
    RejectCode.IMPLAUSIBLE_TIME: (RejectReason.BAD_TIME, "time_ns outside the plausible range"),
    RejectCode.BAD_ENERGY: (RejectReason.BAD_VALUE, "energy_kev is not finite or negative"),
    RejectCode.BAD_DIRECTION: (RejectReason.BAD_VALUE,
                               "ra_deg/dec_deg not finite, or dec_deg outside [-90, 90]"),
    RejectCode.BAD_SCORE: (RejectReason.BAD_VALUE, "score is not finite"),
    RejectCode.BAD_WEIGHT: (RejectReason.BAD_VALUE, "weight is not finite or negative"),
    RejectCode.REPEATED_EVENT_ID: (RejectReason.DUPLICATE_EVENT_ID,
                                   "event_id repeated within the message"),
    RejectCode.OUTSIDE_TABLE_COVERAGE: (RejectReason.OUTSIDE_TABLE_COVERAGE,
                                        "outside the barycentre table's coverage"),
}
"""Reason (for the rejects output) and detail of every code but ``ACCEPTED``."""


def describe_rejects(codes: np.ndarray) -> tuple[list[str], list[str]]:
    """Reason values and details of non-zero reject codes, in order."""
    described = [REJECTS[RejectCode(int(c))] for c in codes]
    return [reason.value for reason, _ in described], [detail for _, detail in described]


_VALUE_LIMITS = (
    # code, {column: (lowest, highest)}: a value must be finite and within
    (RejectCode.BAD_ENERGY, {"energy_kev": (0.0, math.inf)}),
    (RejectCode.BAD_DIRECTION, {"ra_deg": (-math.inf, math.inf), "dec_deg": (-90.0, 90.0)}),
    (RejectCode.BAD_SCORE, {"score": (-math.inf, math.inf)}),
    (RejectCode.BAD_WEIGHT, {"weight": (0.0, math.inf)}),
)


def _any_outside(values: np.ndarray, low: float, high: float) -> bool:
    """Some value not finite or outside [low, high]: two reductions (NaN anywhere
    makes both NaN), so the usual clean batch builds no per-event mask."""
    lo, hi = values.min(), values.max()
    return not (low <= lo and hi <= high and math.isfinite(lo) and math.isfinite(hi))


def _outside(values: np.ndarray, low: float, high: float) -> np.ndarray:
    return ~((values >= low) & (values <= high) & np.isfinite(values))


def check_values(batch: EventBatch, earliest_ns: int, latest_ns: int,
                 checked: frozenset[str] | None = None) -> np.ndarray:
    """Per-event value checks: uint8 ``RejectCode`` values, 0 = accepted (the first
    failing check wins).

    Parameters
    ----------
    batch : EventBatch
    earliest_ns, latest_ns : int
        Plausible range of ``time_ns`` (ns since 2000-01-01T12:00:00, the batch's scale).
    checked : frozenset of str, optional
        Optional columns whose values are checked (those something reads, e.g. a
        recipe's cut); None checks every optional column present. An unchecked
        column is carried as it is.
    """
    n = len(batch)
    codes = np.zeros(n, np.uint8)
    if n == 0:
        return codes

    def refuse(mask, code: RejectCode):
        if mask.any():
            np.copyto(codes, np.uint8(code), where=mask & (codes == 0))

    def present(*names) -> bool:
        return all(getattr(batch, name) is not None and (checked is None or name in checked)
                   for name in names)

    time = batch.time_ns
    if batch.event_id.max() == MISSING_ID:
        refuse(batch.event_id == MISSING_ID, RejectCode.MISSING_EVENT_ID)
    earliest, latest = time.min(), time.max()
    if earliest == MISSING_TIME:
        refuse(time == MISSING_TIME, RejectCode.MISSING_TIME)
    if earliest < earliest_ns or latest > latest_ns:
        refuse((time < earliest_ns) | (time > latest_ns), RejectCode.IMPLAUSIBLE_TIME)
    for code, limits in _VALUE_LIMITS:
        if present(*limits):
            columns = [(getattr(batch, name), *limits[name]) for name in limits]
            if any(_any_outside(*column) for column in columns):
                refuse(np.logical_or.reduce([_outside(*column) for column in columns]), code)
    if n > 1 and not np.all(batch.event_id[1:] > batch.event_id[:-1]):  # sorted: no repeats
        order = np.argsort(batch.event_id, kind="stable")
        same = batch.event_id[order][1:] == batch.event_id[order][:-1]
        repeated = np.zeros(n, bool)
        repeated[order[1:][same]] = True
        refuse(repeated, RejectCode.REPEATED_EVENT_ID)
    return codes
