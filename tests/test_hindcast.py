"""Tests of pipeline.hindcast: calibration from the archive's own cycles and as-of hindcasts.

The data are made here, seeded (not the demo star): a polar-series table of 15 cycles of 11 years, one row per
Carrington rotation (27.2753 d), whose axial dipole D(t) has a known shape.  In cycle k (starting at
m_k = 1900 + 11 k) the dipole reverses at m_k + 4.5, grows after it as sin(pi x / 2) (x from 0 at the reversal
to 1 at m_{k+1} - 1), holds P_{k+1} on a plateau from m_{k+1} - 1 to m_{k+1} + 2, and falls linearly to zero at
the next reversal.  So the field L years after the reversal is the known fraction f(L) = sin(pi L / 11) of its
value at the minimum (the window mean of that shape, computed below), for L < 5.5.  North = D + noise,
south = -D + noise (0.05 G per rotation).  Cycle k's amplitude is A_k = 20 + 25 P_k + N(0, 6); the monthly
sunspot numbers are the sum of Hathaway-Wilson-Reichmann (1994, Solar Phys. 151, 177) cycle shapes of those
peaks (pipeline.synth.activity), so the 13-month smoothed maxima are the amplitudes the hindcast is scored on.
Expected values are the closed-loop truth of these seeded series unless a line says otherwise.
"""

import math

import numpy as np
import pytest
from scipy import stats

from pipeline.asof import SeriesTable, forecast_document, forecast_inputs
from pipeline.cycles import cycle_landmarks
from pipeline.hindcast import (HINDCAST_ROW_KEYS, SKILL_KEYS, archive_calibration, hindcast, leave_cycle_out,
                               month_starts, skill, trajectory)
from pipeline.regression import CalibrationTable, ForecastSettings
from pipeline.synth.activity import cycle_sunspot_number

T0, PERIOD, N_CYCLES = 1900.0, 11.0, 14
REVERSAL_AFTER_MINIMUM = 4.5
PLATEAU = (-1.0, 2.0)  # years around each start m_k
A0, B1 = 20.0, 25.0
ROTATION_YEARS = 27.2753 / 365.25
LAG = 3.0
GROWTH_YEARS = PERIOD - REVERSAL_AFTER_MINIMUM + PLATEAU[0]  # reversal to the plateau: 5.5 yr


def growth(x):
    return np.sin(0.5 * np.pi * np.clip(x, 0.0, 1.0))


def fraction_at_lag(lag, window_years=0.5):
    """f(L): the window mean of |D| / P over +-window_years around reversal + L (exact integral of the shape)."""
    u = np.linspace(lag - window_years, lag + window_years, 20001)
    return float(np.mean(growth(u / GROWTH_YEARS)))


def make_archive(seed=0, noise_gauss=0.05, amplitude_noise=6.0, end=None):
    """(SeriesTable, (months, sunspots), P, A, starts): the seeded synthetic star of the module docstring."""
    rng = np.random.default_rng(seed)
    p = rng.uniform(3.0, 8.0, N_CYCLES + 1)  # P_k: |dipole| at the start of cycle k
    a = A0 + B1 * p + rng.normal(0.0, amplitude_noise, p.size)
    starts = T0 + PERIOD * np.arange(p.size)
    t = np.arange(T0 - 5.0, starts[-1] + 1.0, ROTATION_YEARS)
    d = np.zeros_like(t)
    for k, m in enumerate(starts):
        sign = (-1.0) ** k
        rev = m - PERIOD + REVERSAL_AFTER_MINIMUM
        grow = (t >= rev) & (t < m + PLATEAU[0])
        d[grow] = sign * p[k] * growth((t[grow] - rev) / GROWTH_YEARS)
        flat = (t >= m + PLATEAU[0]) & (t < m + PLATEAU[1])
        d[flat] = sign * p[k]
        fall = (t >= m + PLATEAU[1]) & (t < m + REVERSAL_AFTER_MINIMUM)
        d[fall] = sign * p[k] * (m + REVERSAL_AFTER_MINIMUM - t[fall]) / (REVERSAL_AFTER_MINIMUM - PLATEAU[1])
    north = d + rng.normal(0.0, noise_gauss, t.size)
    south = -d + rng.normal(0.0, noise_gauss, t.size)
    months = np.arange(T0 - 6.0, starts[-1] + 1.0, 1.0 / 12.0) + 1.0 / 24.0
    ssn = cycle_sunspot_number(months, starts[0] - PERIOD, 100.0)
    for st, amp in zip(starts, a):
        ssn = ssn + cycle_sunspot_number(months, st, amp)
    table = SeriesTable(t, north, south, source="synthetic")
    if end is not None:
        table = table.before(end)
        keep = months + 1.0 / 24.0 <= end
        months, ssn = months[keep], ssn[keep]
    return table, (months, ssn), p, a, starts


@pytest.fixture(scope="module")
def archive():
    return make_archive()


@pytest.fixture(scope="module")
def matched(archive):
    table, ssn, *_ = archive
    return hindcast(table, ssn, phase=f"reversal+{LAG:g}")


@pytest.fixture(scope="module")
def minimum_table(archive):
    table, ssn, *_ = archive
    return archive_calibration(table, ssn, phase="minimum").table


def test_archive_calibration_rows_are_the_closed_loop_truth(archive):
    table, ssn, p, _, starts = archive
    cycles = cycle_landmarks(*ssn)
    at_min = archive_calibration(table, ssn, phase="minimum")
    at_lag = archive_calibration(table, ssn, phase=f"reversal+{LAG:g}")
    # every minimum of the sunspot series lies on a dipole plateau (closed-loop truth): precursor = P_k
    assert len(at_min.table.cycle) >= 13
    k = np.array([int(c) for c in at_min.table.cycle]) - 1
    ordinal = np.array([int(round((cycles[i]["minimum_time"] - T0) / PERIOD)) for i in k])
    np.testing.assert_allclose(at_min.table.precursor, p[ordinal], atol=0.03)  # 0.05 G / sqrt(27 rotations) x 3
    # reversal+L: the known fraction f(L) of P at the next minimum (4 %: the reversal epoch is found from noisy,
    # smoothed data, an epoch error of 0.05 G noise over a slope proportional to P, largest for the weak cycles)
    k = np.array([int(c) for c in at_lag.table.cycle]) - 1
    ordinal = np.array([int(round((cycles[i]["minimum_time"] - T0) / PERIOD)) for i in k])
    np.testing.assert_allclose(at_lag.table.precursor / p[ordinal], fraction_at_lag(LAG), rtol=0.04)
    # amplitude: the 13-month smoothed maximum of the same sunspot series, of the cycle the row names
    np.testing.assert_allclose(at_lag.table.amplitude, [cycles[i]["maximum_value"] for i in k], rtol=0, atol=0)
    assert set(at_lag.table.phase) == {"reversal+3"} and set(at_min.table.phase) == {"minimum"}
    assert set(at_lag.table.scale) == {""} and np.all(at_lag.table.precursor_error > 0)
    # the first cycle has no reversal before its minimum in the series: said, no row
    assert any(s.startswith("cycle 1: no dipole reversal") for s in at_lag.skipped)
    assert archive_calibration(table, ssn, phase="minimum", scale="kind=test").table.scale[0] == "kind=test"


def test_phase_matched_hindcast_is_unbiased(archive, matched):
    table, ssn, *_ = archive
    h = matched
    assert h.phase == "reversal+3" and h.skill["n"] >= 12 and set(h.skill) == set(SKILL_KEYS)
    assert all(set(r) == set(HINDCAST_ROW_KEYS) for r in h.rows)
    # the check: median relative error within 5 %
    assert abs(h.skill["median_relative_error"]) < 0.05
    # mean error within 3 standard errors of zero (amplitude noise 6 plus the fit, about 7 per cycle)
    assert abs(h.skill["bias"]) < 3 * 7.0 / math.sqrt(h.skill["n"])
    assert h.skill["r"] > 0.95
    full = archive_calibration(table, ssn, phase="reversal+3").table
    for row in h.rows:
        assert row["n_calibration_cycles"] == full.n_cycles - 1  # the target cycle is left out
        assert row["error"] == pytest.approx(row["amplitude"] - row["truth_amplitude"])


def test_as_of_is_the_first_month_with_a_complete_window(archive, matched):
    table, ssn, *_ = archive
    w = ForecastSettings().window_years
    for row in matched.rows:
        inputs = forecast_inputs(table, ssn, phase="reversal+3", as_of=row["as_of_date"])
        assert inputs.target_cycle == row["target_cycle"] and inputs.precursor is not None
        center = inputs.precursor["time"]
        # the first month start after a rotation beyond the window's end
        assert center + w < row["as_of"] <= center + w + ROTATION_YEARS + 1.0 / 12.0 + 1e-9
        # one month earlier the window was not complete as known then
        y, m = (int(v) for v in row["as_of_date"].split("-")[:2])
        before = f"{y - (m == 1):04d}-{(m - 2) % 12 + 1:02d}-01"
        earlier = forecast_inputs(table, ssn, phase="reversal+3", as_of=before)
        assert earlier.precursor is None or earlier.target_cycle != row["target_cycle"]


def test_forced_minimum_calibration_on_reversal_precursors_shows_the_known_bias(archive, minimum_table, matched):
    table, ssn, p, _, starts = archive
    forced = CalibrationTable(minimum_table.cycle, minimum_table.precursor, minimum_table.amplitude,
                              minimum_table.precursor_error, phase=("reversal+3",) * minimum_table.n_cycles)
    h = hindcast(table, ssn, phase="reversal+3", calibration=forced)
    assert h.skill["n"] == matched.skill["n"]
    # known bias: a line A = a + b P fitted at the minimum, fed f P, gives a + b f P; relative to a + b P
    f = fraction_at_lag(LAG)
    cycles = cycle_landmarks(*ssn)
    pk = np.array([p[int(round((cycles[r["target_cycle"] - 1]["minimum_time"] - T0) / PERIOD))] for r in h.rows])
    expected = np.median((A0 + B1 * f * pk - (A0 + B1 * pk)) / (A0 + B1 * pk))
    assert expected < -0.15
    assert h.skill["median_relative_error"] == pytest.approx(expected, abs=0.03)  # amplitude noise ~ 4 %
    expected_bias = np.mean(-B1 * (1 - f) * pk)
    assert h.skill["bias"] == pytest.approx(expected_bias, abs=3 * 7.0 / math.sqrt(h.skill["n"]))
    assert h.skill["coverage_95"] < 0.5  # the wrong phase's intervals miss


def test_given_table_less_the_target_cycle(archive, minimum_table):
    table, ssn, *_ = archive
    base = hindcast(table, ssn, phase="minimum", calibration=minimum_table)
    target = base.rows[3]["target_cycle"]
    amp = minimum_table.amplitude.copy()
    amp[list(minimum_table.cycle).index(str(target))] = 10_000.0  # a wild value for the target's own row
    spoiled = CalibrationTable(minimum_table.cycle, minimum_table.precursor, amp, minimum_table.precursor_error)
    changed = hindcast(table, ssn, phase="minimum", calibration=spoiled)
    by = {r["target_cycle"]: r for r in changed.rows}
    assert by[target]["amplitude"] == base.rows[3]["amplitude"]  # its own row was left out
    others = [r for r in base.rows if r["target_cycle"] != target]
    assert all(by[r["target_cycle"]]["amplitude"] != r["amplitude"] for r in others)
    # labels shifted by an offset: cycle k is labelled k + 20
    shifted = CalibrationTable(tuple(str(int(c) + 20) for c in spoiled.cycle), spoiled.precursor, amp)
    assert leave_cycle_out(shifted, target, 20).n_cycles == shifted.n_cycles - 1
    h = hindcast(table, ssn, phase="minimum", calibration=shifted, cycle_offset=20)
    assert {r["target_cycle"]: r["amplitude"] for r in h.rows}[target] == pytest.approx(base.rows[3]["amplitude"])


def test_later_data_leave_earlier_hindcasts_unchanged(minimum_table):
    """Causality: with a given table, a row made as of a date does not change when later data are appended."""
    full_table, full_ssn, *_ = make_archive()
    cut_table, cut_ssn, *_ = make_archive(end=1990.0)
    full = hindcast(full_table, full_ssn, phase="minimum", calibration=minimum_table)
    cut = hindcast(cut_table, cut_ssn, phase="minimum", calibration=minimum_table)
    early = {r["target_cycle"]: r for r in full.rows if r["as_of"] < 1990.0}
    assert len(cut.rows) >= 5 and {r["target_cycle"] for r in cut.rows} <= set(early)
    for row in cut.rows:
        assert row == early[row["target_cycle"]]


def test_row_is_the_forecast_as_of_its_date(archive, matched):
    """Regression only: a hindcast row is forecast_document of the as-of state and the table less the target."""
    table, ssn, *_ = archive
    row = matched.rows[5]
    inputs = forecast_inputs(table, ssn, phase="reversal+3", as_of=row["as_of_date"])
    cal = leave_cycle_out(archive_calibration(table, ssn, phase="reversal+3").table, row["target_cycle"])
    doc = forecast_document(inputs, cal)
    assert doc["amplitude"] == row["amplitude"] and doc["interval_95"] == row["interval_95"]


def test_trajectory_of_one_target(archive):
    table, ssn, *_ = archive
    h = trajectory(table, ssn, phase="auto", start="1950-01-01", stop="1957-07-01", step_months=6)
    assert h.phase == "auto" and len(h.rows) >= 4
    assert len({r["target_cycle"] for r in h.rows}) == 1
    assert [r["as_of"] for r in h.rows] == sorted(r["as_of"] for r in h.rows)
    assert all(set(r) == set(HINDCAST_ROW_KEYS) for r in h.rows)
    phases = [r["phase"] for r in h.rows]
    assert phases[-1] == "minimum" and any(ph.startswith("reversal+") for ph in phases)  # auto moves on
    # dates of another target or with no window are left out with a reason
    assert h.skipped and all(s.startswith("as of ") for s in h.skipped)
    with pytest.raises(ValueError, match="phase: got 'auto'"):
        hindcast(table, ssn, phase="auto")


def test_skill_against_scipy_and_numpy():
    rng = np.random.default_rng(5)
    t = rng.uniform(80, 200, 9)
    f = t + rng.normal(3, 10, 9)
    rows = [{"amplitude": a, "truth_amplitude": b, "inside_68": bool(i % 2), "inside_95": True}
            for i, (a, b) in enumerate(zip(f, t))] + [{"amplitude": 1.0, "truth_amplitude": None}]
    s = skill(rows)
    assert s["n"] == 9
    assert s["r"] == pytest.approx(stats.pearsonr(f, t)[0], rel=1e-12)  # scipy (reference library)
    assert s["rmse"] == pytest.approx(np.sqrt(np.mean((f - t) ** 2)), rel=1e-12)
    assert s["bias"] == pytest.approx(np.mean(f - t), rel=1e-12)
    assert s["median_relative_error"] == pytest.approx(np.median((f - t) / t), rel=1e-12)
    assert s["coverage_68"] == pytest.approx(4 / 9) and s["coverage_95"] == 1.0
    assert skill([])["r"] is None and skill(rows[:2])["r"] is None and skill(rows[:2])["n"] == 2


def test_month_starts():
    assert month_starts("2055-01-01", "2055-04-01") == ["2055-01-01", "2055-02-01", "2055-03-01", "2055-04-01"]
    assert month_starts("2055-01-15", "2055-12-31", 5) == ["2055-02-01", "2055-07-01", "2055-12-01"]
    assert month_starts("2055-11-02", "2056-02-01", 1) == ["2055-12-01", "2056-01-01", "2056-02-01"]
    with pytest.raises(ValueError, match="step_months: got 0"):
        month_starts("2055-01-01", "2056-01-01", 0)
