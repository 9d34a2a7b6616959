"""Tests of pipeline.aggregator: PolarSeries Dataset, latitude-time diagram and band cap means."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest

from pipeline.aggregator import (SeriesSettings, band_cap_means, latitude_time_diagram, polar_series,
                                 rotation_mid_time)
from pipeline.b0 import bin_mean_sin_power, cap_mean_factor
from pipeline.config import ConfigError, load_config
from pipeline.measure import FrameRecord
from pipeline.smoothing import smooth
from pipeline.timeutil import decimal_year

EDGES = np.concatenate([-90.0 + np.arange(41.0), 50.0 + np.arange(41.0)])  # |lat| >= 50, 1-deg bins + gap bin


def _profile(north_amp, south_amp, n=8.0, visible_north=90.0, visible_south=90.0):
    """Bins of B sin^n|lat| (exact bin means), area ~ zone area; bins above the visible limit empty."""
    lo, hi = EDGES[:-1], EDGES[1:]
    br, area = [], []
    for a, b in zip(lo, hi):
        if a >= 50.0 and b <= visible_north:
            br.append(float(north_amp * bin_mean_sin_power(a, b, n)))
            area.append(float(np.sin(np.radians(b)) - np.sin(np.radians(a))) * 1e18)
        elif b <= -50.0 and -a <= visible_south:
            br.append(float(south_amp * bin_mean_sin_power(-b, -a, n)))
            area.append(float(np.sin(np.radians(-a)) - np.sin(np.radians(-b))) * 1e18)
        else:
            br.append(None)
            area.append(0.0)
    return tuple(EDGES.tolist()), tuple(br), tuple(area)


def _rec(time, cr, north, south, b0=1.0, status="ok", profile=None, err=0.1):
    edges, br, area = profile or ((), (), ())
    return FrameRecord(file=f"f{time}", status=status, time=time, b0_deg=b0, north_br_gauss=north,
                       south_br_gauss=south, north_br_error_gauss=err, south_br_error_gauss=err,
                       north_coverage=0.5, south_coverage=0.4, carrington_rotation=cr, cap_latitude_deg=60.0,
                       profile_edges_deg=edges, profile_br_gauss=br, profile_area_m2=area)


def _records():
    return [
        _rec("2034-01-10T00:00:00.000Z", 2380.2, 4.0, -3.0),
        _rec("2034-01-20T00:00:00.000Z", 2380.6, 6.0, -5.0, err=0.5),
        _rec("2034-03-30T00:00:00.000Z", 2383.1, 2.0, None),   # rotations 2381, 2382 empty
        _rec("2034-02-01T00:00:00.000Z", 2381.0, 9.0, 9.0, status="skipped"),
        _rec("2034-03-01T00:00:00.000Z", 2382.0, 1.0, 1.0, status="ok").__class__(file="bad", status="ok"),
    ]


def test_dataset_layout_units_and_values():
    ds = polar_series(_records(), SeriesSettings(b0_method="visible"))
    assert ds.attrs["frames_used"] == 3 and ds.attrs["frames_left_out"] == 2
    assert ds.attrs["b0_method"] == "visible" and ds.attrs["smoothing"] == "gaussian"
    for name, var in ds.data_vars.items():
        assert "units" in var.attrs and "long_name" in var.attrs, name
    assert ds.sizes["time"] == 3 and list(ds["rotation"].values) == [2380, 2381, 2382, 2383]
    # dipole proxy (N - S)/2 (DESIGN.md) per frame
    assert ds["dipole_br_gauss"].values[0] == pytest.approx(3.5)
    assert np.isnan(ds["dipole_br_gauss"].values[2])
    # rotation 2380: mean of 4 and 6; error = max(std/sqrt(n), sqrt(sum e^2)/n) = max(1.0, 0.255)
    assert ds["north_br_rotation_gauss"].values[0] == pytest.approx(5.0)
    assert ds["north_br_rotation_error_gauss"].values[0] == pytest.approx(np.std([4.0, 6.0], ddof=1) / math.sqrt(2))
    assert ds["dipole_br_rotation_gauss"].values[0] == pytest.approx((5.0 + 4.0) / 2)
    assert list(ds["frames_per_rotation"].values) == [2, 0, 0, 1]
    assert np.isnan(ds["north_br_rotation_gauss"].values[1])
    assert ds["north_br_rotation_error_gauss"].values[3] == pytest.approx(0.1)  # one frame keeps its error
    assert np.isnan(ds["south_br_rotation_gauss"].values[3])
    # the smoothed series is the named smoother applied to the rotation means
    ty = decimal_year(ds["rotation_time"].values)
    ref = smooth(ty, ds["north_br_rotation_gauss"].values, ty, SeriesSettings().smoother)
    assert np.allclose(ds["north_br_smooth_gauss"].values, ref)
    assert np.allclose(ds["dipole_br_smooth_gauss"].values,
                       0.5 * (ds["north_br_smooth_gauss"].values - ds["south_br_smooth_gauss"].values))


def test_rotation_mid_time_against_sunpy():
    # sunpy's carrington_rotation_number (reference library) of the mid-time is r + 0.5
    from astropy.time import Time
    from sunpy.coordinates.sun import carrington_rotation_number

    t = rotation_mid_time([2380, 2400])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cr = carrington_rotation_number(Time([str(x) for x in t.astype("datetime64[ms]")], scale="utc"))
    assert np.allclose(cr, [2380.5, 2400.5], atol=1e-6)


def test_profile_method_gives_the_whole_cap_mean_from_a_partial_view():
    # north seen only up to 80 deg, south fully: the fit returns B f(n, 60) (Svalgaard et al. 1978)
    prof = _profile(10.0, -6.0, visible_north=80.0)
    recs = [_rec("2034-01-10T00:00:00.000Z", 2380.2, 1.0, -1.0, b0=-7.0, profile=prof)]
    ds = polar_series(recs, SeriesSettings(b0_method="profile"))
    assert ds.attrs["b0_method"] == "profile"
    assert ds["north_br_gauss"].values[0] == pytest.approx(10.0 * cap_mean_factor(8.0, 60.0), rel=1e-9)
    assert ds["south_br_gauss"].values[0] == pytest.approx(-6.0 * cap_mean_factor(8.0, 60.0), rel=1e-9)
    ds65 = polar_series(recs, SeriesSettings(b0_method="profile", cap_latitude_deg=65.0))
    assert ds65["north_br_gauss"].values[0] == pytest.approx(10.0 * cap_mean_factor(8.0, 65.0), rel=1e-9)


def test_empty_input():
    ds = polar_series([])
    assert ds.sizes["time"] == 0 and ds.sizes["rotation"] == 0


def test_latitude_time_diagram_area_weighted_and_bands():
    p1 = _profile(10.0, -10.0)
    e, br2, a2 = _profile(20.0, -20.0)
    a2 = tuple(3.0 * v for v in a2)  # the second frame measured three times the area in every bin
    recs = [_rec("2034-01-10T00:00:00.000Z", 2380.2, 1.0, -1.0, profile=p1),
            _rec("2034-01-20T00:00:00.000Z", 2380.6, 1.0, -1.0, profile=(e, br2, a2)),
            _rec("2034-03-01T00:00:00.000Z", 2382.4, 1.0, -1.0, profile=_profile(-4.0, 4.0)),
            _rec("2034-03-02T00:00:00.000Z", 2382.5, 1.0, -1.0)]  # no profile: left out
    d = latitude_time_diagram(recs)
    assert d.dims == ("latitude", "rotation") and d.attrs["units"] == "G"
    assert d.attrs["frames_left_out"] == 1
    assert list(d["rotation"].values) == [2380, 2381, 2382]
    i = int(np.argmin(np.abs(d["latitude"].values - 75.5)))
    # area-weighted: (1*10 + 3*20)/4 = 17.5 times the bin mean of sin^8
    assert d.values[i, 0] == pytest.approx(17.5 * bin_mean_sin_power(75.0, 76.0, 8.0))
    assert np.all(np.isnan(d.values[:, 1]))
    assert np.all(np.isnan(d.sel(latitude=0.0, method="nearest").values))  # equatorial gap bin
    bands = band_cap_means(d)
    for L in (55.0, 60.0, 85.0):
        # the cap mean of the binned B sin^8 profile equals B f(8, L) (zone areas, exact bin means)
        assert bands["north"][L].values[0] == pytest.approx(17.5 * cap_mean_factor(8.0, L), rel=1e-9)
        assert bands["south"][L].values[2] == pytest.approx(4.0 * cap_mean_factor(8.0, L), rel=1e-9)
        assert np.isnan(bands["north"][L].values[1])


def test_records_with_different_profile_edges_are_refused_by_the_diagram_and_profile_methods():
    import dataclasses

    from pipeline.b0 import MixedRecordsError

    a = _rec("2034-01-10T00:00:00.000Z", 2380.2, 1.0, -1.0, profile=_profile(10.0, -10.0))
    edges = np.asarray(a.profile_edges_deg)
    shifted = dataclasses.replace(a, file="b", time="2034-01-20T00:00:00.000Z", carrington_rotation=2380.6,
                                  profile_edges_deg=tuple((edges + 0.5).tolist()))
    with pytest.raises(MixedRecordsError, match=r"bin edges differ within one series \(82 edges -90\.\.90 deg in "
                                                r"'f2034-01-10T00:00:00.000Z', 82 edges -89.5\.\.90.5 deg in 'b'; "
                                                r"edge 0 is -90 deg in one, -89.5 deg in the other\)"):
        latitude_time_diagram([a, shifted])
    with pytest.raises(MixedRecordsError, match="bin edges differ"):
        polar_series([a, shifted], SeriesSettings(b0_method="profile"))
    # the visible-part means do not read the profiles: the same records make a series
    ds = polar_series([a, shifted], SeriesSettings(b0_method="visible"))
    assert ds["north_br_rotation_gauss"].values.tolist() == [1.0]
    # a record without a profile is still left out of the diagram and counted
    plain = _rec("2034-01-20T00:00:00.000Z", 2380.6, 1.0, -1.0)
    assert latitude_time_diagram([a, plain]).attrs["frames_left_out"] == 1


def test_records_with_different_cap_latitudes_are_refused():
    import dataclasses

    from pipeline.b0 import MixedRecordsError

    recs = _records()
    recs[1] = dataclasses.replace(recs[1], cap_latitude_deg=70.0)
    for method in ("visible", "season", "profile", "fill"):
        with pytest.raises(MixedRecordsError, match=r"cap_latitude_deg differs within one series "
                                                    r"\(60 deg in 'f2034-01-10T00:00:00.000Z', 70 deg in "
                                                    r"'f2034-01-20T00:00:00.000Z'\)"):
            polar_series(recs, SeriesSettings(b0_method=method))
    # a record that states no cap differs from one that states 60 deg
    recs[1] = dataclasses.replace(recs[1], cap_latitude_deg=None)
    with pytest.raises(MixedRecordsError, match=r"\(60 deg in .*, none stated in "):
        polar_series(recs, SeriesSettings(b0_method="visible"))


def test_settings_validation_and_config_section():
    with pytest.raises(ConfigError, match="series.smoothing_width: got -1"):
        SeriesSettings(smoothing_width=-1)
    with pytest.raises(ConfigError, match="series.profile_fit_exponent"):
        SeriesSettings(profile_fit_exponent="yes")
    with pytest.raises(ConfigError, match="series.season_threshold_deg"):
        SeriesSettings(season_threshold_deg=10.0)
    cfg = load_config(None, series={"b0_method": "season"})
    assert cfg.series == SeriesSettings(b0_method="season")
