"""Tests of pipeline.precursor on PolarSeries-like Datasets built here (issue 5 builds the real ones)."""

import numpy as np
import pytest
import xarray as xr
from scipy import stats

from pipeline.config import ConfigError
from pipeline.precursor import (check_lags_years, check_phase_request, choose_phase, latest_precursor, phase_lag_years,
                                precursor_after_reversal, precursor_at, precursor_at_minima, precursor_at_phase,
                                rotation_magnitude)
from pipeline.timeutil import decimal_year, from_decimal_year

# Carrington synodic rotation period 27.2753 d (common practice, no source), in Julian years
ROTATION_YEARS = 27.2753 / 365.25


def _series(t0=2030.0, t1=2042.0, amplitude_gauss=6.0, reversal=2033.0, noise_gauss=0.3, seed=0,
            errors=True):
    """Tessaly's polar fields per rotation: dipole B cos(2 pi (t - reversal)/22 - pi/2) + noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(t0, t1, ROTATION_YEARS)
    dipole_true = amplitude_gauss * np.sin(2 * np.pi * (t - reversal) / 22.0)
    north = dipole_true * 1.1 + rng.normal(0, noise_gauss, t.size)
    south = -dipole_true * 0.9 + rng.normal(0, noise_gauss, t.size)
    ds = xr.Dataset(
        {"north_br_rotation_gauss": ("rotation", north, {"units": "G", "long_name": "north"}),
         "south_br_rotation_gauss": ("rotation", south, {"units": "G", "long_name": "south"}),
         "dipole_br_rotation_gauss": ("rotation", (north - south) / 2, {"units": "G", "long_name": "dipole"})},
        coords={"rotation": np.arange(2300, 2300 + t.size),
                "rotation_time": ("rotation", from_decimal_year(t))})
    if errors:
        err = np.full(t.size, noise_gauss)
        ds["north_br_rotation_error_gauss"] = ("rotation", err)
        ds["south_br_rotation_error_gauss"] = ("rotation", err)
        ds["dipole_br_rotation_error_gauss"] = ("rotation", err / np.sqrt(2))
    return ds


def test_window_mean_and_standard_errors_by_direct_computation():
    ds = _series()
    t = decimal_year(ds["rotation_time"].values)
    item = precursor_at(ds, 2038.0, window_years=0.5)
    sel = np.abs(t - 2038.0) <= 0.5
    v = np.abs(ds["dipole_br_rotation_gauss"].values[sel])
    assert item["n_rotations"] == sel.sum() in (13, 14)  # 1 yr / 27.2753 d = 13.4 rotations
    assert item["precursor_gauss"] == pytest.approx(v.mean(), rel=1e-12)
    # reference library: scipy.stats.sem (s / sqrt(n), ddof=1)
    assert item["scatter_error_gauss"] == pytest.approx(stats.sem(v), rel=1e-12)
    # independent errors: sqrt(sum sigma^2)/n = sigma/sqrt(n) (handbook formula)
    assert item["measurement_error_gauss"] == pytest.approx(0.3 / np.sqrt(2) / np.sqrt(sel.sum()), rel=1e-12)
    assert item["precursor_error_gauss"] == max(item["scatter_error_gauss"], item["measurement_error_gauss"])
    assert item["n_rotations_without_error"] == 0


def test_known_answer_on_synthetic_series():
    # seeded synthetic series with a known dipole: near the minimum (phase pi/2 after the reversal)
    # the window mean of |B| is the analytic mean of the true curve (regression only, known answer)
    minimum = 2033.0 + 22.0 / 4
    ds = _series(noise_gauss=0.3, seed=4)
    item = precursor_at(ds, minimum, window_years=0.5)
    tt = np.linspace(minimum - 0.5, minimum + 0.5, 20001)
    truth = np.mean(np.abs(6.0 * np.sin(2 * np.pi * (tt - 2033.0) / 22.0)))  # dipole = 6 sin(...) (1.1+0.9)/2
    assert abs(item["precursor_gauss"] - truth) < 4 * item["precursor_error_gauss"] + 0.01
    hemi = precursor_at(ds, minimum, kind="hemispheres")
    # (|N| + |S|)/2 with N = 1.1 B, S = -0.9 B gives |B| again on average
    assert abs(hemi["precursor_gauss"] - truth) < 4 * hemi["precursor_error_gauss"] + 0.01
    # hemispheres error: sqrt(sigma_N^2 + sigma_S^2)/2 per rotation
    assert hemi["measurement_error_gauss"] == pytest.approx(0.5 * np.hypot(0.3, 0.3) / np.sqrt(hemi["n_rotations"]))


def test_minima_outside_the_series_get_a_reason():
    ds = _series(t0=2030.0, t1=2036.0)
    items = precursor_at_minima(ds, [2031.0, 2045.0])
    assert items[0]["reason"] is None and items[0]["precursor_gauss"] > 0
    assert items[1]["precursor_gauss"] is None and "does not cover" in items[1]["reason"]
    assert [i["minimum_time"] for i in items] == [2031.0, 2045.0]


def test_after_reversal_and_latest_window():
    ds = _series(t0=2030.0, t1=2036.0)
    early = precursor_after_reversal(ds, 2033.0, 2.0)
    assert early["lag_years"] == 2.0 and early["time"] == pytest.approx(2035.0)
    # Kumar et al. (2021, arXiv:2101.05013): usable only from about 4 yr after the reversal; a lag
    # just short of it carries the caution, a lag of 4 yr or more none
    for lag, cautioned in ((2.0, True), (3.9, True), (4.0, False), (4.5, False)):
        notes = precursor_after_reversal(ds, 2031.0, lag)["notes"]
        if cautioned:
            assert len(notes) == 1 and f"taken {lag:.2f} yr after the final reversal" in notes[0]
            assert "only from about 4 yr after it (Kumar et al. 2021)" in notes[0]
        else:
            assert notes == [], lag
    newest = latest_precursor(ds, 2033.0)
    t = decimal_year(ds["rotation_time"].values)
    assert newest["newest_time"] == pytest.approx(t.max())
    assert newest["lag_years"] == pytest.approx(t.max() - 0.5 - 2033.0)
    assert len(newest["notes"]) == 1  # a lag of 2.4 yr: cautioned
    assert newest["precursor_gauss"] == pytest.approx(precursor_at(ds, t.max() - 0.5)["precursor_gauss"])


def test_missing_values_and_errors_are_optional():
    ds = _series(errors=False)
    ds["dipole_br_rotation_gauss"][5:9] = np.nan
    t, v, e = rotation_magnitude(ds)
    assert e is None and np.isnan(v[5:9]).all()
    item = precursor_at(ds, float(t[7]), window_years=0.2)
    assert item["measurement_error_gauss"] is None and item["precursor_error_gauss"] == item["scatter_error_gauss"]
    assert item["n_rotations_without_error"] == item["n_rotations"] > 0


def test_one_missing_error_keeps_the_measurement_term_of_the_window():
    # one rotation of the window has a value but no error: the propagated term comes from the others,
    # sqrt(sum sigma_i^2)/m over the m rotations with an error (error of a mean of independent values,
    # handbook formula), and the result says how many rotations lacked one
    ds = _series(noise_gauss=0.3, seed=2)
    t = decimal_year(ds["rotation_time"].values)
    err = ds["dipole_br_rotation_error_gauss"].values.copy()
    err *= np.linspace(1.0, 3.0, err.size)  # unequal errors, so the formula is exercised
    sel = np.flatnonzero(np.abs(t - 2038.0) <= 0.5)
    err[sel[3]] = np.nan
    ds["dipole_br_rotation_error_gauss"] = ("rotation", err)
    item = precursor_at(ds, 2038.0)
    known = np.delete(err[sel], 3)
    assert item["n_rotations"] == sel.size and item["n_rotations_without_error"] == 1
    assert item["measurement_error_gauss"] == pytest.approx(np.sqrt(np.sum(known ** 2)) / known.size, rel=1e-12)
    # the rotation still counts in the mean and the scatter
    v = np.abs(ds["dipole_br_rotation_gauss"].values[sel])
    assert item["precursor_gauss"] == pytest.approx(v.mean(), rel=1e-12)
    assert item["scatter_error_gauss"] == pytest.approx(stats.sem(v), rel=1e-12)  # scipy reference
    # never smaller than the all-rotation value with a typical (RMS) error for the missing one
    rms = np.sqrt(np.mean(known ** 2))
    assert item["measurement_error_gauss"] >= np.sqrt(np.sum(known ** 2) + rms ** 2) / sel.size
    # the minima route reports the same count
    assert precursor_at_minima(ds, [2038.0])[0]["n_rotations_without_error"] == 1


def test_error_paths():
    ds = _series()
    with pytest.raises(ValueError, match="kind: got 'quadrupole'; valid kinds are dipole, hemispheres"):
        precursor_at(ds, 2035.0, kind="quadrupole")
    with pytest.raises(ValueError, match="window_years: got -1"):
        precursor_at(ds, 2035.0, window_years=-1)
    with pytest.raises(ValueError, match="lag_years: got -2"):
        precursor_after_reversal(ds, 2033.0, -2)
    with pytest.raises(ValueError, match="does not cover this time"):
        precursor_at(ds, 2050.0)
    with pytest.raises(ValueError, match="series: missing north_br_rotation_gauss"):
        precursor_at(ds.drop_vars("north_br_rotation_gauss"), 2035.0, kind="hemispheres")
    empty = ds.copy()
    empty["dipole_br_rotation_gauss"][:] = np.nan
    with pytest.raises(ValueError, match="no rotation with a measured value"):
        latest_precursor(empty, 2033.0)


# ---- phase choice (issue 10's rule for "auto"; the rule itself has no outside source: regression only) -----

LAGS = (2.0, 3.0, 4.0, 5.0, 6.0)


@pytest.mark.parametrize("minimum, end, phase, lag", [
    ((2038.5, "confirmed"), 2040.0, "minimum", None),      # known minimum after the reversal, window complete
    ((2038.5, "pinned"), 2039.0, "minimum", None),         # pinned counts as known; window ends exactly at the data
    ((2038.5, "pending"), 2040.0, "reversal+6", 6.0),      # a pending candidate is not known: largest complete lag
    ((2038.5, "confirmed"), 2038.8, "reversal+5", 5.0),    # known, but its window is open: 2033 + 5.5 <= 2038.8
    ((2031.0, "confirmed"), 2037.0, "reversal+3", 3.0),    # the minimum precedes the reversal: not the one after it
    ((None, "unresolved"), 2035.5, "reversal+2", 2.0),     # 2033 + 2 + 0.5 = 2035.5 <= 2035.5: complete
])
def test_auto_phase_rule(minimum, end, phase, lag):
    choice = choose_phase(2033.0, minimum, end, LAGS, 0.5)
    assert (choice.phase, choice.lag_years, choice.reason) == (phase, lag, None)
    assert choice.center_time == (minimum[0] if phase == "minimum" else 2033.0 + lag)
    if minimum[1] == "pending":
        assert "is pending, not yet known (confirmed or pinned)" in choice.notes[0]
    if minimum == (2038.5, "confirmed") and end == 2038.8:
        assert "its window of +-0.5 yr is not complete yet" in choice.notes[0]


def test_auto_phase_without_a_window():
    early = choose_phase(2033.0, (2038.5, "pending"), 2035.4, LAGS, 0.5)
    assert early.phase is None and early.reason.startswith("no configured lag after the final dipole reversal at "
                                                           "2033.000 has a complete window yet")
    assert "reversal+2 needs data to 2035.500" in early.reason
    assert "no dipole reversal in the polar series" in choose_phase(None, (None, "unresolved"), 2040.0).reason
    # no reversal in the series (it starts after it), but a confirmed minimum with a complete window
    only_min = choose_phase(None, {"time": 2038.5, "status": "confirmed"}, 2040.0)
    assert only_min.phase == "minimum" and "no dipole reversal" in only_min.notes[0]
    assert "no measured rotation" in choose_phase(2033.0, None, None).reason


def test_explicit_phases():
    # an explicit minimum takes the current minimum whatever its status, and says when it is pending
    pend = choose_phase(2033.0, (2038.5, "pending"), 2040.0, requested="minimum")
    assert pend.phase == "minimum" and "is pending: it may move" in pend.notes[0]
    assert "no cycle minimum is known" in choose_phase(2033.0, (None, "unresolved"), 2040.0,
                                                        requested="minimum").reason
    assert "is not complete" in choose_phase(2033.0, (2038.5, "confirmed"), 2038.9, requested="minimum").reason
    # an explicit reversal+L need not be one of the configured lags; its window must be complete
    odd = choose_phase(2033.0, None, 2040.0, LAGS, 0.5, requested="Reversal+4.50")
    assert (odd.phase, odd.lag_years, odd.center_time) == ("reversal+4.5", 4.5, 2037.5)
    late = choose_phase(2033.0, None, 2037.9, LAGS, 0.5, requested="reversal+4.5")
    assert late.phase is None and "needs data to 2038.000" in late.reason
    assert "needs the final reversal" in choose_phase(None, None, 2040.0, requested="reversal+4").reason


def test_phase_validation():
    assert check_phase_request("forecast.phase", " AUTO ") == "auto"
    assert check_phase_request("forecast.phase", "reversal+4.0") == "reversal+4"
    with pytest.raises(ConfigError, match=r"--phase: got 'reversal-4'; valid phases are 'auto', 'minimum'"):
        check_phase_request("--phase", "reversal-4")
    assert check_lags_years("k", [6, 2, 2.5, 2]) == (2.0, 2.5, 6.0)
    for bad in ([], "2,3", [2, True], [2, -1], [2, float("nan")]):
        with pytest.raises(ConfigError, match="k: got"):
            check_lags_years("k", bad)
    assert phase_lag_years("minimum") is None and phase_lag_years("reversal+2.5") == 2.5


def test_precursor_at_phase_is_the_window_mean_there():
    ds = _series(t0=2030.0, t1=2042.0, seed=6)
    at_min = precursor_at_phase(ds, choose_phase(2033.0, (2038.5, "confirmed"), 2041.0), 2033.0)
    assert at_min["precursor_gauss"] == precursor_at(ds, 2038.5)["precursor_gauss"]
    assert (at_min["phase"], at_min["route"], at_min["lag_years"], at_min["notes"]) == ("minimum", "minimum", None, [])
    lagged = precursor_at_phase(ds, choose_phase(2033.0, (2038.5, "pending"), 2041.0), 2033.0)
    assert lagged["phase"] == "reversal+6" and lagged["route"] == "after_reversal"
    assert lagged["precursor_gauss"] == precursor_after_reversal(ds, 2033.0, 6.0)["precursor_gauss"]
    # closed-loop truth of the seeded series: the window mean of |6 sin(2 pi (t - 2033)/22)| at 2039
    tt = np.linspace(2038.5, 2039.5, 20001)
    truth = np.mean(np.abs(6.0 * np.sin(2 * np.pi * (tt - 2033.0) / 22.0)))
    assert abs(lagged["precursor_gauss"] - truth) < 4 * lagged["precursor_error_gauss"] + 0.01
    # a lag under about 4 yr carries the Kumar et al. (2021) caution
    early = precursor_at_phase(ds, choose_phase(2033.0, None, 2041.0, requested="reversal+2"), 2033.0)
    assert "Kumar et al. 2021" in early["notes"][0]
    with pytest.raises(ValueError, match="no configured lag"):
        precursor_at_phase(ds, choose_phase(2033.0, None, 2034.0), 2033.0)
