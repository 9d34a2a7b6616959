"""Tests of pipeline.asof: the forecast state as of a date, causal by construction.

The data are made here, seeded and cheap: frame records of an invented star whose whole-cap polar field is
the dipole D(t) = 6 sin(2 pi (t - 2033)/22) G (reversals at 2033.0, 2044.0, 2055.0) with 0.2 G noise per
frame, seen through an annual B0 swing of +-7.25 deg that hides the far pole's highest latitude bins half
the year (so the default B0 method "fill" has work to do); and monthly sunspot numbers
5 + 150 sin^2(pi (t - 2027.5)/11) (minima at 2027.5, 2038.5, 2049.5; maxima at 2033, 2044, 2055).
Expected epochs and precursors are the closed-loop truth of these seeded series.
"""

import datetime as dt
import json

import numpy as np
import pytest

from pipeline.asof import (NoForecastError, SeriesTable, as_of_instant, check_as_of, forecast_document,
                           forecast_inputs, read_series_table, records_before, series_from_table, store_scale)
from pipeline.b0 import bin_mean_sin_power
from pipeline.config import ConfigError, load_config
from pipeline.jsonio import finite_or_none
from pipeline.measure import FrameRecord
from pipeline.regression import CalibrationTable, ScaleMismatchError
from pipeline.timeutil import decimal_year, from_decimal_year, iso_time

EDGES = np.r_[np.arange(-90.0, -54.5, 1.0), np.arange(55.0, 90.5, 1.0)]  # 1-deg bins over |lat| >= 55
CAP_FACTOR = float(bin_mean_sin_power(60.0, 90.0, 8.0))  # whole-cap (60-90 deg) mean of sin^8


def dipole(t):
    """The invented star's whole-cap polar field (north; south = -north), gauss."""
    return 6.0 * np.sin(2 * np.pi * (np.asarray(t) - 2033.0) / 22.0)


def _profile(d, b0):
    """Exact bin means of d sin^8|lat| / CAP_FACTOR (whole-cap mean d), bins hidden by B0 left empty."""
    lo, hi = EDGES[:-1], EDGES[1:]
    br, area = [], []
    for a, b in zip(lo, hi):
        north_seen = a >= 55.0 and (b0 >= 0 or b <= 90.0 + b0)
        south_seen = b <= -55.0 and (b0 <= 0 or -a <= 90.0 - b0)
        if north_seen or south_seen:
            lo_abs, hi_abs, sign = (a, b, 1.0) if north_seen else (-b, -a, -1.0)
            br.append(float(sign * d * bin_mean_sin_power(lo_abs, hi_abs, 8.0) / CAP_FACTOR))
            area.append(float(np.sin(np.radians(hi_abs)) - np.sin(np.radians(lo_abs))) * 1e18)
        else:
            br.append(None)
            area.append(0.0)
    return tuple(br), tuple(area)


def make_records(t0=2030.0, t1=2056.0, step=0.05, seed=3):
    """Frame records every ``step`` years; the noise of frame k is the k-th draw of one seeded stream, so a
    longer archive only appends records (the earlier ones are identical)."""
    rng = np.random.default_rng(seed)
    out = []
    for k, t in enumerate(np.arange(t0, t1, step)):
        b0 = 7.25 * np.sin(2 * np.pi * (t - 0.43))
        d = float(dipole(t) + rng.normal(0.0, 0.2))
        br, area = _profile(d, b0)
        out.append(FrameRecord(file=f"kvm_{k:04d}.fits", status="ok", time=iso_time(from_decimal_year(t)),
                               b0_deg=float(b0), north_br_gauss=d, south_br_gauss=-d, north_br_error_gauss=0.2,
                               south_br_error_gauss=0.2, north_coverage=0.5, south_coverage=0.5,
                               cap_latitude_deg=60.0, instrument="KVM", profile_edges_deg=tuple(EDGES.tolist()),
                               profile_br_gauss=br, profile_area_m2=area))
    return out


def make_sunspots(t1=2056.0):
    t = 2020.0 + (np.arange(int(round((t1 - 2020.0) * 12))) + 0.5) / 12
    return t, 5 + 150 * np.sin(np.pi * (t - 2027.5) / 11.0) ** 2


def phase_table(phases, n=6, seed=1, scale=""):
    """Seeded calibration rows (invented) for each phase: amplitude = 30 + 20 P + noise."""
    rng = np.random.default_rng(seed)
    cyc, x, y, ph = [], [], [], []
    for p in phases:
        xs = rng.uniform(2.0, 7.0, n)
        x += list(xs)
        y += list(30 + 20 * xs + rng.normal(0, 8, n))
        cyc += list(range(1, n + 1))
        ph += [p] * n
    return CalibrationTable(tuple(cyc), np.array(x), np.array(y), phase=tuple(ph), scale=(scale,) * len(x))


@pytest.fixture(scope="module")
def records():
    return make_records()


def _canonical(doc):
    return json.dumps(finite_or_none(doc), sort_keys=True)


# ---- the as-of date ---------------------------------------------------------------------------------------

def test_as_of_forms_and_errors():
    a = as_of_instant("2047-07-01")
    # decimal year of 2047-07-01T00:00 = 2047 + 181/365 (timeutil's definition; common practice, no source)
    assert a.date == "2047-07-01" and a.decimal_year == pytest.approx(2047 + 181 / 365, abs=1e-12)
    assert as_of_instant(dt.date(2047, 7, 1)) == a and as_of_instant(np.datetime64("2047-07-01")) == a
    assert as_of_instant(2047.5).date == "2047-07-02" and as_of_instant("2047.5") == as_of_instant(2047.5)
    assert as_of_instant(None) is None
    for bad in ("May", "2047-13-01", "2047-07", float("nan"), True, 12.0):
        with pytest.raises(ValueError, match="as_of: got .*; expected an ISO date YYYY-MM-DD"):
            as_of_instant(bad)
    assert check_as_of("forecast.as_of", dt.date(2047, 7, 1)) == "2047-07-01"  # a TOML date, JSON-ready
    with pytest.raises(ConfigError, match=r"forecast.as_of: got 'soon'; expected an ISO date"):
        check_as_of("forecast.as_of", "soon")


def test_config_keys(tmp_path):
    path = tmp_path / "c.toml"
    path.write_text('[forecast]\nphase = "Reversal+4.0"\nlags_years = [6, 2, 4, 4]\nas_of = 2047-07-01\n')
    fs = load_config(path).forecast
    # canonical spellings (pipeline.regression.parse_phase), sorted unique lags, the TOML date as ISO text
    assert fs.phase == "reversal+4" and fs.lags_years == (2.0, 4.0, 6.0) and fs.as_of == "2047-07-01"
    assert load_config(None).forecast.phase == "auto"
    for text, match in (('phase = "max"', r"forecast.phase: got 'max'; valid phases are 'auto', 'minimum'"),
                        ("lags_years = []", r"forecast.lags_years: got \[\]; expected a non-empty list"),
                        ("lags_years = [2, 20]", r"every lag must lie in \[0, 15\]"),
                        ('as_of = "later"', r"forecast.as_of: got 'later'")):
        path.write_text(f"[forecast]\n{text}\n")
        with pytest.raises(ConfigError, match=match):
            load_config(path)


def test_records_before_is_strict_and_drops_untimed(records):
    cut = as_of_instant(records[10].time[:23])  # exactly the 11th record's instant
    kept = records_before(records + [FrameRecord(file="x", status="skipped")], cut)
    assert kept == records[:10]  # time < as_of: a frame at the instant itself is not yet "known"
    assert records_before(records, None) == records


# ---- the series table -------------------------------------------------------------------------------------

def test_series_table_read_and_dataset(tmp_path):
    path = tmp_path / "s.csv"
    path.write_text("time,north_br_gauss,south_br_gauss,north_br_error_gauss,south_br_error_gauss,extra\n"
                    "2040.5,3.0,-1.0,0.3,0.4,x\n"
                    "2040.0,2.0,-2.0,,0.4,x\n"
                    "2041.0,oops,-1.0,0.3,0.4,x\n"
                    "2040.5,9.0,-9.0,0.3,0.4,x\n"
                    "2041-07-02,4.0,,0.3,0.4,x\n")
    table = read_series_table(path)
    assert table.time_decimal_year.tolist() == pytest.approx([2040.0, 2040.5, float(decimal_year("2041-07-02"))])
    assert [p.split(": ")[0] for p in table.problems] == [f"{path} line 4", f"{path} line 5"]
    assert "repeats an earlier row" in table.problems[1]
    ds = series_from_table(table)
    # axial dipole proxy (N - S)/2 and its error sqrt(eN^2 + eS^2)/2 (DESIGN.md; independent errors)
    assert ds["dipole_br_rotation_gauss"].values[:2].tolist() == [2.0, 2.0]
    assert np.isnan(ds["dipole_br_rotation_gauss"].values[2])
    assert ds["dipole_br_rotation_error_gauss"].values[1] == pytest.approx(0.5 * np.hypot(0.3, 0.4))
    assert np.isnan(ds["dipole_br_rotation_error_gauss"].values[0])
    assert table.before(2040.5).time_decimal_year.tolist() == [2040.0]
    path.write_text("time,north\n2040,1\n")
    with pytest.raises(ValueError, match="missing column.*north_br_gauss, south_br_gauss"):
        read_series_table(path)
    with pytest.raises(ValueError, match="cannot read"):
        read_series_table(tmp_path / "absent.csv")


# ---- the state as of a date: phase, minimum, reversal, target cycle ---------------------------------------

def test_auto_takes_the_confirmed_minimum_after_the_reversal(records):
    state = forecast_inputs(records, make_sunspots(), as_of="2042-01-01")
    d = state.to_dict()
    # closed-loop truth of the seeded series: reversal 2033.0, minimum 2038.5 (month centres: +-1 month)
    assert d["phase"] == "minimum" and d["lag_years"] is None and d["minimum_status"] == "confirmed"
    assert d["minimum_time"] == pytest.approx(2038.5, abs=1 / 12) and d["reversal_time"] == pytest.approx(2033.0, abs=0.1)
    # the second minimum of the sunspot series (2027.5, 2038.5) begins cycle 2 of its numbering
    assert d["target_cycle"] == 2 and d["as_of"] == "2042-01-01" and d["data_date"] == "2041-12-31"
    tt = np.linspace(d["minimum_time"] - 0.5, d["minimum_time"] + 0.5, 4001)
    truth = np.mean(np.abs(dipole(tt)))  # window mean of |D| (closed form of the invented star)
    p = state.precursor
    assert abs(p["precursor_gauss"] - truth) < 3 * p["precursor_error_gauss"] + 0.02
    assert d["provisional"] is False and d["forecast_unavailable"] is None
    # numbered from another first cycle (the sunspot file starts at cycle 30 of some record)
    assert forecast_inputs(records, make_sunspots(), as_of="2042-01-01", first_cycle_number=30).target_cycle == 31
    # [forecast] as_of is the default cut-off
    same = forecast_inputs(records, make_sunspots(), load_config(None, forecast={"as_of": "2042-01-01"}))
    assert _canonical(same.to_dict()) == _canonical(d)


def test_auto_takes_the_largest_complete_lag_while_the_minimum_is_pending(records):
    state = forecast_inputs(records, make_sunspots(), as_of="2047-07-01")
    d = state.to_dict()
    # reversal 2044.0 (truth); frames to 2047.45: reversal+2 (window to 2046.5) is complete, reversal+3
    # (to 2047.5) is not; the lowest smoothed value since the 2044 maximum is only a pending candidate
    assert d["reversal_time"] == pytest.approx(2044.0, abs=0.1)
    assert d["phase"] == "reversal+2" and d["lag_years"] == 2.0
    assert d["minimum_status"] == "pending" and d["minimum_time"] > d["reversal_time"]
    assert d["target_cycle"] == 3 and any("pending, not yet known" in n for n in d["phase_notes"])
    t = state.precursor["time"]
    truth = np.mean(np.abs(dipole(np.linspace(t - 0.5, t + 0.5, 4001))))
    assert t == pytest.approx(d["reversal_time"] + 2.0)
    assert abs(state.precursor["precursor_gauss"] - truth) < 3 * state.precursor["precursor_error_gauss"] + 0.02
    # the window ends within fill_max_gap_years of the newest frame: said to be revisable
    assert d["provisional"] and "fill its hidden latitude bins" in d["provisional_reasons"][0]


def test_pinned_minimum_counts_and_pending_does_not(records):
    ssn = make_sunspots()
    pending = forecast_inputs(records, ssn, as_of="2050-07-01").to_dict()
    assert pending["minimum_status"] == "pending" and pending["phase"] == "reversal+5"  # reversal+6 ends 2050.5
    pinned_cfg = load_config(None, cycles={"pinned_minimum": 2049.5})
    pinned = forecast_inputs(records, ssn, pinned_cfg, as_of="2050-07-01").to_dict()
    assert pinned["phase"] == "minimum" and pinned["minimum_status"] == "pinned"
    assert pinned["minimum_time"] == 2049.5 and pinned["target_cycle"] == 3
    # the explicit phase "minimum" takes the pending candidate, and says the result may be revised
    explicit = forecast_inputs(records, ssn, phase="minimum", as_of="2050-07-01").to_dict()
    assert explicit["phase"] == "minimum" and explicit["minimum_status"] == "pending"
    assert any("pending; later sunspot data may move it" in r for r in explicit["provisional_reasons"])


def test_unavailable_states_give_one_line_reasons(records):
    ssn = make_sunspots()
    # as of 2044.6 the 2044.0 reversal is fresh: no lag window is complete, and the reversal is provisional
    fresh = forecast_inputs(records, ssn, as_of="2044-08-01")
    assert fresh.precursor is None and fresh.choice.phase is None
    assert fresh.unavailable.startswith("no configured lag after the final dipole reversal at 2044.")
    assert "\n" not in fresh.unavailable and fresh.reversal_provisional
    assert "may move or remove it" in fresh.to_dict()["provisional_reasons"][0]
    with pytest.raises(NoForecastError, match="no configured lag"):
        forecast_document(fresh, phase_table(["reversal+2"]))
    # no frame before the date at all
    empty = forecast_inputs(records, ssn, as_of="2020-01-01")
    assert empty.data_end is None and "no measured rotation" in empty.unavailable
    # explicit reversal+L whose window is still open
    late = forecast_inputs(records, ssn, phase="reversal+4", as_of="2047-07-01")
    assert "is not complete: the polar series ends at 2047.4" in late.unavailable


# ---- causality: later data never change an as-of result --------------------------------------------------

@pytest.mark.parametrize("as_of, phases", [("2046-09-01", ["reversal+2"]), ("2042-01-01", ["minimum"])])
def test_appending_later_data_leaves_the_as_of_forecast_unchanged(records, as_of, phases):
    """The whole forecast object (state and calibrated forecast) as of a date, from an archive ending at the
    date and from the same archive with nine more years of frames and sunspot months appended: identical.
    The appended frames would change the fill of the hidden bins and the smoothed series near the date if
    anything were computed before the cut (checked below)."""
    table = phase_table(phases, scale=store_scale(records)[0])
    cut = as_of_instant(as_of)
    short = [r for r in records if np.datetime64(r.time[:23]) < cut.instant]
    t, v = make_sunspots()
    months = t < cut.decimal_year  # the sunspot file as it stood on the date (month centres before it)
    before = forecast_document(forecast_inputs(short, (t[months], v[months]), as_of=as_of), table)
    after = forecast_document(forecast_inputs(records, (t, v), as_of=as_of), table)
    assert len(records) > len(short) + 100 and before["amplitude"] > 0
    assert _canonical(before) == _canonical(after)
    if as_of == "2046-09-01":
        # the window (to reversal + 2.5 = 2046.5) ends just before the newest frame (2046.65): the same
        # window of a series built from all the frames differs (the B0 fill of its hidden bins sees the later
        # frames), so the identity above holds only because the cut comes first
        from pipeline.aggregator import polar_series
        from pipeline.precursor import precursor_at

        leaky = precursor_at(polar_series(records), after["precursor_detail"]["time"])["precursor_gauss"]
        assert leaky != after["precursor"] and after["phase"] == "reversal+2"


def test_series_table_is_cut_causally_too(records):
    from pipeline.aggregator import polar_series

    ds = polar_series(records)
    t = np.atleast_1d(decimal_year(ds["rotation_time"].values))
    full = SeriesTable(t, ds["north_br_rotation_gauss"].values, ds["south_br_rotation_gauss"].values,
                       ds["north_br_rotation_error_gauss"].values, ds["south_br_rotation_error_gauss"].values)
    table = phase_table(["reversal+2"])
    as_of = "2047-07-01"
    short = full.before(as_of)
    assert short.time_decimal_year.size < full.time_decimal_year.size - 50
    a = forecast_document(forecast_inputs(full, make_sunspots(), as_of=as_of), table)
    b = forecast_document(forecast_inputs(short, make_sunspots(2048.0), as_of=as_of), table)
    assert _canonical(a) == _canonical(b) and a["precursor_source"] == "series" and a["phase"] == "reversal+2"


# ---- the calibrated forecast: phase-matched rows, scale ---------------------------------------------------

def test_forecast_document_matches_phase_and_checks_scale(records):
    state = forecast_inputs(records, make_sunspots(), as_of="2047-07-01")
    scale, notes = store_scale(records)
    assert scale == "instrument=KVM; cap_latitude_deg=60; b0_method=fill; precursor_kind=dipole" and notes == []
    doc = forecast_document(state, phase_table(["minimum", "reversal+2", "reversal+3"], scale=scale))
    assert doc["phase"] == "reversal+2" and doc["n_cycles"] == 6 and doc["scale"] == scale
    assert doc["scale_override"] is None
    with pytest.raises(NoForecastError, match=r"got 0 cycles; at least 4 .* phase 'reversal\+2'"):
        forecast_document(state, phase_table(["minimum"]))
    other = phase_table(["reversal+2"], scale="instrument=OTHER; cap_latitude_deg=60; b0_method=fill; "
                                              "precursor_kind=dipole")
    with pytest.raises(ScaleMismatchError, match="instrument=OTHER.*differs from the scale in force.*KVM"):
        forecast_document(state, other)
    allowed = forecast_document(state, other, allow_scale_mismatch=True)
    assert allowed["scale_override"]["scale_in_force"] == scale
    assert any("scale mismatch allowed" in w for w in allowed["warnings"])


def test_store_scale_fallbacks():
    recs = [FrameRecord(file="a", status="ok", time="2040-01-01T00:00:00")]
    scale, notes = store_scale(recs)
    assert scale.startswith("instrument=unnamed; cap_latitude_deg=60;") and len(notes) == 2
