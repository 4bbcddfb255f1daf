"""Chebyshev tables of the barycentric correction against the direct computation, and
what they say outside their coverage."""

import numpy as np
import pytest
from sky_fixtures import TARGET, night_tt

from turnstamp.core.barycentre import SPEED_OF_LIGHT, BarycentreCalculator
from turnstamp.core.correctiontable import CorrectionTable
from turnstamp.core.earth import OrbitTrack
from turnstamp.core.timebase import NS_PER_S

ORBIT_RADIUS_M = 6_378_137.0 + 612_400.0  # an invented orbit 612.4 km above the equator


@pytest.mark.slow
def test_table_matches_direct_computation_to_a_tenth_of_a_nanosecond(calculator, leaps, rng):
    # Acceptance of the foundation issue: interpolated vs direct, same ephemeris, full
    # night at a ground site, 1e5 random instants, max |difference| <= 0.1 ns.
    start, stop = night_tt(leaps)
    table = CorrectionTable.build(calculator.correction, start, stop)
    instants = np.sort(rng.integers(start, stop, 100_000))
    direct, _ = calculator.correction(instants)
    interpolated, _, inside = table.evaluate(instants)
    assert inside.all()
    assert np.max(np.abs(interpolated - direct)) <= 0.1e-9


def circular_orbit_track(start, hours=3.0, step_s=20.0):
    """An invented low-Earth orbit (circular, 612.4 km up, inclination 44.3 deg)."""
    # m; GM of the Earth (IERS Conventions 2010, table 1.1, from memory)
    radius, mu = ORBIT_RADIUS_M, 3.986004418e14
    omega = np.sqrt(mu / radius**3)
    seconds = np.arange(0.0, hours * 3600 + step_s, step_s)
    angle = omega * seconds
    incl = np.radians(44.3)
    position = radius * np.stack([np.cos(angle), np.sin(angle) * np.cos(incl),
                                  np.sin(angle) * np.sin(incl)], axis=1)
    velocity = radius * omega * np.stack([-np.sin(angle), np.cos(angle) * np.cos(incl),
                                          np.cos(angle) * np.sin(incl)], axis=1)
    times = start + np.round(seconds * NS_PER_S).astype(np.int64)
    return OrbitTrack("test orbiter", times, position, velocity)


def test_table_for_a_low_earth_orbit_matches_direct_computation_to_a_nanosecond(
        kernel, orientation, leaps, rng):
    start, _ = night_tt(leaps)
    track = circular_orbit_track(start)
    calc = BarycentreCalculator(track, TARGET, kernel, orientation)
    stop = int(track.tt_ns[-1])
    table = CorrectionTable.build(calc.correction, start, stop, segment_ns=600 * NS_PER_S,
                                  degree=12)
    instants = np.sort(rng.integers(start, stop, 20_000))
    direct, _ = calc.correction(instants)
    interpolated, _, _ = table.evaluate(instants)
    assert np.max(np.abs(interpolated - direct)) <= 1e-9
    # the orbit dominates: the diurnal-like term reaches radius/c = 23.3 ms
    terms = calc.terms(instants)
    geocentre = BarycentreCalculator(
        OrbitTrack("geocentre", track.tt_ns, np.zeros_like(track.position_m),
                   np.zeros_like(track.position_m)), TARGET, kernel, orientation).terms(instants)
    assert np.max(np.abs(terms["roemer"] - geocentre["roemer"])) <= ORBIT_RADIUS_M / SPEED_OF_LIGHT


def test_table_says_what_happens_outside_its_coverage(calculator, leaps):
    start, stop = night_tt(leaps, hours=2)
    table = CorrectionTable.build(calculator.correction, start, stop)
    values, _, inside = table.evaluate(np.array([start - 1, start, stop - 1, table.stop_ns]))
    assert list(inside) == [False, True, True, False]
    assert np.isnan(values[0]) and np.isnan(values[3])
    again = CorrectionTable.from_columns(**table.to_columns(), provenance=table.provenance)
    np.testing.assert_array_equal(again.coefficients, table.coefficients)
    assert again.start_ns == table.start_ns and again.segment_ns == table.segment_ns


def test_a_batch_in_one_segment_gets_the_same_bits_as_in_a_mixed_batch(calculator, leaps, rng):
    # a batch inside one segment takes a shortcut (scalar coefficients); the values must
    # not depend on which other events share the batch (archive rows are the same
    # whatever the batching)
    start, stop = night_tt(leaps, hours=2)
    table = CorrectionTable.build(calculator.correction, start, stop)
    alone = np.sort(rng.integers(start + 5 * NS_PER_S, start + 65 * NS_PER_S, 1000))
    others = np.array([start - 1, stop - 1, table.stop_ns + 5])  # another segment, outside
    values, flags, inside = table.evaluate(alone)
    mixed, mixed_flags, mixed_inside = table.evaluate(np.concatenate([alone, others]))
    assert inside.all() and list(mixed_inside[-3:]) == [False, True, False]
    assert values.tobytes() == mixed[:1000].tobytes()
    np.testing.assert_array_equal(flags, mixed_flags[:1000])
