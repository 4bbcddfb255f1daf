"""Every fault named right: isolated and binary pulsars, faint sources, several pulsars.

The nights are simulated here, not by the project's simulator: an invented sky (a
pulsar at F0, a barycentric correction with an annual and a diurnal term, and for the
binary a circular orbit) defines the model phase φ(t) at site time t; pulse phases are
drawn by inverse CDF from a template density written in this file; a fault changes
the *tagged* phase of each event as the broken chain would (a time error e(t):
φ(t + e) − φ(t); a barycentric correction of the wrong sign: φ with −C instead of +C).
The check sees only the binned moments, the apparent spin of this sky and a refold
that undoes each hypothesis, as the pipeline gives them. Sources: TAI − UTC = 37 s
since 2017 (IERS Bulletin C; the leap-second table of erfa.dat); Roemer delay of a
circular orbit x·sin(2πt/P_b) (Blandford & Teukolsky 1976, ApJ 205, 580, e = 0; from
memory); the 20-milliperiod tolerance (common practice).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from turnstamp.core.clock.check import CheckSettings, check_target
from turnstamp.core.clock.joint import attribute
from turnstamp.core.moments import PhaseMoments
from turnstamp.core.peaks import PeakComponent
from turnstamp.core.periodicity import h_test
from turnstamp.core.template import PulseTemplate
from turnstamp.core.timebinned import TimeBinnedMoments

START_NS = 819_999_600 * 10**9  # a night in 2025, ns since 2000-01-01T12:00 TT
F0 = 311.37  # Hz, invented
TEMPLATE = PulseTemplate(name="main and interpulse", unpulsed_fraction=0.0, components=[
    PeakComponent(shape="von_mises", position_cycles=0.0, width_cycles=0.025, amplitude=1.0),
    PeakComponent(shape="von_mises", position_cycles=0.47, width_cycles=0.05, amplitude=0.4)])


def template_density(x):
    """The same shape written out: von Mises peaks exp(κ cos 2π(x − μ)) / I₀(κ)."""
    total = np.zeros_like(x)
    for centre, width, area in ((0.0, 0.025, 1.0), (0.47, 0.05, 0.4)):
        kappa = 1.0 / (2 * math.pi * width) ** 2
        total += area * np.exp(kappa * (np.cos(2 * math.pi * (x - centre)) - 1)) / (
            np.i0(kappa) * math.exp(-kappa))
    return total / 1.4


def draw(n, rng, grid=1 << 14):
    """Inverse-CDF draws from ``template_density`` (trapezoid CDF on a fine grid)."""
    x = np.arange(grid + 1) / grid
    f = template_density(x)
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (f[1:] + f[:-1]))])
    return np.interp(rng.random(n), cdf / cdf[-1], x)


class Sky:
    """φ(t) = F0·(t + C(t) − Δ(t + C(t))), t in s from START_NS (site TT)."""

    def __init__(self, frequency=F0, binary=False, sign=1.0):
        self.frequency, self.binary, self.sign = frequency, binary, sign

    def correction(self, t):
        # annual term of an invented pulsar near the ecliptic pole (slow) and a diurnal term
        return 5.0 * np.sin(2 * np.pi * (t + 3.1e6) / 3.15576e7) \
            + 0.02 * np.sin(2 * np.pi * (t + 5000.0) / 86164.1)

    def orbit(self, t):
        return 0.3 * np.sin(2 * np.pi * (t - 2000.0) / 21600.0) if self.binary else 0.0

    def phase(self, t, sign=None):
        bary = t + (self.sign if sign is None else sign) * self.correction(t)
        return self.frequency * (bary - self.orbit(bary))

    # the SpinView the check asks for, from this sky
    def frequency_hz(self, instants_ns):
        t = (np.asarray(instants_ns, dtype=np.int64) - START_NS) * 1e-9
        return (self.phase(t + 1.0) - self.phase(t - 1.0)) / 2.0

    def shift_cycles(self, instants_ns, delta_t_s):
        t = (np.asarray(instants_ns, dtype=np.int64) - START_NS) * 1e-9
        return self.phase(t) - self.phase(t - delta_t_s)


FAULTS = {  # time error e(t) in s for the time-keeping faults, t in s from the start
    "none": lambda t, span: 0.0 * t,
    "offset": lambda t, span: 0.0 * t + 200e-6,
    "step": lambda t, span: np.where(t >= span / 2, 1.0, 0.0),
    "utc_as_tai": lambda t, span: 0.0 * t - 37.0,  # UTC labels declared as TAI: 37 s early
    "drift": lambda t, span: 50e-6 * t / 3600.0,
    "wobble": lambda t, span: 1e-3 * np.sin(2 * np.pi * t / 240.0),
}


def night(sky, fault, seconds=7200.0, pulsed=60.0, background=60.0, seed=1, interval_s=60,
          model_offset=0.0):
    """(binned moments, refold) of a simulated night with ``fault``."""
    rng = np.random.default_rng(seed)
    n_p, n_b = rng.poisson(pulsed * seconds), rng.poisson(background * seconds)
    t = rng.uniform(0, seconds, n_p + n_b)
    true = np.concatenate([draw(n_p, rng), rng.random(n_b)]) + model_offset
    if fault == "barycentre_sign":
        tagged = true + Sky(sky.frequency, sky.binary, -1.0).phase(t) - sky.phase(t)
        reported = t
    else:
        error = (FAULTS[fault] if isinstance(fault, str) else fault)(t, seconds)
        tagged = true + sky.phase(t + error) - sky.phase(t)
        reported = t + error
    times = START_NS + np.round(reported * 1e9).astype(np.int64)
    binned = TimeBinnedMoments(interval_s * 10**9).update(times, np.remainder(tagged, 1.0))

    def refold():
        undo = {"nominal": 0.0, "barycentre_sign": 1.0, "no_barycentre": 0.5}
        scores = {}
        for name, weight in undo.items():
            fixed = tagged if fault != "barycentre_sign" else \
                tagged + weight * (sky.phase(t) - Sky(sky.frequency, sky.binary, -1).phase(t))
            scores[name] = h_test(PhaseMoments().update(np.remainder(fixed, 1.0)))
        return scores, t.size

    return binned, refold


def verdict_of(sky, fault, chunk_s=60, **kwargs):
    binned, refold = night(sky, fault, interval_s=chunk_s, **kwargs)
    verdict, chunks = check_target(binned, TEMPLATE, sky, CheckSettings(chunk_s * 10**9),
                                   refold=refold)
    assert verdict.lines
    return verdict, chunks


EXPECTED = [  # fault, kind, mistake named (s)
    ("none", "none", None),
    ("offset", "offset", None),
    ("step", "step", 1.0),
    ("utc_as_tai", "offset", -37.0),
    ("drift", "drift", None),
    ("barycentre_sign", "barycentre_sign", None),
]


@pytest.mark.slow
@pytest.mark.parametrize("binary", [False, True], ids=["isolated", "binary"])
@pytest.mark.parametrize("fault, kind, mistake", EXPECTED, ids=[e[0] for e in EXPECTED])
def test_each_fault_is_named_right(binary, fault, kind, mistake):
    # issue 11: the wrong barycentric sign was called a "drift", and UTC given as TAI on
    # a binary a "step" (with all 12 mistakes "matching")
    verdict, _ = verdict_of(Sky(binary=binary), fault)
    text = "\n".join(verdict.lines)
    assert verdict.kind == kind, text
    assert verdict.status == ("OK" if fault == "none" else "FAIL"), text
    assert verdict.mistake_s == mistake, text
    if mistake is not None:
        assert [e.delta_t_s for e in verdict.explanations][:1] == [mistake], text


@pytest.mark.slow
def test_a_wobble_is_resolved_by_short_chunks():
    verdict, _ = verdict_of(Sky(), "wobble", chunk_s=20)
    assert (verdict.status, verdict.kind) == ("FAIL", "wobble"), "\n".join(verdict.lines)
    assert verdict.wobble_period_s == pytest.approx(240.0, abs=1.0)


@pytest.mark.slow
def test_clean_nights_pass():
    # bright and faint, isolated and binary, 30 minutes to 2 hours: none flagged
    for seed, (binary, pulsed, seconds) in enumerate([
            (False, 60.0, 1800.0), (True, 60.0, 1800.0), (False, 5.0, 3600.0),
            (True, 5.0, 7200.0), (False, 20.0, 1800.0), (True, 20.0, 3600.0)]):
        verdict, _ = verdict_of(Sky(binary=binary), "none", pulsed=pulsed,
                                background=200.0, seconds=seconds, seed=100 + seed)
        assert (verdict.status, verdict.kind) == ("OK", "none"), "\n".join(verdict.lines)


def test_a_faint_source_gets_a_verdict_from_the_whole_night():
    # issue 11: 1 pulsed event/s on 200/s: no 60-s chunk reaches 3σ, yet the whole-night
    # offset error after 30 minutes (~17 µs) is far below the 64 µs tolerance
    verdict, chunks = verdict_of(Sky(), "none", pulsed=1.0, background=200.0,
                                 seconds=1800.0, seed=5)
    assert (verdict.status, verdict.kind) == ("OK", "none"), "\n".join(verdict.lines)
    assert verdict.offset_sigma_us < verdict.tolerance_us / 3


def test_an_undecided_night_says_how_many_more_minutes_it_needs():
    # σ ∝ 1/√T: after 10 minutes at 1/s on 200/s this night's offset error is 25 µs, so
    # about 10·((25/21.4)² − 1) ≈ 4 more minutes bring it to a third of the tolerance
    verdict, _ = verdict_of(Sky(), "none", pulsed=1.0, background=200.0, seconds=600.0,
                            seed=2)
    assert (verdict.status, verdict.kind) == ("WARN", "insufficient_signal")
    needed = 10.0 * ((verdict.offset_sigma_us / (verdict.tolerance_us / 3)) ** 2 - 1)
    assert verdict.minutes_needed == pytest.approx(needed, rel=0.02)
    assert any("more minutes" in line for line in verdict.lines)


@pytest.mark.slow
def test_several_pulsars_tell_a_clock_step_from_one_models_offset():
    # three invented pulsars; a 30 µs clock step at mid-night is seen by all in time
    # units (the clock), a 0.015-cycle phase-zero error by one alone (its model)
    skies = {"alpha": Sky(311.37), "beta": Sky(205.13, binary=True), "gamma": Sky(87.31)}

    def results(step_us, model_offsets):
        out = []
        for seed, (name, sky) in enumerate(skies.items()):
            binned, refold = night(sky, lambda t, span: np.where(t >= span / 2, step_us * 1e-6,
                                                                 0.0),
                                   seed=20 + seed, model_offset=model_offsets.get(name, 0.0))
            verdict, chunks = check_target(binned, TEMPLATE, sky, refold=refold)
            out.append((name, "all", verdict, chunks))
        return attribute(out, skies, str)

    stepped = results(30.0, {})
    for _, _, verdict, _ in stepped:
        assert verdict.kind == "step" and verdict.attribution == "clock", \
            "\n".join(verdict.lines)
    offset = results(0.0, {"beta": 0.015})
    by_name = {name: verdict for name, _, verdict, _ in offset}
    assert by_name["beta"].attribution == "model", "\n".join(by_name["beta"].lines)
    assert by_name["beta"].kind == "offset"
    for name in ("alpha", "gamma"):
        assert by_name[name].attribution is None and by_name[name].status == "OK"
