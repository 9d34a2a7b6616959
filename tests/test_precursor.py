"""Tests of pipeline.precursor on PolarSeries-like Datasets built here (issue 5 builds the real ones)."""

import numpy as np
import pytest
import xarray as xr
from scipy import stats

from pipeline.precursor import (latest_precursor, precursor_after_reversal, precursor_at, precursor_at_minima,
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
