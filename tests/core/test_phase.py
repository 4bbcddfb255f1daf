"""Spin-model phase against a 50-digit mpmath oracle and published anchors.

The oracle is written straight from the formulas (the Taylor phase, the glitch model of
Yu et al. 2013, MNRAS 429, 688, and the Keplerian binary delay of Blandford & Teukolsky
1976, ApJ 205, 580; all from memory); the models are invented.
"""

from decimal import Decimal

import mpmath as mp
import numpy as np
import pytest
from hypothesis import example, given
from hypothesis import strategies as st
from model_fixtures import make_model

from turnstamp.core.flags import Quality
from turnstamp.core.phase import PhaseCalculator
from turnstamp.core.spin import SpinModel
from turnstamp.core.timebase import NS_PER_DAY, NS_PER_S, mjd_to_ns

THIRTY_YEARS_NS = int(30 * 365.25 * NS_PER_DAY)


def oracle_phase(model: SpinModel, tdb_ns: int, extra_s: float) -> mp.mpf:
    """The model's phase with 50 digits, written straight from the formulas."""
    mp.mp.dps = 50

    def seconds(mjd):
        return (mp.mpf(str(mjd)) - mp.mpf("51544.5")) * 86400

    def raw(t):
        dt = t - seconds(model.reference_epoch_mjd_tdb)
        f = [mp.mpf(str(model.frequency_hz))] + [mp.mpf(str(d)) for d in
                                                 model.frequency_derivatives]
        total = sum(f[k] * dt ** (k + 1) / mp.factorial(k + 1) for k in range(len(f)))
        for g in model.glitches:
            d = t - seconds(g.epoch_mjd_tdb)
            if d > 0:
                total += (mp.mpf(g.phase_step_cycles) + mp.mpf(g.frequency_step_hz) * d
                          + mp.mpf(g.frequency_derivative_step_hz_per_s) * d * d / 2)
                for r in g.recoveries:
                    tau = mp.mpf(r.timescale_days) * 86400
                    total += mp.mpf(r.frequency_step_hz) * tau * (1 - mp.exp(-d / tau))
        return total

    t = mp.mpf(int(tdb_ns)) / 10**9 + mp.mpf(float(extra_s))
    if model.binary is not None:
        t = mp.findroot(lambda te: te + keplerian_delay(model.binary, te) - t,
                        t - model.binary.projected_semi_major_axis_lt_s)
    zero = model.phase_zero_mjd_tdb or model.reference_epoch_mjd_tdb
    return raw(t) - raw(seconds(zero))


def keplerian_delay(orbit, t):
    """Blandford & Teukolsky (1976, ApJ 205, 580) delay written out in mpmath."""
    period = mp.mpf(str(orbit.orbital_period_days)) * 86400
    mean = 2 * mp.pi * (t - mp.mpf(str(orbit.epoch_tdb_seconds))) / period
    e, x = mp.mpf(orbit.eccentricity), mp.mpf(orbit.projected_semi_major_axis_lt_s)
    anomaly = mp.findroot(lambda u: u - e * mp.sin(u) - mean, mean)
    omega = mp.radians(orbit.periastron_longitude_deg)
    return (x * mp.sin(omega) * (mp.cos(anomaly) - e)
            + (x * mp.cos(omega) * mp.sqrt(1 - e * e) + mp.mpf(orbit.einstein_delay_s))
            * mp.sin(anomaly))


def assert_matches_oracle(model, tdb_ns, extra_s, tolerance=1e-9):
    pulse, fraction, _ = PhaseCalculator(model).phase(tdb_ns, extra_s)
    for n, x, p, f in zip(tdb_ns, extra_s, pulse, fraction, strict=True):
        exact = oracle_phase(model, int(n), float(x))
        error = (mp.mpf(int(p)) + mp.mpf(float(f))) - exact
        assert abs(float(error)) <= tolerance, (int(n), float(x), float(error))


def test_reference_anchor_of_a_slowing_pulsar():
    # the Taylor phase f dt + fdot dt^2/2 + fddot dt^3/6 (Lorimer & Kramer 2005, ch. 8, from
    # memory) evaluated with mpmath at 50 digits: f = 10 Hz, fdot = -1e-11, fddot = 3e-23,
    # dt = 100 d -> 86399626.75522486272 cycles; naive float64 is 6e-9 cycles off.
    model = make_model(reference_epoch_mjd_tdb="60000", frequency_hz="10",
                       frequency_derivatives=["-1e-11", "3e-23"])
    t_ns, _ = mjd_to_ns("60100")
    pulse, fraction, _ = PhaseCalculator(model).phase(np.array([t_ns]))
    assert pulse[0] == 86_399_626
    assert fraction[0] == pytest.approx(0.75522486272, abs=1e-10)


def test_glitch_anchor():
    # the glitch phase dphi + df dt + dfdot dt^2/2 + df_d tau (1 - exp(-dt/tau)) (as in
    # Yu et al. 2013, MNRAS 429, 688; from memory) evaluated with mpmath: dphi = 0,
    # df = 1e-6, dfdot = -1e-14, recovery df_d = 5e-7 with tau = 10 d; 30 d after the
    # glitch: 2.592 - 0.03359232 + 0.41049198646508 = 2.9688996664650827766 cycles.
    glitch = {"epoch_mjd_tdb": "60010", "frequency_step_hz": 1e-6,
              "frequency_derivative_step_hz_per_s": -1e-14,
              "recoveries": [{"frequency_step_hz": 5e-7, "timescale_days": 10}]}
    with_glitch = make_model(reference_epoch_mjd_tdb="60000", frequency_hz="10",
                             glitches=[glitch])
    without = make_model(reference_epoch_mjd_tdb="60000", frequency_hz="10")
    t_ns, _ = mjd_to_ns("60040")
    p1, f1, _ = PhaseCalculator(with_glitch).phase(np.array([t_ns]))
    p0, f0, _ = PhaseCalculator(without).phase(np.array([t_ns]))
    assert (p1[0] - p0[0]) + (f1[0] - f0[0]) == pytest.approx(2.9688996664650827766, abs=1e-10)


@pytest.mark.parametrize("frequency", ["1.234567890123456789", "27.318504", "311.370158241234567",
                                       "999.99999999999999"])
def test_phase_matches_mpmath_over_thirty_years(frequency, rng):
    # Acceptance: <= 1e-9 cycles vs mpmath (50 digits), f up to 1 kHz, derivatives, a glitch,
    # +-30 years from the reference epoch.
    model = make_model(
        frequency_hz=frequency,
        frequency_derivatives=["-1.2345678e-15", "2.5e-26", "-1e-35"],
        phase_zero_mjd_tdb="60641.5",
        glitches=[{"epoch_mjd_tdb": "63000.25", "phase_step_cycles": 0.125,
                   "frequency_step_hz": 3.2e-7, "frequency_derivative_step_hz_per_s": -2e-16,
                   "recoveries": [{"frequency_step_hz": 1e-7, "timescale_days": 30}]}],
    )
    ref, _ = mjd_to_ns(model.reference_epoch_mjd_tdb)
    instants = ref + rng.integers(-THIRTY_YEARS_NS, THIRTY_YEARS_NS, 80)
    extra = rng.uniform(-510, 510, instants.size)  # a barycentric correction rides along
    assert_matches_oracle(model, instants, extra)


def test_phase_matches_mpmath_in_a_binary(rng):
    # Same oracle with a Keplerian orbit (Blandford & Teukolsky 1976) written out in
    # mpmath: emission time from mpmath's root finder on t_e + delay(t_e) = t_a.
    model = make_model(
        frequency_hz="463.123456789012345",
        frequency_derivatives=["-2.1e-15"],
        binary={"kind": "keplerian", "orbital_period_days": 1.5,
                "projected_semi_major_axis_lt_s": 3.7,
                "eccentricity": 0.17, "periastron_longitude_deg": 211.0,
                "periastron_epoch_mjd_tdb": "60600.3", "einstein_delay_s": 1e-4},
    )
    ref, _ = mjd_to_ns(model.reference_epoch_mjd_tdb)
    instants = ref + rng.integers(-THIRTY_YEARS_NS, THIRTY_YEARS_NS, 40)
    assert_matches_oracle(model, instants, rng.uniform(-500, 500, instants.size))


@given(
    frequency=st.decimals(min_value=Decimal("0.05"), max_value=Decimal("1000"), places=15),
    fdot_exp=st.integers(min_value=-17, max_value=-11),
    offset_ns=st.integers(min_value=-THIRTY_YEARS_NS, max_value=THIRTY_YEARS_NS),
    extra=st.floats(min_value=-600, max_value=600),
)
@example(frequency=Decimal("999.999999999999999"), fdot_exp=-11, offset_ns=THIRTY_YEARS_NS,
         extra=599.9)
def test_property_random_models_and_instants(frequency, fdot_exp, offset_ns, extra):
    model = make_model(frequency_hz=str(frequency),
                       frequency_derivatives=[f"-1.7e{fdot_exp}"])
    ref, _ = mjd_to_ns(model.reference_epoch_mjd_tdb)
    assert_matches_oracle(model, np.array([ref + offset_ns]), np.array([extra]))


def test_phase_is_zero_at_the_phase_zero_instant_and_batches_agree():
    model = make_model(frequency_derivatives=["-1e-15"], phase_zero_mjd_tdb="60700.5")
    zero_ns, _ = mjd_to_ns("60700.5")
    _, fraction, _ = PhaseCalculator(model).phase(np.array([zero_ns]))
    assert min(fraction[0], 1 - fraction[0]) < 1e-12
    # one call for a whole night equals many small calls (no state leaks between batches)
    calculator = PhaseCalculator(model)
    instants = zero_ns + np.arange(0, 12 * 3600 * NS_PER_S, 7_777_777_777)
    whole = calculator.phase(instants)
    pieces = [calculator.phase(chunk) for chunk in np.array_split(instants, 7)]
    np.testing.assert_array_equal(whole[0], np.concatenate([p[0] for p in pieces]))
    np.testing.assert_array_equal(whole[1], np.concatenate([p[1] for p in pieces]))


def test_events_outside_the_validity_window_are_flagged():
    model = make_model(validity={"start_mjd_tdb": "60600", "end_mjd_tdb": "60700"})
    inside, _ = mjd_to_ns("60650")
    outside, _ = mjd_to_ns("60701")
    _, _, flags = PhaseCalculator(model).phase(np.array([inside, outside]))
    assert list(flags & Quality.OUTSIDE_MODEL_VALIDITY) == [0, Quality.OUTSIDE_MODEL_VALIDITY]
