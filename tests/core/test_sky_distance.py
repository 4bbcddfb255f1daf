"""Angular distance of events from a target (the region cut) and the table-and-series
unit vectors it is built on, against astropy and mpmath."""

from __future__ import annotations

import mpmath
import numpy as np
from astropy.coordinates import SkyCoord

from turnstamp.core.barycentre import SkyPosition
from turnstamp.core.harmonicsums import exp_two_pi_i
from turnstamp.core.targets import cos_angular_distance


def test_unit_vectors_against_mpmath(rng):
    # angles anywhere, including far outside one turn and near the table's nodes
    turns = np.concatenate([rng.uniform(-1e3, 1e3, 2000), np.arange(-4, 4, 1 / 1024),
                            [0.0, 0.25, 0.5, -0.25, 1e-300, 1 - 2**-53]])
    got = exp_two_pi_i(turns)
    with mpmath.workdps(40):  # reference: mpmath at 40 digits (mpmath.expjpi(2x))
        want = np.array([complex(mpmath.expjpi(2 * mpmath.mpf(float(t)))) for t in turns])
    # the reduction t - floor(t) rounds by up to 2^-53 of the integer part's scale
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-12)
    inside = np.abs(turns) < 1
    np.testing.assert_allclose(got[inside], want[inside], rtol=0, atol=1e-15)


def test_cos_angular_distance_against_astropy(rng):
    # reference: astropy's SkyCoord.separation (Vincenty formula), all sky and near
    target = SkyPosition(217.3318, -41.0627)
    ra = np.concatenate([rng.uniform(-360, 720, 3000), 217.3318 + rng.normal(0, 1, 3000)])
    dec = np.concatenate([np.degrees(np.arcsin(rng.uniform(-1, 1, 3000))),
                          np.clip(-41.0627 + rng.normal(0, 1, 3000), -90, 90)])
    got = cos_angular_distance(ra, dec, target)
    separation = SkyCoord(217.3318, -41.0627, unit="deg").separation(
        SkyCoord(ra, dec, unit="deg")).radian
    np.testing.assert_allclose(got, np.cos(separation), rtol=0, atol=2e-15)
    # at the poles and at the target itself
    pole = cos_angular_distance(np.array([0.0, 123.0]), np.array([90.0, 90.0]),
                                SkyPosition(10.0, 90.0))
    np.testing.assert_allclose(pole, [1.0, 1.0], rtol=0, atol=1e-15)
    assert abs(cos_angular_distance(np.array([217.3318]), np.array([-41.0627]), target)[0]
               - 1.0) < 1e-15


def test_no_directions_and_bad_directions_give_no_error():
    # an empty batch, and directions nobody checked (no region cut reads them): the
    # distance is NaN where a direction is not finite, as np.cos would give
    target = SkyPosition(217.3318, -41.0627)
    assert cos_angular_distance(np.array([]), np.array([]), target).shape == (0,)
    assert exp_two_pi_i(np.array([])).shape == (0,)
    got = cos_angular_distance(np.array([np.nan, 217.3318, np.inf, 217.3318]),
                               np.array([-41.0627, np.nan, -41.0627, -41.0627]), target)
    assert np.isnan(got[:3]).all() and abs(got[3] - 1.0) < 1e-15
    assert np.isnan(exp_two_pi_i(np.array([np.inf, -np.inf, np.nan]))).all()
