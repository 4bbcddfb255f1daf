"""Rows of the statistics read out of the pipeline: significance and profiles.

Each row is a plain dict whose keys are the columns of the shell's Arrow streams
(``files.schemas.SIGNIFICANCE`` and ``files.schemas.PROFILES``); the numbers come from the
moments alone, so the rows are deterministic given what was fed.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from . import profile
from .moments import PhaseMoments
from .periodicity import h_test, rayleigh_test, z2_test
from .significance import sigma_from_log_p, trials_log_p
from .template import PulseTemplate
from .templatefit import fit_offset

__all__ = ["significance_row", "profile_row"]

_NO_PROFILE = dict(harmonics=0, background_per_bin=0.0, pulsed_fraction=0.0,
                   pulsed_fraction_rms=0.0, peak_phase=0.0, peak_phase_sigma=0.0)
_SHIFT_COLUMNS = ("template_shift_cycles", "template_shift_sigma_cycles", "template_shift_us",
                  "template_shift_sigma_us", "template_amplitude")


def significance_row(m: PhaseMoments, trials: int, **labels: Any) -> dict[str, Any]:
    """H, Z²₂ and Rayleigh of one window, σ one-sided; H also after ``trials``.

    ``labels`` (data_until_tt_ns, target, recipe, window, window_s, phase_reference)
    lead the row.
    """
    h = h_test(m)
    z2 = z2_test(m, min(2, m.harmonics))
    rayleigh = rayleigh_test(m)
    return {
        **labels,
        "events": m.count, "sum_weights": m.sum_w, "weighted": m.weighted,
        "h_statistic": h.statistic, "h_harmonics": h.harmonics,
        "h_log10_p": h.log_p / np.log(10), "h_sigma": h.sigma,
        "z2_statistic": z2.statistic, "z2_harmonics": z2.harmonics,
        "z2_sigma": z2.sigma, "rayleigh_statistic": rayleigh.statistic,
        "rayleigh_sigma": rayleigh.sigma, "trials": trials,
        "h_sigma_post_trials": sigma_from_log_p(trials_log_p(h.log_p, trials)),
    }


def profile_row(m: PhaseMoments, template: PulseTemplate | None, frequency_hz,
                **labels: Any) -> dict[str, Any]:
    """Binned and harmonic profile of a cumulative fold, and the template offset.

    ``frequency_hz`` is called (no argument) for the spin frequency (Hz) only when a
    template offset is fitted. ``labels`` (data_until_tt_ns, target, recipe) lead.
    """
    row: dict[str, Any] = {**labels, "events": m.count, "sum_weights": m.sum_w}
    binned = profile.binned_profile(m)
    row.update(counts=list(binned.counts), errors=list(binned.errors))
    scale = m.sum_w if m.sum_w > 0 else 1.0
    row.update(cos_moments=list(m.cos_sums / scale), sin_moments=list(m.sin_sums / scale))
    if m.sum_w > 0:
        summary = profile.summarize_profile(m)
        row.update(harmonics=summary.harmonics,
                   background_per_bin=summary.background_per_bin,
                   pulsed_fraction=summary.pulsed_fraction_min,
                   pulsed_fraction_rms=summary.pulsed_fraction_rms,
                   peak_phase=summary.peak_phase_cycles,
                   peak_phase_sigma=summary.peak_phase_sigma_cycles)
    else:
        row.update(_NO_PROFILE)
    shift = dict.fromkeys(_SHIFT_COLUMNS)
    if template is not None and m.sum_w > 0:
        fit = fit_offset(m, template)
        f = frequency_hz()
        shift.update(template_shift_cycles=fit.shift_cycles,
                     template_shift_sigma_cycles=fit.sigma_cycles,
                     template_shift_us=fit.shift_us(f),
                     template_shift_sigma_us=fit.sigma_us(f),
                     template_amplitude=fit.amplitude)
    row.update(shift)
    return row
