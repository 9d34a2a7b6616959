"""The error of the "fill" B0 method: structure function, interpolation variance, coverage on truth."""

from __future__ import annotations

import math

import numpy as np
import pytest

from pipeline.b0 import (TimeVariogram, fill_estimates, fill_hidden_bins, fill_hidden_bins_with_error,
                         interpolation_variance, time_variogram)

ROTATION_YEARS = 27.2753 / 365.25  # synodic Carrington period (common practice, no source)


def _linear_variogram(rate):
    return TimeVariogram(rate, 0.0, np.zeros(0), np.zeros(0), 0)


def test_interpolation_variance_is_the_brownian_bridge_for_a_linear_structure_function():
    # D(h) = s^2 h (Brownian motion): variance s^2 d1 d2 / (d1 + d2) (the Brownian bridge; e.g.
    # Karatzas & Shreve 1991, sec. 5.6.B, from memory), plus the propagated noise w1^2 e1^2 + w2^2 e2^2
    vg = _linear_variogram(4.0)
    d1, d2 = np.array([0.1, 0.25, 0.4]), np.array([0.4, 0.25, 0.05])
    got = interpolation_variance(vg, d1, d2, np.zeros(3), np.zeros(3))
    assert got == pytest.approx(4.0 * d1 * d2 / (d1 + d2), rel=1e-12)
    e1, e2 = np.full(3, 0.3), np.full(3, 0.7)
    w1, w2 = d2 / (d1 + d2), d1 / (d1 + d2)
    got = interpolation_variance(vg, d1, d2, e1, e2)
    assert got == pytest.approx(4.0 * d1 * d2 / (d1 + d2) + (w1 * 0.3) ** 2 + (w2 * 0.7) ** 2, rel=1e-12)
    # one side only (beyond the end of the data): D(d) + e^2, the variance of a held value
    got = interpolation_variance(vg, np.array([0.3, np.inf]), np.array([np.inf, 0.2]), e1[:2], e2[:2])
    assert got == pytest.approx([4.0 * 0.3 + 0.09, 4.0 * 0.2 + 0.49], rel=1e-12)


def test_interpolation_variance_is_zero_for_a_field_linear_in_time():
    # D(h) = a^2 h^2 is the structure function of x = a t: linear interpolation is exact (analytic)
    # (any callable structure function is accepted)
    got = interpolation_variance(lambda h: 9.0 * np.asarray(h) ** 2, np.array([0.1, 0.3]), np.array([0.5, 0.2]),
                                 np.zeros(2), np.zeros(2))
    assert got == pytest.approx([0.0, 0.0], abs=1e-12)


def test_time_variogram_recovers_the_rate_and_the_noise_of_brownian_motion():
    # Seeded Brownian motion of rate s^2 = 4 G^2/yr (increment variance s^2 h, the definition) plus
    # white noise sd 0.5 G, 20 realisations: D_s(h) / h -> s^2 and the nugget -> 0.25 G^2 (tolerances
    # ~4 standard errors of the pooled estimates)
    rng = np.random.default_rng(11)
    t = np.arange(600) * 0.02
    rates, noise = [], []
    for _ in range(20):
        x = np.cumsum(rng.normal(0.0, math.sqrt(4.0 * 0.02), t.size)) + rng.normal(0.0, 0.5, t.size)
        vg = time_variogram(t, x, 1.0)
        rates.append(vg.rate_gauss2_per_year)
        noise.append(vg.noise_variance_gauss2)
    assert np.mean(rates) == pytest.approx(4.0, rel=0.15)
    assert np.mean(noise) == pytest.approx(0.25, rel=0.25)
    # stated errors instead of the nugget: the same rate
    x = np.cumsum(rng.normal(0.0, math.sqrt(4.0 * 0.02), t.size)) + rng.normal(0.0, 0.5, t.size)
    vg = time_variogram(t, x, 1.0, value_errors=np.full(t.size, 0.5))
    assert vg.rate_gauss2_per_year == pytest.approx(4.0, rel=0.35)


def _seasonal_series(rng, n_rows, n_bins, rate, noise):
    """Brownian bins (rate G^2/yr, correlated in latitude) seen in alternate half-years above a latitude
    that rises with the column, as B0 hides a pole's highest bins; truth and measured values."""
    t = np.arange(n_rows) * ROTATION_YEARS
    common = np.cumsum(rng.normal(0.0, math.sqrt(rate * ROTATION_YEARS), n_rows))
    own = np.cumsum(rng.normal(0.0, math.sqrt(0.3 * rate * ROTATION_YEARS), (n_rows, n_bins)), axis=0)
    truth = common[:, None] + own + np.linspace(0.0, 2.0, n_bins)[None, :]
    meas = truth + rng.normal(0.0, noise, truth.shape)
    hidden_half = (np.floor(2.0 * t) % 2 == 1)
    hide_from = n_bins // 2
    meas[np.ix_(hidden_half, np.arange(hide_from, n_bins))] = np.nan
    return t, truth, meas


def test_fill_error_covers_brownian_truth_at_the_nominal_rate():
    # Seeded synthetic truth, 60 realisations: the one-sigma errors of the time-filled bins cover the
    # true values at about 68 % and the two-sigma at about 95 % (normal quantiles; tolerance 55-85 %
    # and >= 88 %: ~3400 values, correlated within a gap, and the structure function is estimated from
    # each 3-year realisation itself; measured 63 % and 91 %), and the error grows with the gap
    rng = np.random.default_rng(5)
    z, err, gap_mid = [], [], []
    for _ in range(60):
        t, truth, meas = _seasonal_series(rng, 40, 6, rate=3.0, noise=0.4)
        v, e = fill_hidden_bins_with_error(t, meas, 1.5)
        assert np.array_equal(v, fill_hidden_bins(t, meas, 1.5), equal_nan=True)
        filled = np.isfinite(v) & ~np.isfinite(meas)
        assert (e[np.isfinite(meas)] == 0.0).all()
        with np.errstate(divide="ignore", invalid="ignore"):
            z.append(((v - truth) / e)[filled])
        err.append(e[filled])
        # distance to the nearest seen row, per filled entry
        seen_t = t[np.isfinite(meas[:, -1])]
        d = np.min(np.abs(t[:, None] - seen_t[None, :]), axis=1)
        gap_mid.append(np.broadcast_to(d[:, None], meas.shape)[filled])
    z, err, gap = np.concatenate(z), np.concatenate(err), np.concatenate(gap_mid)
    assert 0.55 <= np.mean(np.abs(z) < 1.0) <= 0.85
    assert np.mean(np.abs(z) < 2.0) >= 0.88
    near, far = gap <= np.median(gap), gap > np.median(gap)
    assert np.median(err[far]) > np.median(err[near])  # the bridge variance grows with the gap
    assert np.mean(np.abs(z[far]) < 1.0) >= np.mean(np.abs(z[near]) < 1.0) - 0.08


def test_latitude_holes_and_poleward_extension_carry_an_error():
    # one row: a latitude hole between 1 and 3 (midpoint), then two bins never seen beyond 4
    t = np.arange(6.0) * 0.1
    v = np.tile([1.0, np.nan, 3.0, 4.0, np.nan, np.nan], (6, 1))
    f, e = fill_hidden_bins_with_error(t, v, 1.5)
    assert np.allclose(f[0], [1.0, 2.0, 3.0, 4.0, 4.0, 4.0])
    # constant columns: no noise, no wander; hole: sqrt(w_l w_r) |3 - 1| = 1; pole: k (4 - 3) for k = 1, 2
    assert np.allclose(e[0], [0.0, 1.0, 0.0, 0.0, 1.0, 2.0])
    with pytest.raises(ValueError, match="value_errors: shape"):
        fill_hidden_bins_with_error(t, v, 1.5, value_errors=np.ones((2, 2)))


def _profile_records(years, visible_deg):
    """Profile records of Br = 5 sin^8|lat| (exact bin means), north bins above visible_deg[k] unseen."""
    from pipeline.b0 import bin_mean_sin_power
    from pipeline.measure import FrameRecord
    from pipeline.timeutil import from_decimal_year, iso_time

    edges = np.r_[np.arange(-90.0, -59.0, 1.0), np.arange(60.0, 91.0, 1.0)]
    recs = []
    for k, y in enumerate(years):
        br, area = [], []
        for a, b in zip(edges[:-1], edges[1:]):
            lo_abs, hi_abs = (a, b) if a >= 0 else (-b, -a)
            if a < 0 < b or (a >= 0 and b > visible_deg[k]):
                br.append(None)
                area.append(0.0)
                continue
            amp = 5.0 * (1.0 + 0.3 * (y - years[0]) ** 2)  # a curved history: the fill has a real error
            br.append(float(np.sign(a + b) * amp * bin_mean_sin_power(lo_abs, hi_abs, 8.0)))
            area.append(float(np.sin(np.radians(hi_abs)) - np.sin(np.radians(lo_abs))))
        recs.append(FrameRecord(file=f"r{k}", status="ok", time=iso_time(from_decimal_year(float(y))), b0_deg=0.0,
                                north_br_gauss=1.0, south_br_gauss=-1.0, north_br_error_gauss=0.3,
                                south_br_error_gauss=0.3, carrington_rotation=2380.0 + k, cap_latitude_deg=60.0,
                                profile_edges_deg=tuple(edges.tolist()), profile_br_gauss=tuple(br),
                                profile_area_m2=tuple(area)))
    return recs


def test_fill_estimates_and_polar_series_carry_the_fill_error():
    from pipeline.aggregator import SeriesSettings, polar_series

    years = 2034.0 + np.arange(24) * ROTATION_YEARS
    visible = np.where(np.floor(2 * (years - 2034.0)) % 2 == 1, 80.0, 90.0)  # north 80-90 hidden half the time
    recs = _profile_records(years, visible)
    est = fill_estimates(recs, years, SeriesSettings())
    hidden = visible < 90.0
    fn = np.array([e.north_fill_error_gauss for e in est])
    fs = np.array([e.south_fill_error_gauss for e in est])
    assert (fn[hidden] > 0).all() and (fn[~hidden] == 0).all() and (fs == 0).all()
    # the cap's error: sqrt(visible-part^2 + fill^2); fill = band-weighted sum of the bins' errors
    en = np.array([e.north_br_error_gauss for e in est])
    assert en == pytest.approx(np.hypot(0.3, fn), rel=1e-12)
    ds = polar_series(recs, SeriesSettings())
    for name in ("north_br_fill_error_gauss", "dipole_br_fill_error_gauss", "north_br_rotation_fill_error_gauss",
                 "south_br_rotation_fill_error_gauss", "dipole_br_rotation_fill_error_gauss"):
        assert ds[name].attrs["units"] == "G" and ds[name].attrs["long_name"]
    assert ds["north_br_fill_error_gauss"].values == pytest.approx(fn, rel=1e-6)  # times via ISO strings
    # one frame per rotation: the rotation's fill error is the frame's, and it is in the rotation error
    assert ds["north_br_rotation_fill_error_gauss"].values == pytest.approx(fn, rel=1e-6)
    assert ds["north_br_rotation_error_gauss"].values == pytest.approx(np.hypot(0.3, fn), rel=1e-6)
    assert ds["dipole_br_rotation_fill_error_gauss"].values == pytest.approx(0.5 * np.hypot(fn, fs), rel=1e-6)
    vis = polar_series(recs, SeriesSettings(b0_method="visible"))
    assert np.isnan(vis["north_br_fill_error_gauss"].values).all()
    assert np.isnan(vis["north_br_rotation_fill_error_gauss"].values).all()


def test_rotation_fill_error_is_the_mean_of_the_frames_not_reduced_by_sqrt_n():
    import dataclasses

    from pipeline.aggregator import SeriesSettings, polar_series

    years = 2034.0 + np.arange(24) * ROTATION_YEARS / 2.0
    visible = np.where(np.floor(2 * (years - 2034.0)) % 2 == 1, 80.0, 90.0)
    recs = [dataclasses.replace(r, carrington_rotation=2380.0 + 0.5 * k)
            for k, r in enumerate(_profile_records(years, visible))]
    est = fill_estimates(recs, years, SeriesSettings())
    fn = np.array([e.north_fill_error_gauss for e in est])
    ds = polar_series(recs, SeriesSettings())
    assert ds["north_br_rotation_fill_error_gauss"].values == pytest.approx(fn.reshape(-1, 2).mean(axis=1),
                                                                               rel=1e-12)


def test_filled_diagram_error_and_band_fill_errors():
    import xarray as xr

    from pipeline.aggregator import band_cap_fill_errors, band_cap_means, filled_diagram, filled_diagram_error
    from pipeline.timeutil import from_decimal_year

    rng = np.random.default_rng(2)
    edges = np.arange(-90.0, 91.0, 5.0)
    centres = 0.5 * (edges[1:] + edges[:-1])
    years = 2040.0 + np.arange(40) * ROTATION_YEARS
    truth = np.sign(centres)[:, None] * (3.0 + np.cumsum(rng.normal(0, 0.3, years.size)))[None, :] \
        * np.sin(np.radians(np.abs(centres)))[:, None] ** 8
    seen = truth + rng.normal(0.0, 0.05, truth.shape)
    half = np.floor((years - 2040.0) * 2).astype(int) % 2 == 0
    seen[np.ix_(centres > 75, half)] = np.nan
    seen[np.ix_(centres < -75, ~half)] = np.nan
    da = xr.DataArray(seen, dims=("latitude", "rotation"), coords={
        "latitude": centres, "latitude_lower": ("latitude", edges[:-1]), "latitude_upper": ("latitude", edges[1:]),
        "rotation": np.arange(40), "rotation_time": ("rotation", from_decimal_year(years))})
    f = filled_diagram(da, max_gap_years=1.0)
    fe = filled_diagram_error(da, max_gap_years=1.0)
    assert fe.attrs["units"] == "G" and fe.dims == f.dims
    assert (fe.values[np.isfinite(seen)] == 0).all()
    hid = ~np.isfinite(seen) & np.isfinite(f.values)
    assert (fe.values[hid] > 0).all()
    means, errs = band_cap_means(f), band_cap_fill_errors(fe)
    for pole in ("north", "south"):
        for L, m in means[pole].items():
            e = errs[pole][L].values
            assert np.array_equal(np.isnan(e), np.isnan(m.values)), (pole, L)
            assert errs[pole][L].attrs["units"] == "G"
    # a band above 75 deg is all filled on hidden rotations: its error is the zone-weighted mean error
    e80 = errs["north"][80.0].values
    assert (e80[half & np.isfinite(e80)] > 0).all() and (e80[~half] == 0).all()


# --- closed loop on rendered frames of the synthetic star ----------------------------------------


def test_fill_error_covers_the_synthetic_star_seen_from_the_earth(tmp_path):
    # The synthetic star's TRUE axisymmetric Br (StarHistory.profile_at; seed 1, the year before its
    # dipole reversal near 2036.0), rendered as 96-px frames from the Earth's true B0 at a 27-day cadence
    # for two years with 1 G pixel noise, measured, filled.  The filled bins' one-sigma errors must cover
    # the true bin means (area-weighted over each bin) at about 68 % (tolerance 55-85 %), the two-sigma at
    # about 95 % (>= 88 %) (normal quantiles), and bins far from any observation must be covered no worse
    # than near ones while their errors are larger (the error grows with the gap).
    from pipeline.synth.star import datetime64_to_days, star_history
    from pipeline.timeutil import from_decimal_year
    from tests._polar_frames import render_and_measure

    h = star_history(1)
    lat_cells = h.grid.latitude_deg[::-1]  # cells from the north pole southward: make latitude increase

    def br(lat, year):
        return np.interp(lat, lat_cells, h.profile_at(datetime64_to_days(from_decimal_year(year)))[::-1])

    years = 2035.0 + np.arange(27) * ROTATION_YEARS
    recs = render_and_measure(tmp_path, years, br, size=96, noise_gauss=1.0, seed=3)
    edges = np.asarray(recs[0].profile_edges_deg)
    lo, hi = edges[:-1], edges[1:]
    meas = np.array([[np.nan if v is None else v for v in r.profile_br_gauss] for r in recs])

    def bin_truth(year):  # the area-weighted bin mean of the rendered function (trapezoid, 41 points a bin)
        x = np.linspace(lo, hi, 41)
        w = np.cos(np.radians(x))
        return np.trapezoid(br(x, year) * w, x, axis=0) / np.trapezoid(w, x, axis=0)

    truth = np.array([bin_truth(y) for y in years])
    z, err, dist = [], [], []
    for idx in (np.flatnonzero(lo >= 60.0 - 1e-9), np.flatnonzero(hi <= -60.0 + 1e-9)[::-1]):
        b = meas[:, idx]
        v, e = fill_hidden_bins_with_error(years, b, 1.5)
        filled = np.isfinite(v) & ~np.isfinite(b)
        d = np.full(b.shape, np.inf)  # time to the nearest frame that saw the bin (inf: never seen)
        for c in range(b.shape[1]):
            s = np.isfinite(b[:, c])
            if s.any():
                d[:, c] = np.min(np.abs(years[:, None] - years[s][None, :]), axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            z.append(((v - truth[:, idx]) / e)[filled])
        err.append(e[filled])
        dist.append(d[filled])
    z, err, dist = np.concatenate(z), np.concatenate(err), np.concatenate(dist)
    assert z.size > 300
    cover1, cover2 = np.mean(np.abs(z) < 1.0), np.mean(np.abs(z) < 2.0)
    print(f"coverage 1 sigma {cover1:.3f}, 2 sigma {cover2:.3f}, n = {z.size}")
    assert 0.55 <= cover1 <= 0.85, cover1
    assert cover2 >= 0.88, cover2
    far = dist > np.median(dist)
    assert np.mean(np.abs(z[far]) < 1.0) >= np.mean(np.abs(z[~far]) < 1.0) - 0.05
    assert np.median(err[far]) > np.median(err[~far])
