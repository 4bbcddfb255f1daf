"""The usual time-keeping mistakes, and which of them a measured offset series matches.

Theory of operation
-------------------
A time error Δt (event times late by Δt) moves the phase of each event by
φ(t) − φ(t − Δt) ≈ ν_app(t)·Δt cycles, ν_app the *apparent* spin frequency at the
site: the barycentric frequency Doppler-shifted by the Earth and, for a binary, by
the orbit. Only the fraction of a turn is seen. For an isolated pulsar ν_app
barely changes within a night, so a whole-second mistake is a constant offset
frac(ν·Δt); in a binary ν_app swings by ν·v/c over the orbit and the same mistake
is a series that follows the orbit (37 s at 300 Hz and v/c = 1e-4: ±1.1 cycles).

``explain_series`` therefore predicts each mistake as a whole chunk series, from a
``shift_for(Δt)`` that gives the predicted offset of every chunk, with no free
parameter (``offset``: the error all night) or one (``step``: the error from a
chunk on, the best split), and lists it only when the fit is good (χ² tail
probability ≥ ``GOOD_FIT_P``, rare outlier chunks set aside as in :mod:`.robust`:
a chunk still filling, or one whose events do not fill it evenly, is timed less
well than its σ) and the data are far from the no-error series
(χ²_none − χ²_mistake ≥ ``MISTAKE_EVIDENCE``). Residuals are wrapped, so the
series needs no unwrapping. ``explain_offset`` keeps the single-number match.

The offsets listed are those between the time scales an instrument may confuse: a
leap second, GPS − UTC, TAI − GPS, TT − TAI, TAI − UTC and TT − UTC.

The numerical core only: no I/O, no clock.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from ..cycles import wrap_cycles
from ..significance import sigma_from_log_p
from .robust import outliers
from .series import chi2_log_sf

__all__ = ["KNOWN_TIME_MISTAKES", "GOOD_FIT_P", "MISTAKE_EVIDENCE", "Explanation",
           "explain_offset", "explain_series"]

KNOWN_TIME_MISTAKES = (
    (1.0, "one leap second (missed, or applied twice)"),
    (18.0, "GPS−UTC (GPS time read as UTC, or the reverse; 18 s since 2017)"),
    (19.0, "TAI−GPS (GPS time read as TAI, or the reverse)"),
    (32.184, "TT−TAI (TAI read as TT, or the reverse)"),
    (37.0, "TAI−UTC (TAI read as UTC, or the reverse; 37 s since 2017)"),
    (69.184, "TT−UTC (UTC read as TT, or the reverse)"),
)
"""(Δt in s, description) of time-keeping mistakes; both signs are tried. Values: TT − TAI
= 32.184 s (``erfa.TTMTAI``; IAU 1991 Resolution A4, from memory), TAI − GPS = 19 s (the GPS epoch
1980-01-06, IS-GPS-200; from memory), TAI − UTC = 37 s since 2017-01-01 (IERS Bulletin C;
the leap-second table of ``erfa.dat``)."""
GOOD_FIT_P = 1e-3
"""A mistake's predicted series fits when its χ² tail probability is at least this."""
MISTAKE_EVIDENCE = 25.0
"""... and when it beats the no-error series by at least this Δχ² (5σ for one number)."""


@dataclass(frozen=True)
class Explanation:
    """A time-keeping mistake that matches the data.

    ``predicted_cycles`` is the mistake's mean phase offset over the chunks it affects;
    ``deviation_sigma`` how far the data are from it (one-sided σ of the χ² misfit for a
    series, |offset − prediction|/σ for one number). For a series, ``pattern`` is
    ``offset`` (all night) or ``step`` (from chunk ``step_index`` on), with its χ², the
    degrees of freedom and ``evidence`` = χ²_none − χ²_mistake.
    """

    delta_t_s: float
    label: str
    predicted_cycles: float
    deviation_sigma: float
    pattern: str = "offset"
    chi2: float = math.nan
    dof: int = 0
    evidence: float = math.nan
    step_index: int | None = None


def explain_offset(
    offset_cycles: float, sigma_cycles: float, frequency_hz: float, n_sigma: float = 2.0,
    frequency_spread_hz: float = 0.0,
) -> list[Explanation]:
    """Time-keeping mistakes Δt whose phase offset frac(ν·Δt) matches ``offset_cycles``.

    Parameters
    ----------
    offset_cycles, sigma_cycles : float
        Measured offset (positive = data late) and 1σ error, cycles.
    frequency_hz : float
        Spin frequency ν, Hz.
    n_sigma : float
        Match when |wrap(offset − ν·Δt)| ≤ n_sigma·σ + |Δt|·frequency_spread_hz.
    frequency_spread_hz : float
        How far the apparent frequency wanders over the night (Doppler): a time error
        Δt shifts phase by ν(t)·Δt, so the prediction is only good to |Δt|·spread.

    Returns
    -------
    list of Explanation
        Δt = ±1, ±18, ±19, ±32.184, ±37, ±69.184 s (:data:`KNOWN_TIME_MISTAKES`);
        positive Δt means the event times are late by Δt. Closest match first.
    """
    out: list[Explanation] = []
    if not (math.isfinite(offset_cycles) and sigma_cycles > 0 and math.isfinite(sigma_cycles)):
        return out
    for dt, label in KNOWN_TIME_MISTAKES:
        for sign in (+1.0, -1.0):
            predicted = wrap_cycles(frequency_hz * sign * dt)
            slack = dt * abs(frequency_spread_hz)
            deviation = max(abs(wrap_cycles(offset_cycles - predicted)) - slack, 0.0) \
                / sigma_cycles
            if deviation <= n_sigma:
                out.append(Explanation(sign * dt, label, predicted, deviation))
    return sorted(out, key=lambda e: e.deviation_sigma)


def _misfit_sigma(chi2: float, dof: int) -> float:
    """One-sided σ of a χ² above its degrees of freedom (0 when within)."""
    if dof <= 0 or chi2 <= dof:
        return 0.0
    return max(sigma_from_log_p(chi2_log_sf(chi2, dof)), 0.0)


def _best_step(none: np.ndarray, mistake: np.ndarray, min_side: int) -> int:
    """First chunk after the step of the best split: no error before, the mistake after."""
    n = none.size
    before = np.concatenate([[0.0], np.cumsum(none)])
    after = np.concatenate([np.cumsum(mistake[::-1])[::-1], [0.0]])
    split = np.arange(min_side, n - min_side + 1)
    return int(split[int(np.argmin(before[split] + after[split]))])


def explain_series(y, sigma, shift_for: Callable[[float], np.ndarray],
                   patterns: tuple[str, ...] = ("offset", "step"),
                   min_side: int = 2, slack_hz: float = 0.0) -> list[Explanation]:
    """Time-keeping mistakes whose predicted chunk series fits the measured one.

    Parameters
    ----------
    y, sigma : array_like
        Chunk offsets (cycles, any cycle; positive = data late) and their 1σ, in time
        order.
    shift_for : callable
        ``shift_for(dt_s)`` -> predicted offset of every chunk (cycles) for event times
        late by ``dt_s`` seconds: φ(t) − φ(t − Δt) through the apparent frequency.
    patterns : tuple of str
        ``offset`` (the mistake all night) and/or ``step`` (from one chunk on).
    min_side : int
        Fewest chunks either side of a step.
    slack_hz : float
        When the predictions use one frequency for the night: how far the apparent
        frequency wanders (Hz); each chunk's error is widened by |Δt|·slack.

    Returns
    -------
    list of Explanation
        Mistakes that fit (see the theory of operation), best fit first.
    """
    y = np.asarray(y, dtype=float)
    base = np.asarray(sigma, dtype=float) ** 2
    none = np.asarray(wrap_cycles(y), dtype=float) ** 2 / base
    chi2_none = float(none.sum())
    out = []
    for dt, label in KNOWN_TIME_MISTAKES:
        var = base + (dt * slack_hz) ** 2
        for delta in (dt, -dt):
            predicted = np.asarray(shift_for(delta), dtype=float)
            mistake = np.asarray(wrap_cycles(y - predicted), dtype=float) ** 2 / var
            found = {pattern: _candidate(pattern, none, mistake, predicted, chi2_none, min_side)
                     for pattern in patterns}
            offset, step = found.get("offset"), found.get("step")
            if offset is not None and step is not None \
                    and offset[4] - step[4] < MISTAKE_EVIDENCE:
                found["step"] = None  # the step adds nothing to the mistake all night
            for pattern, fit in found.items():
                if fit is not None:
                    index, chi2, dof, mean, total = fit
                    out.append((total, Explanation(delta, label, mean, _misfit_sigma(chi2, dof),
                                                   pattern, chi2, dof, chi2_none - total,
                                                   index)))
    return [e for _, e in sorted(out, key=lambda item: item[0])]


def _candidate(pattern: str, none: np.ndarray, mistake: np.ndarray, predicted: np.ndarray,
               chi2_none: float, min_side: int):
    """(step index, robust χ², dof, mean prediction, total χ²) of a good fit of one
    pattern, else None."""
    n = none.size
    if pattern == "offset":
        index, terms, free = None, mistake, 0
        mean = float(np.mean(wrap_cycles(predicted)))
    elif n >= 2 * min_side:
        index = _best_step(none, mistake, min_side)
        terms, free = np.concatenate([none[:index], mistake[index:]]), 1
        mean = float(np.mean(wrap_cycles(predicted[index:])))
    else:
        return None
    kept = ~outliers(np.sqrt(terms), np.ones(n))
    chi2, dof, total = float(terms[kept].sum()), int(kept.sum()) - free, float(terms.sum())
    if chi2_none - total < MISTAKE_EVIDENCE \
            or chi2_log_sf(chi2, max(dof, 1)) < math.log(GOOD_FIT_P):
        return None
    return index, chi2, dof, mean, total
