"""Time tags and the sampling grid: leap seconds, calendar, ISO and MJD parsing, intervals."""

from __future__ import annotations

import datetime as dt
import logging
import re

import numpy as np
import pytest

from ensemble.errors import InputError
from ensemble.io import sampling as sp
from ensemble.io import timetags as tt

# Cross-check: MJD = JD - 2 400 000.5, MJD 0 = 1858-11-17 (the usual definition of the Modified
# Julian Date; common practice, no source cited here)
MJD0 = dt.date(1858, 11, 17)


def mjd_of(year: int, month: int, day: int) -> int:
    """Independent route to an integer MJD: Python's proleptic Gregorian calendar."""
    return (dt.date(year, month, day) - MJD0).days


# --------------------------------------------------------------------------- leap seconds
def test_leap_table_is_consistent():
    days = [d for d, _ in tt.LEAP_SECONDS]
    values = [v for _, v in tt.LEAP_SECONDS]
    # Cross-check: TAI - UTC = 10 s exactly from 1972-01-01 (from memory), then +1 s per leap
    assert tt.LEAP_SECONDS[0] == (mjd_of(1972, 1, 1), 10)
    assert np.all(np.diff(values) == 1)
    assert np.all(np.diff(days) > 0)
    # Cross-check: 37 s from 2017-01-01 (from memory), = 10 s + 27 steps of the table
    assert tt.LEAP_SECONDS[-1] == (mjd_of(2017, 1, 1), 37) == (57754, 37)
    assert values[0] + (len(values) - 1) == 37
    # Cross-check: leap seconds are inserted at the end of June or December (Bulletin C practice)
    for d in days:
        date = MJD0 + dt.timedelta(days=d)
        assert (date.month, date.day) in ((1, 1), (7, 1)), date


def test_tai_minus_utc_around_the_last_leap():
    # Cross-check: TAI - UTC 36 s -> 37 s at MJD 57754 (2017-01-01), from memory and table sum
    assert tt.tai_minus_utc_s(57753) == 36
    assert tt.tai_minus_utc_s(57754) == 37
    assert tt.tai_minus_utc_s(60676) == 37
    assert tt.tai_minus_utc_s(mjd_of(1972, 1, 1)) == 10
    assert tt.has_leap_second(57753) and not tt.has_leap_second(57754)
    # Cross-check: the leap at the end of 2015-06-30 (from memory), none at the end of 2015
    assert tt.has_leap_second(mjd_of(2015, 6, 30)) and not tt.has_leap_second(mjd_of(2015, 12, 31))


def test_table_expiry_is_after_the_last_leap():
    assert tt.LEAP_TABLE_EXPIRES_MJD == mjd_of(2026, 7, 1)
    assert tt.LEAP_TABLE_EXPIRES_MJD > tt.LEAP_SECONDS[-1][0]


def test_tags_beyond_the_expiry_are_a_logged_warning(caplog):
    with caplog.at_level(logging.WARNING, logger="ensemble"):
        assert not tt.warn_if_beyond_table(tt.LEAP_TABLE_EXPIRES_MJD - 0.01, "a.csv")
        assert tt.warn_if_beyond_table(tt.LEAP_TABLE_EXPIRES_MJD + 10.5, "a.csv")
    assert len(caplog.records) == 1
    assert "beyond the leap-second table" in caplog.records[0].getMessage()


# --------------------------------------------------------------------------- calendar
def test_mjd_from_calendar_against_datetime(rng):
    ordinals = rng.integers(dt.date(1972, 1, 1).toordinal(), dt.date(2099, 12, 31).toordinal(),
                            500)
    dates = [dt.date.fromordinal(int(o)) for o in ordinals]
    got = tt.mjd_from_calendar([d.year for d in dates], [d.month for d in dates],
                               [d.day for d in dates])
    # Cross-check: Python's datetime calendar
    assert got.tolist() == [(d - MJD0).days for d in dates]


def test_known_mjds():
    # Cross-check: MJDs derived here by our own calendar arithmetic: 1970-01-01, GPS epoch,
    # 1997-10-01, 2000-01-01, 2025-01-01
    got = tt.mjd_from_calendar([1970, 1980, 1997, 2000, 2025], [1, 1, 10, 1, 1], [1, 6, 1, 1, 1])
    assert got.tolist() == [40587, 44244, 50722, 51544, 60676]


def test_format_iso_utc():
    # Cross-check: 60676.5 = 2025-01-01 12:00 (MJD 60676 = 2025-01-01, test_known_mjds)
    assert tt.format_iso_utc(60676.5) == "2025-01-01T12:00:00Z"
    assert tt.format_iso_utc(60676.541667) == "2025-01-01T13:00:00Z"
    assert tt.format_iso_utc(60676.0 + 1.5 / 86400, 3) == "2025-01-01T00:00:01.500Z"


# --------------------------------------------------------------------------- parsing
def test_iso_forms_and_fractions():
    p = tt.parse_iso_texts(["2026-03-01T12:00:00Z", "2026-03-01T12:00:00+00:00",
                            "2026-03-01T12:00:00.250Z"])
    assert p.error == []
    assert p.day.tolist() == [mjd_of(2026, 3, 1)] * 3
    assert p.sod_s.tolist() == [43200.0, 43200.0, 43200.25]
    assert p.resolution_s == pytest.approx(1e-3)
    assert p.exact


def test_iso_leap_second_accepted_and_labelled_inside_its_day():
    p = tt.parse_iso_texts(["2016-12-31T23:59:59Z", "2016-12-31T23:59:60Z",
                            "2016-12-31T23:59:60.5Z", "2017-01-01T00:00:00Z"])
    assert p.error == []
    assert p.sod_s[1] == 86400.0 and p.day[1] == 57753
    labels = p.mjd
    assert np.all(np.diff(labels) > 0)
    assert 57753 < labels[1] < 57754


@pytest.mark.parametrize("text, fragment", [
    ("2026-03-01T12:00:00", "no time zone"),
    ("2026-03-01 12:00", "no time zone"),
    ("2026-03-01T12:00:00+01:00", "offset \\+01:00, not UTC"),
    ("2026-03-01T12:00:00-05:00", "not UTC"),
    ("2015-12-31T23:59:60Z", "only at the end of a day with a leap second"),
    ("2025-02-29T00:00:00Z", "not a calendar date"),
    ("2025-01-01T24:00:00Z", "not a time of day"),
    ("1969-07-20T20:17:40Z", "outside the supported range"),
    ("60676.5", "not an ISO-8601 UTC time"),
    ("", "empty"),
])
def test_iso_refusals(text, fragment):
    p = tt.parse_iso_texts([text])
    assert len(p.error) == 1
    reason = p.error[0][1]
    assert re.search(fragment, reason), reason
    if "zone" in fragment or "UTC" in fragment:
        assert tt.ISO_FORMS in reason          # the message shows both accepted forms


def test_mjd_text_resolution_and_refusals():
    p = tt.parse_mjd_texts(["60676.5", "60676.541667", "60676"])
    assert p.error == []
    assert p.resolution_s == pytest.approx(0.0864)       # one unit of the 6th decimal of a day
    assert p.sod_s[1] == pytest.approx(46800.0288, abs=1e-6)
    bad = tt.parse_mjd_texts(["6.0676e4", "nan", "30000.5", "-60676.5", "1e999"])
    assert [i for i, _ in bad.error] == [0, 1, 2, 3, 4]
    assert "not a decimal MJD" in bad.error[0][1]
    assert "outside the supported range" in bad.error[2][1]


# --------------------------------------------------------------------------- tolerance
def test_tolerance_and_digits():
    # Cross-check: one unit of the 6th decimal of a day is 86400e-6 s = 0.0864 s (arithmetic)
    assert sp.grid_tolerance_s(3600.0, 0.0864) == pytest.approx(0.0864 + tt.FLOAT_SLACK_S)
    assert sp.grid_tolerance_s(3600.0, 1.0, exact_tags=True) == pytest.approx(0.5, abs=1e-5)
    assert sp.grid_tolerance_s(1.0, 1.0, exact_tags=True) == 0.25    # capped at tau0 / 4
    assert sp.grid_tolerance_s(12.5, 1.0, exact_tags=True) is None   # 12.5 s not whole seconds
    assert sp.grid_tolerance_s(0.1, 0.0864) is None                  # 6 decimals too coarse
    # Cross-check: d decimals suffice when 86400 * 10**-d <= tau0 / 4 (arithmetic)
    for tau0, d in ((0.5, 6), (1.0, 6), (10.0, 5), (60.0, 4), (300.0, 4), (3600.0, 2)):
        assert sp.digits_needed(tau0) == d
        assert 86400 * 10.0 ** -d <= tau0 / 4 < 86400 * 10.0 ** -(d - 1)


# --------------------------------------------------------------------------- the grid
def _iso(texts):
    p = tt.parse_iso_texts(texts)
    assert p.error == []
    return sp.fit_grid(p.day, p.sod_s, p.resolution_s, exact_tags=True, column="time")


def _mjd(values, digits=6):
    p = tt.parse_mjd_texts([f"{v:.{digits}f}" for v in values])
    assert p.error == []
    return sp.fit_grid(p.day, p.sod_s, p.resolution_s, exact_tags=False)


def test_hourly_six_decimal_mjd():
    g = _mjd(60676 + np.arange(200) / 24)
    # Cross-check: the tags were written from k hours; six decimals round them by <= 0.0432 s
    assert g.tau0_s == 3600.0
    assert g.elapsed_s.tolist() == (3600.0 * np.arange(200)).tolist()


def test_leap_second_interval_hourly_on_utc_marks():
    g = _iso(["2016-12-31T22:00:00Z", "2016-12-31T23:00:00Z", "2017-01-01T00:00:00Z",
              "2017-01-01T01:00:00Z"])
    # Cross-check: TAI - UTC 36 -> 37 s at MJD 57754 (from memory, consistent with the table sum):
    # the hour across 2016-12-31 23:59:60 lasts 3601 s
    assert np.diff(g.elapsed_s).tolist() == [3600.0, 3601.0, 3600.0]
    assert g.tau0_s == 3600.0 and g.scale == "utc"
    g = _mjd([57753 + 22 / 24, 57753 + 23 / 24, 57754.0, 57754 + 1 / 24])
    assert np.diff(g.elapsed_s).tolist() == [3600.0, 3601.0, 3600.0]


def test_one_second_series_through_the_leap_second():
    g = _iso(["2016-12-31T23:59:58Z", "2016-12-31T23:59:59Z", "2016-12-31T23:59:60Z",
              "2017-01-01T00:00:00Z", "2017-01-01T00:00:01Z"])
    # Cross-check: 23:59:60 is a real second: five consecutive SI seconds
    assert g.elapsed_s.tolist() == [0.0, 1.0, 2.0, 3.0, 4.0]


def test_free_running_sampler_across_a_leap_second():
    g = _iso(["2016-12-31T23:59:30Z", "2016-12-31T23:59:50Z", "2017-01-01T00:00:09Z",
              "2017-01-01T00:00:29Z"])
    # Cross-check: 23:59:50 -> 00:00:09 spans 20 SI seconds when 23:59:60 is inserted
    assert g.scale == "continuous" and g.tau0_s == 20.0
    assert g.elapsed_s.tolist() == [0.0, 20.0, 40.0, 60.0]


def test_leap_second_tag_in_an_hourly_series_is_refused():
    p = tt.parse_iso_texts(["2016-12-31T22:00:00Z", "2016-12-31T23:00:00Z",
                            "2016-12-31T23:59:60Z", "2017-01-01T01:00:00Z"])
    with pytest.raises(InputError, match="inside a leap second"):
        sp.fit_grid(p.day, p.sod_s, p.resolution_s, exact_tags=True, rows=np.arange(2, 6),
                    column="time")


def test_gaps_and_the_smallest_spacing():
    k = np.array([0, 1, 3, 5, 7, 9, 11, 13])          # mostly 2 h apart, one 1 h spacing
    g = _mjd(60676 + k / 24)
    # Cross-check: the slots the tags were written from
    assert g.tau0_s == 3600.0 and g.spacing == "smallest"
    assert g.slot.tolist() == k.tolist()


def test_roundest_interval_is_chosen():
    # Cross-check: the tags are written from these intervals (8 or 10 decimals of a day)
    for tau0 in (0.5, 1.0, 12.5, 60.0, 300.0, 86400.0):
        n = 40
        digits = 10 if tau0 < 1 else 8
        g = _mjd(60676 + np.arange(n) * tau0 / 86400, digits=digits)
        assert g.tau0_s == tau0


def test_off_grid_epoch_named_by_first_row_in_file():
    values = list(60676 + np.arange(10) / 24)
    values[7] += 120 / 86400                      # 2 min late
    values[3] += 60 / 86400                       # 1 min late
    p = tt.parse_mjd_texts([f"{v:.6f}" for v in values])
    rows = np.array([2, 3, 4, 20, 5, 6, 7, 8, 9, 10])   # epoch 3 sits on a late line of the file
    with pytest.raises(InputError) as exc:
        sp.fit_grid(p.day, p.sod_s, p.resolution_s, exact_tags=False, path="f.csv", rows=rows)
    assert exc.value.row == 8                     # epoch 7 is on the earlier line
    assert "+120 s from the 3600 s sampling grid" in str(exc.value)


def test_two_tags_on_one_slot():
    p = tt.parse_iso_texts(["2025-01-01T00:00:00Z", "2025-01-01T01:00:00Z",
                            "2025-01-01T01:00:00.020Z", "2025-01-01T02:00:00Z"])
    with pytest.raises(InputError, match=r"\(row 3\) fall on the same slot") as exc:
        sp.fit_grid(p.day, p.sod_s, p.resolution_s, exact_tags=True, path="f.csv",
                    rows=np.array([2, 3, 9, 4]), column="time")
    assert exc.value.row == 9


def test_too_coarse_mjd_text_says_how_many_digits():
    p = tt.parse_mjd_texts([f"{60676 + k / 86400:.5f}" for k in range(100)])
    with pytest.raises(InputError, match="at least 6 decimals"):
        sp.fit_grid(p.day, p.sod_s, p.resolution_s, exact_tags=False)


def test_one_epoch_is_not_enough():
    with pytest.raises(InputError, match="at least two"):
        sp.fit_grid(np.array([60676]), np.array([0.0]), 1.0)


# --------------------------------------------------------------------------- appends
def test_interval_across_the_leap_second():
    # Cross-check: TAI - UTC 36 -> 37 s at MJD 57754 (from memory and the table's sum)
    assert tt.interval_s(57753 + 23 / 24, 57754.0, 3600.0) == 3601.0
    assert tt.interval_s(57753.5, 57754.5, 3600.0) == 86401.0
    assert tt.interval_s(60676.5, 60676.541667, 3600.0) == 3600.0
    with pytest.raises(InputError, match="off the 3600 s grid"):
        tt.interval_s(60676.5, 60676.55, 3600.0)


def test_continuation_must_go_forward():
    assert tt.check_continuation(60676.5, 60676.541667, 3600.0, path="new.csv", row=2) == 3600.0
    with pytest.raises(InputError, match=r"new\.csv:2: column 'mjd': .*repeats the last") as e:
        tt.check_continuation(60676.5, 60676.5, 3600.0, path="new.csv", row=2)
    assert e.value.row == 2 and e.value.path == "new.csv"
    with pytest.raises(InputError, match=r"new\.csv:7: .*is before the last archived epoch"):
        tt.check_continuation(60676.5, 60676.25, 3600.0, path="new.csv", row=7)
    with pytest.raises(InputError, match=r"continue the archive's grid"):
        tt.check_continuation(60676.5, 60676.56, 3600.0, path="new.csv", row=3)
