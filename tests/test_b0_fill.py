"""The "fill" B0 method: hidden latitude bins filled in time; closed loops on rendered frames."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.optimize import brentq

from pipeline.aggregator import SeriesSettings, polar_series
from pipeline.b0 import _fill_bins, cap_mean_factor, fill_estimates
from pipeline.config import ConfigError
from pipeline.reversal import ReversalSettings, series_reversals
from tests._polar_frames import render_and_measure

ROTATION_YEARS = 27.2753 / 365.25  # synodic Carrington period (common practice, no source)


def test_fill_bins_interpolates_linearly_within_the_gap_limit():
    # linear interpolation between observed rows (numpy.interp as the reference), none beyond the limit
    t = np.arange(10.0)
    v = np.full((10, 2), np.nan)
    v[[0, 4], 0] = [0.0, 8.0]
    v[[0, 9], 1] = [1.0, 1.0]
    out = _fill_bins(t, v, max_gap_years=5.0)
    assert np.allclose(out[:5, 0], [0.0, 2.0, 4.0, 6.0, 8.0])
    assert np.isfinite(out[5, 0]) and not np.isfinite(out[7, 0])  # ends: constant, half the limit
    assert np.isnan(out[1:9, 1]).all()  # a gap of 9 > 5 is never bridged


def test_unknown_or_bad_settings():
    with pytest.raises(ConfigError, match="series.fill_max_gap_years"):
        SeriesSettings(fill_max_gap_years=0.0)
    with pytest.raises(ConfigError, match="series.b0_method: got 'filled'"):
        SeriesSettings(b0_method="filled")


def test_fill_needs_profiles_reaching_the_cap(tmp_path):
    from pipeline.config import MeasureSettings

    years = 2034.0 + np.arange(3) * 0.1
    recs = render_and_measure(tmp_path, years, lambda lat, y: np.full_like(lat, 1.0), size=64,
                              settings=MeasureSettings(profile_min_latitude_deg=70.0))
    with pytest.raises(ConfigError, match="profiles do not reach the cap boundary 60 deg.*profile_min_latitude_deg"):
        fill_estimates(recs, years, SeriesSettings(b0_method="fill"))
    # the other methods still work on such records
    assert np.isfinite(polar_series(recs, SeriesSettings(b0_method="visible"))["north_br_gauss"].values).all()


def test_fill_cuts_the_annual_modulation_of_a_constant_field(tmp_path):
    # Constant Br = B sin^8|lat| (Svalgaard, Duvall & Scherrer 1978 profile; n = 8 from memory) seen
    # from the Earth's true B0 through a year: the fill method must cut the annual swing of the
    # visible-part mean at least five-fold (issue 5 check) and give the whole-cap mean
    # B (1 - sin^9 60) / (9 (1 - sin 60)) (closed form, checked against quadrature in test_b0.py).
    amp = 10.0
    years = 2034.0 + np.arange(0.0, 1.5, 12.0 / 365.25)
    records = render_and_measure(tmp_path, years, lambda lat, y: amp * np.sign(lat) * np.sin(
        np.radians(np.abs(lat))) ** 8, size=112)
    vis = polar_series(records, SeriesSettings(b0_method="visible"))
    fil = polar_series(records, SeriesSettings(b0_method="fill"))
    truth = amp * cap_mean_factor(8.0, 60.0)
    for pole, sign in (("north", 1.0), ("south", -1.0)):
        v = vis[f"{pole}_br_gauss"].values
        f = fil[f"{pole}_br_gauss"].values
        assert np.isfinite(f).all()
        assert np.std(v) / np.std(f) >= 5.0
        assert np.ptp(v) / np.ptp(f) >= 5.0
        assert np.mean(f) == pytest.approx(sign * truth, rel=0.03)  # 112 px pixel sampling of the bins


def _poleward_field(amp, t_start, duration, width):
    """Br(lat, t): B sin^8|lat| sign(lat) tanh((t_rev(lat) - t)/w), reversing at 60 deg at t_start
    and at the pole ``duration`` years later (a reversal that proceeds poleward)."""
    def br(lat, year):
        a = np.abs(lat)
        t_rev = t_start + duration * np.clip((a - 60.0) / 30.0, 0.0, 1.0)
        return amp * np.sign(lat) * np.sin(np.radians(a)) ** 8 * np.tanh((t_rev - year) / width)
    return br


def _whole_cap_reversal(br, t_lo, t_hi):
    """Root of the whole-cap mean (quadrature over latitude, scipy) in time (brentq)."""
    def cap_mean(year):
        num = quad(lambda p: br(np.array([math.degrees(p)]), year)[0] * math.cos(p), math.radians(60), math.pi / 2,
                   limit=200)[0]
        return num / (1.0 - math.sin(math.radians(60)))
    return brentq(cap_mean, t_lo, t_hi, xtol=1e-6)


def test_fill_recovers_a_poleward_reversal_within_two_rotations(tmp_path):
    # Seeded closed loop (issue 5: epochs within two Carrington rotations of the truth): the field
    # reverses at 60 deg in 2034.6 and at the pole a year later; the truth epoch is where the
    # whole-cap mean changes sign (quadrature).  The visible part over-weights the low latitudes
    # that reverse first, so the plain visible mean reverses early; the fill method must not.
    br = _poleward_field(8.0, 2034.6, 1.0, 0.25)
    truth = _whole_cap_reversal(br, 2034.5, 2036.0)
    years = 2033.6 + np.arange(0.0, 3.0, 13.6 / 365.25)
    records = render_and_measure(tmp_path, years, br, size=96, noise_gauss=0.5, seed=7)
    rs = ReversalSettings(n_bootstrap=0)
    errors = {}
    for method in ("fill", "visible"):
        settings = SeriesSettings(b0_method=method)
        res = series_reversals(polar_series(records, settings), rs, settings.smoother)
        for pole in ("north", "south"):
            final = res[pole].to_dict()["final"]
            # the field B sign(lat) tanh((t_rev - t)/w) ends negative in the north, positive in the south
            assert final["sign_after"] == {"north": -1, "south": 1}[pole], (method, pole, final)
            errors[method, pole] = abs(final["time"] - truth)
    for pole in ("north", "south"):
        assert errors["fill", pole] <= 2 * ROTATION_YEARS
        assert errors["fill", pole] < errors["visible", pole]


def test_filled_diagram_is_exact_for_fields_linear_in_time():
    # Linear interpolation reproduces a field linear in time exactly (analytic): hide the highest
    # bins of each hemisphere in alternate half-years, as B0 does, and fill them back.
    import xarray as xr

    from pipeline.aggregator import band_cap_means, filled_diagram
    from pipeline.timeutil import from_decimal_year

    edges = np.arange(-90.0, 91.0, 5.0)
    centres = 0.5 * (edges[1:] + edges[:-1])
    years = 2040.0 + np.arange(40) * ROTATION_YEARS
    truth = (np.sign(centres)[:, None] * (3.0 - 1.5 * (years[None, :] - 2040.0))
             * np.sin(np.radians(np.abs(centres)))[:, None] ** 8)
    seen = truth.copy()
    half_year = np.floor((years - 2040.0) * 2).astype(int) % 2 == 0
    seen[np.ix_(centres > 75, half_year)] = np.nan
    seen[np.ix_(centres < -75, ~half_year)] = np.nan
    da = xr.DataArray(seen, dims=("latitude", "rotation"), coords={
        "latitude": centres, "latitude_lower": ("latitude", edges[:-1]), "latitude_upper": ("latitude", edges[1:]),
        "rotation": np.arange(40), "rotation_time": ("rotation", from_decimal_year(years))})
    filled = filled_diagram(da, max_gap_years=1.0)
    inner = (years > 2040.6) & (years < years[-1] - 0.6)  # the ends are held constant, not extrapolated
    assert np.allclose(filled.values[:, inner], truth[:, inner], atol=1e-12)
    means = band_cap_means(filled)
    whole = band_cap_means(da.copy(data=truth))
    assert np.allclose(means["north"][60.0].values[inner], whole["north"][60.0].values[inner], atol=1e-12)


def test_unresolved_polar_bins_are_not_used_and_give_no_band_mean():
    # a bin measured in under 15 % of the rotations (beyond the image resolution) is filled from the
    # resolved bin below it, and a band made only of such bins has no mean (regression only)
    import xarray as xr

    from pipeline.aggregator import band_cap_means, filled_diagram
    from pipeline.timeutil import from_decimal_year

    edges = np.array([-90.0, -85.0, -80.0, 80.0, 85.0, 90.0])
    years = 2040.0 + np.arange(20) * ROTATION_YEARS
    vals = np.full((5, 20), np.nan)
    vals[3] = 2.0           # 80-85 N: always seen
    vals[4, 0] = 50.0       # 85-90 N: seen once (5 %), a noisy outlier
    vals[1] = -2.0          # 80-85 S
    vals[0] = -3.0          # 85-90 S: always seen
    da = xr.DataArray(vals, dims=("latitude", "rotation"), coords={
        "latitude": 0.5 * (edges[1:] + edges[:-1]), "latitude_lower": ("latitude", edges[:-1]),
        "latitude_upper": ("latitude", edges[1:]), "rotation": np.arange(20),
        "rotation_time": ("rotation", from_decimal_year(years))})
    f = filled_diagram(da, min_abs_latitude_deg=80.0)
    assert list(f["resolved"].values) == [True, True, False, True, False]
    assert np.allclose(f.values[4], 2.0)  # extended from 80-85, the outlier dropped
    bands = band_cap_means(f, boundaries_deg=(80.0, 85.0))
    assert np.isnan(bands["north"][85.0].values).all()
    assert np.allclose(bands["south"][85.0].values, -3.0)
    assert np.allclose(bands["north"][80.0].values, 2.0)


# ---- records measured differently are refused, never homogenised -------------------------------------------
def _profile_record(name, year, cap=60.0, step=1.0, amp=5.0, profile=True):
    """A record whose profile holds exact bin means of amp sign(lat) sin^8|lat| over |lat| >= 55 deg
    (1-deg bins by default, one equatorial gap bin), area = zone area (regression only)."""
    from pipeline.b0 import bin_mean_sin_power
    from pipeline.measure import FrameRecord
    from pipeline.timeutil import from_decimal_year, iso_time

    edges = np.r_[np.arange(-90.0, -55.0 + step / 2, step), np.arange(55.0, 90.0 + step / 2, step)]
    lo, hi = edges[:-1], edges[1:]
    br, area = [], []
    for a, b in zip(lo, hi):
        if a >= 55.0 or b <= -55.0:
            lo_abs, hi_abs = (a, b) if a >= 0 else (-b, -a)
            br.append(float(np.sign(a + b) * amp * bin_mean_sin_power(lo_abs, hi_abs, 8.0)))
            area.append(float(np.sin(np.radians(hi_abs)) - np.sin(np.radians(lo_abs))) * 1e18)
        else:
            br.append(None)
            area.append(0.0)
    return FrameRecord(file=name, status="ok", time=iso_time(from_decimal_year(year)), b0_deg=0.0,
                       north_br_gauss=1.0, south_br_gauss=-1.0, north_br_error_gauss=0.1, south_br_error_gauss=0.1,
                       carrington_rotation=2380.0 + 13.4 * (year - 2034.0), cap_latitude_deg=cap,
                       profile_edges_deg=tuple(edges.tolist()) if profile else (),
                       profile_br_gauss=tuple(br) if profile else (), profile_area_m2=tuple(area) if profile else ())


def test_fill_refuses_records_with_different_cap_latitudes():
    from pipeline.b0 import MixedRecordsError

    recs = [_profile_record("a.fits", 2034.0), _profile_record("b.fits", 2034.1, cap=65.0)]
    years = np.array([2034.0, 2034.1])
    with pytest.raises(MixedRecordsError, match=r"^records: cap_latitude_deg differs within one series "
                                                r"\(60 deg in 'a.fits', 65 deg in 'b.fits'\)"):
        fill_estimates(recs, years, SeriesSettings())
    with pytest.raises(MixedRecordsError, match="cap_latitude_deg differs"):
        polar_series(recs, SeriesSettings(b0_method="visible"))  # every method: means over two caps
    # one cap for all: the whole-cap mean of the binned profile is B (1 - sin^9 L) / (9 (1 - sin L))
    # (closed form, checked against quadrature in test_b0.py)
    same = fill_estimates([_profile_record("a.fits", 2034.0), _profile_record("c.fits", 2034.1)], years,
                          SeriesSettings())
    assert [e.north_br_gauss for e in same] == pytest.approx([5.0 * cap_mean_factor(8.0, 60.0)] * 2, rel=1e-12)


def test_fill_refuses_records_with_different_profile_edges():
    from pipeline.b0 import MixedRecordsError

    recs = [_profile_record("a.fits", 2034.0), _profile_record("b.fits", 2034.1, step=5.0),
            _profile_record("c.fits", 2034.2)]
    with pytest.raises(MixedRecordsError, match=r"^records: latitude-profile bin edges differ within one series "
                                                r"\(72 edges -90\.\.90 deg in 'a.fits', 16 edges -90\.\.90 deg in "
                                                r"'b.fits'\)"):
        fill_estimates(recs, np.array([2034.0, 2034.1, 2034.2]), SeriesSettings())
    with pytest.raises(MixedRecordsError, match="bin edges differ"):
        polar_series(recs)
    # same count, one edge moved: the message names the edge
    moved = _profile_record("d.fits", 2034.1)
    edges = list(moved.profile_edges_deg)
    edges[3] += 0.5
    import dataclasses

    moved = dataclasses.replace(moved, profile_edges_deg=tuple(edges))
    with pytest.raises(MixedRecordsError, match=r"edge 3 is -87 deg in one, -86.5 deg in the other"):
        fill_estimates([recs[0], moved], np.array([2034.0, 2034.1]), SeriesSettings())


def test_fill_gives_no_value_to_a_record_without_a_profile():
    # the neighbours saw every bin; a record that measured none is not filled in from them (NaN)
    recs = [_profile_record("a.fits", 2034.0), _profile_record("b.fits", 2034.1, profile=False),
            _profile_record("c.fits", 2034.2)]
    est = fill_estimates(recs, np.array([2034.0, 2034.1, 2034.2]), SeriesSettings())
    truth = 5.0 * cap_mean_factor(8.0, 60.0)
    assert est[0].north_br_gauss == pytest.approx(truth, rel=1e-12)
    assert est[2].south_br_gauss == pytest.approx(-truth, rel=1e-12)
    assert math.isnan(est[1].north_br_gauss) and math.isnan(est[1].south_br_gauss)


def test_fill_needs_a_stated_cap_latitude():
    recs = [_profile_record("a.fits", 2034.0, cap=None), _profile_record("b.fits", 2034.1, cap=None)]
    years = np.array([2034.0, 2034.1])
    with pytest.raises(ValueError, match="none states its cap_latitude_deg.*set series.cap_latitude_deg"):
        fill_estimates(recs, years, SeriesSettings())
    est = fill_estimates(recs, years, SeriesSettings(cap_latitude_deg=70.0))
    assert est[1].north_br_gauss == pytest.approx(5.0 * cap_mean_factor(8.0, 70.0), rel=1e-12)
