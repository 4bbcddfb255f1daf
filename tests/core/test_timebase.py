"""Time scales, leap seconds and clock corrections against the standards and astropy."""

import numpy as np
import pytest
from astropy.time import Time

from turnstamp.core.flags import Quality
from turnstamp.core.timebase import (
    NS_PER_S,
    ClockCorrection,
    Scale,
    format_instant,
    from_tt,
    mjd_to_ns,
    parse_instant,
    to_tt,
)


def astropy_tt_ns(t: Time) -> np.ndarray:
    """astropy's TT (two doubles) as int64 ns since 2000-01-01T12:00:00 (rounded)."""
    tt = t.tt
    days = np.round(tt.jd1 - 2_451_545.0).astype(np.int64)
    fraction = (tt.jd1 - 2_451_545.0 - days) + tt.jd2
    return days * 86_400 * NS_PER_S + np.round(fraction * 86_400e9).astype(np.int64)


def test_leap_second_table_matches_the_standard(leaps):
    # IERS Bulletin C (as tabulated in erfa.dat and astropy's LeapSeconds): TAI-UTC = 10 s
    # from 1972-01-01, 27 steps since, 37 s from 2017-01-01; the bundled table runs to
    # mid-2027 (astropy-iers-data).
    since_1972 = leaps.start_mjd >= 41_317
    assert leaps.tai_minus_utc_s[since_1972][0] == 10
    assert np.count_nonzero(np.diff(leaps.tai_minus_utc_s[since_1972]) == 1) == 27
    assert leaps.tai_minus_utc_s[-1] == 37 and leaps.start_mjd[-1] == 57_754
    assert leaps.expires_mjd >= 61_583


def test_across_a_leap_second_one_label_second_lasts_two_si_seconds(leaps):
    # the leap second 2016-12-31T23:59:60 (IERS Bulletin C, from memory): 2016-12-31T23:59:59
    # -> 2017-01-01T00:00:00 UTC spans 2 SI seconds (astropy agrees).
    before = parse_instant("2016-12-31T23:59:59")
    after = parse_instant("2017-01-01T00:00:00")
    tt, _ = to_tt(np.array([before, after]), Scale.UTC, leaps)
    assert after - before == NS_PER_S
    assert tt[1] - tt[0] == 2 * NS_PER_S


def test_fixed_offsets_between_continuous_scales(leaps):
    # TT - TAI = 32.184 s exactly (IAU 1991 Resolution A4, from memory; erfa.TTMTAI);
    # GPS = TAI - 19 s (GPS epoch definition, IS-GPS-200, from memory).
    t = np.array([parse_instant("2026-12-01T22:00:00")])
    assert to_tt(t, Scale.TAI, leaps)[0][0] - t[0] == 32_184_000_000
    assert to_tt(t, Scale.GPS, leaps)[0][0] - t[0] == 51_184_000_000
    assert to_tt(t, Scale.TT, leaps)[0][0] == t[0]
    assert to_tt(t, Scale.UTC, leaps)[0][0] - t[0] == 69_184_000_000  # 37 + 32.184 s


def test_gps_seconds_count_matches_astropy_gps_format(leaps):
    # astropy's 'gps' format (astropy.time.Time.gps): 630720013.0 s at 2000-01-01T00:00:00
    # UTC, i.e. 7300 days + 13 leap seconds since 1980-01-06.
    utc = np.array([parse_instant("2000-01-01T00:00:00")])
    gps_label, _ = from_tt(to_tt(utc, Scale.UTC, leaps)[0], Scale.GPS, leaps)
    gps_epoch = parse_instant("1980-01-06T00:00:00")
    assert (gps_label[0] - gps_epoch) == 630_720_013 * NS_PER_S
    assert Time("2000-01-01T00:00:00", scale="utc").gps == pytest.approx(630_720_013.0)


def test_worked_example_of_the_standards_tools(leaps):
    # SOFA "Time Scale and Calendar Tools" worked example (IAU SOFA documentation, from
    # memory; erfa reproduces it): UTC 2006-01-15 21:24:37.5 -> TAI 21:25:10.5,
    # TT 21:25:42.684.
    utc = np.array([parse_instant("2006-01-15T21:24:37.5")])
    tt, _ = to_tt(utc, Scale.UTC, leaps)
    tai, _ = from_tt(tt, Scale.TAI, leaps)
    assert format_instant(tai[0], 3) == "2006-01-15T21:25:10.500"
    assert format_instant(tt[0], 3) == "2006-01-15T21:25:42.684"


@pytest.mark.parametrize("scale", ["utc", "tai", "tt"])
def test_random_instants_agree_with_astropy_to_a_nanosecond(leaps, rng, scale):
    # astropy Time (two-double jd1/jd2) is the reference library for the scale chain.
    labels = rng.integers(parse_instant("1975-01-01T00:00:00"),
                          parse_instant("2026-11-30T00:00:00"), 300)
    ours, _ = to_tt(labels, scale.upper(), leaps)
    text = [format_instant(x) for x in labels]
    theirs = astropy_tt_ns(Time(text, format="isot", scale=scale, precision=9))
    assert np.max(np.abs(ours - theirs)) <= 1
    back, _ = from_tt(ours, scale.upper(), leaps)
    np.testing.assert_array_equal(back, labels)


def test_expired_leap_table_is_flagged_not_refused(leaps):
    late = np.array([(leaps.expires_mjd + 10 - 51_544) * 86_400 * NS_PER_S])
    tt, flags = to_tt(late, Scale.UTC, leaps)
    assert flags[0] & Quality.LEAP_TABLE_EXPIRED
    assert tt[0] - late[0] == 69_184_000_000  # the last known value is held


def test_unknown_or_barycentric_scale_is_refused_with_the_allowed_set(leaps):
    with pytest.raises(ValueError, match=r"'UT2'.*\['UTC', 'TAI', 'GPS', 'TT'\]"):
        to_tt(np.array([0]), "UT2", leaps)
    with pytest.raises(ValueError, match="cannot be an instrument scale"):
        to_tt(np.array([0]), "TDB", leaps)


def test_clock_chain_is_piecewise_linear_and_keeps_sub_nanosecond_parts():
    start = parse_instant("2026-12-01T00:00:00")
    link = ClockCorrection("local -> GPS", np.array([start, start + 3600 * NS_PER_S]),
                           np.array([1.2345e-6, 2.2345e-6]))
    readings = np.array([start, start + 1800 * NS_PER_S, start - NS_PER_S, start + 7200 * NS_PER_S])
    ns, extra, flags = link.apply(readings, np.zeros(4))
    total = (ns - readings) * 1e-9 + extra
    np.testing.assert_allclose(total, [1.2345e-6, 1.7345e-6, 1.2345e-6, 2.2345e-6], atol=1e-16)
    assert np.all(np.abs(extra) <= 0.5e-9 + 1e-18)
    assert list(flags & Quality.CLOCK_CORRECTION_EXTRAPOLATED) == [0, 0, 8, 8]


def test_clock_table_must_increase():
    with pytest.raises(ValueError, match="must increase"):
        ClockCorrection("bad", np.array([2, 1]), np.array([0.0, 0.0]))


def test_instant_text_round_trip_and_errors():
    assert format_instant(parse_instant("2026-12-01T22:30:00.123456789")) == \
        "2026-12-01T22:30:00.123456789"
    assert parse_instant("2000-01-01T12:00:00") == 0
    assert mjd_to_ns("51544.5") == (0, 0)
    ns, rest = mjd_to_ns("60000.000000000000001")  # 8.64e-11 s beyond MJD 60000
    assert ns == (60_000 * 2 - 103_089) * 43_200 * NS_PER_S
    assert float(rest) == pytest.approx(8.64e-11)
    for bad in ("2026-13-01T00:00:00", "2026-12-01T24:00:00", "yesterday", "2016-12-31T23:59:60"):
        with pytest.raises(ValueError, match=bad[:4]):
            parse_instant(bad)
