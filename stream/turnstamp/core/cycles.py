"""Phase in cycles: wrapping, and conversion to and from time at a spin frequency."""

from __future__ import annotations

import numpy as np

__all__ = ["wrap_cycles", "cycles_to_us", "us_to_cycles"]


def wrap_cycles(x):
    """Wrap phases or phase differences into (−0.5, 0.5] cycles.

    Parameters
    ----------
    x : float or array_like
        Phase in cycles.

    Returns
    -------
    float or numpy.ndarray
        ``x`` minus the nearest whole number of cycles, in (−0.5, 0.5].
    """
    y = -np.remainder(-np.asarray(x, dtype=float) + 0.5, 1.0) + 0.5
    return float(y) if np.ndim(y) == 0 else y


def cycles_to_us(cycles, frequency_hz: float):
    """Convert a phase in cycles to a time in µs at the spin frequency ``frequency_hz`` (Hz)."""
    out = np.asarray(cycles, dtype=float) / float(frequency_hz) * 1e6
    return float(out) if np.ndim(out) == 0 else out


def us_to_cycles(us, frequency_hz: float):
    """Convert a time in µs to a phase in cycles at the spin frequency ``frequency_hz`` (Hz)."""
    out = np.asarray(us, dtype=float) * 1e-6 * float(frequency_hz)
    return float(out) if np.ndim(out) == 0 else out
