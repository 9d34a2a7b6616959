"""pipeline.projection against sunpy's coordinate frames and analytic geometry."""

from __future__ import annotations

import types
import warnings

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits

from pipeline.projection import Window, cap_area_m2, plan_windows, surface_points, visible_area_m2
from pipeline.reader import _header_from_hdu
from pipeline.synth.instrument import ObservingSetup, frame_header, geometry_for

from tests._frames import AU_M, RSUN_M, make_observer

warnings.filterwarnings("ignore")


def _sunpy_reference(header, shape):
    """Latitude, Stonyhurst and Carrington longitude and mu of every pixel, via sunpy frames.

    Reference library: sunpy.coordinates (HeliographicStonyhurst, HeliographicCarrington);
    mu from the observer position as the cosine between the outward normal and the
    direction to the observer.
    """
    import sunpy.map
    from sunpy.coordinates import HeliographicCarrington, HeliographicStonyhurst
    from sunpy.map import all_coordinates_from_map

    m = sunpy.map.Map(np.zeros(shape, dtype=np.float32), header)
    coords = all_coordinates_from_map(m)
    # the map's coordinate frame is defined at its reference date (sunpy >= 5)
    hgs = coords.transform_to(HeliographicStonyhurst(obstime=m.reference_date))
    hgc = coords.transform_to(HeliographicCarrington(observer=m.observer_coordinate, obstime=m.reference_date))
    obs = m.observer_coordinate.transform_to(HeliographicStonyhurst(obstime=m.reference_date))
    p = hgs.cartesian.xyz.to_value(u.m)
    o = obs.cartesian.xyz.to_value(u.m)[:, None, None]
    normal = p / np.linalg.norm(p, axis=0)
    view = (o - p) / np.linalg.norm(o - p, axis=0)
    mu = (normal * view).sum(axis=0)
    return hgs.lat.deg, hgs.lon.deg, hgc.lon.deg, mu


def _ours(header, shape):
    fh = _header_from_hdu("test", types.SimpleNamespace(header=header), 0, shape)
    return surface_points(fh.geometry, fh.observer, Window(0, shape[0], 0, shape[1]))


def _dlon(a, b):
    return np.abs((a - b + 180.0) % 360.0 - 180.0)


def _compare(header, shape):
    lat, lon, carr, mu = _sunpy_reference(header, shape)
    s = _ours(header, shape)
    good = s.on_disk & np.isfinite(mu) & (mu > 0.05)
    assert good.sum() > 100
    # issue tolerance: latitude and longitude to 1e-5 deg, mu to 1e-6 on every pixel with mu > 0.05
    assert np.max(np.abs(s.latitude_deg[good] - lat[good])) <= 1e-5
    assert np.max(_dlon(s.stonyhurst_longitude_deg[good], lon[good])) <= 1e-5
    assert np.max(_dlon(s.carrington_longitude_deg[good], carr[good])) <= 1e-5
    assert np.max(np.abs(s.mu[good] - mu[good])) <= 1e-6
    # the two agree on which pixels see the disk (except pixels grazing the limb)
    sunpy_disk = np.isfinite(lat)
    assert np.count_nonzero(sunpy_disk != s.on_disk) <= 0.001 * sunpy_disk.sum()


@pytest.mark.parametrize("name", [
    "mdi.fd_M_96m_lev182.20101015_191200_TAI.data.header",  # SOHO/MDI: CRLN/CRLT_OBS, DSUN_OBS, CROTA2
    "gong_magnetogram.header",  # NSO/GONG: GONGX/GONGY axes, B0/L0 keywords, no DSUN_OBS
])
def test_geometry_matches_sunpy_real_magnetogram_headers(name):
    """Reference library: sunpy frames on headers shipped in sunpy's wheel (sunpy.data.test)."""
    from sunpy.data.test import get_test_filepath

    header = fits.Header.fromtextfile(get_test_filepath(name))
    _compare(header, (header["NAXIS2"], header["NAXIS1"]))


def test_geometry_matches_sunpy_sdo_hmi_header():
    """Reference library: sunpy frames; SDO/HMI header (CROTA2 ~ 180 deg, HGLN/HGLT via CRLN/CRLT)
    from sunpy's test data file resampled_hmi.fits (its data are continuum: geometry only)."""
    from sunpy.data.test import get_test_filepath

    header = fits.getheader(get_test_filepath("resampled_hmi.fits"))
    assert abs(header["CROTA2"] - 180.0) < 1.0
    header["BUNIT"] = "Gauss"  # geometry only: the reader would rightly refuse DN/s
    _compare(header, (header["NAXIS2"], header["NAXIS1"]))


@pytest.mark.parametrize("rotation_deg, b0_deg, hgln_deg", [(180.0, -7.2, 0.0), (23.7, 4.1, 12.5),
                                                           (-101.3, 7.25, -3.0)])
def test_geometry_matches_sunpy_synthetic_headers(rotation_deg, b0_deg, hgln_deg):
    """Reference library: sunpy frames on synthetic headers with CROTA2 = 180 and arbitrary rotations."""
    obs = make_observer(b0_deg=b0_deg, hgln_deg=hgln_deg, crln_deg=311.0)
    geom = geometry_for(ObservingSetup(size=160, rotation_deg=rotation_deg, offset_pixels=(3.2, -5.7)), obs)
    header = frame_header(geom, obs, "2033-06-01T12:00:00")
    header["NAXIS"], header["NAXIS1"], header["NAXIS2"] = 2, 160, 160
    _compare(header, (160, 160))


@pytest.mark.parametrize("distance_rsun", [AU_M / RSUN_M, 10.0, 2000.0])
def test_visible_area_is_spherical_cap(distance_rsun):
    """Analytic: the sphere seen from distance D shows the cap 2 pi R^2 (1 - R/D)
    (handbook geometry); summed pixel areas at 1024^2 agree within 0.5 %."""
    obs = make_observer(b0_deg=3.0, distance_m=distance_rsun * RSUN_M)
    geom = geometry_for(ObservingSetup(size=1024, radius_fraction=0.9, rotation_deg=33.0), obs)
    s = surface_points(geom, obs, Window(0, 1024, 0, 1024))
    expected = 2.0 * np.pi * RSUN_M ** 2 * (1.0 - 1.0 / distance_rsun)
    assert np.nansum(s.area_m2) == pytest.approx(expected, rel=5e-3)


@pytest.mark.parametrize("mu_min", [0.1, 0.3, 0.6])
def test_area_with_mu_cut_approaches_limit(mu_min):
    """Analytic: as D -> infinity the area with mu >= mu_min tends to 2 pi R^2 (1 - mu_min)
    (orthographic limit); at finite D it equals the closed form of visible_area_m2."""
    expected_limit = 2.0 * np.pi * RSUN_M ** 2 * (1.0 - mu_min)
    errors = []
    for distance_rsun in (5.0, 50.0, 5000.0):
        obs = make_observer(b0_deg=0.0, distance_m=distance_rsun * RSUN_M)
        geom = geometry_for(ObservingSetup(size=1024, radius_fraction=0.9), obs)
        s = surface_points(geom, obs, Window(0, 1024, 0, 1024))
        summed = np.nansum(s.area_m2[s.on_disk & (s.mu >= mu_min)])
        assert summed == pytest.approx(visible_area_m2(RSUN_M, distance_rsun * RSUN_M, mu_min), rel=2e-3)
        errors.append(abs(summed / expected_limit - 1.0))
    assert errors[-1] < 2e-3
    assert errors[0] > errors[-1]


def test_visible_area_closed_form_limits():
    """Analytic: visible_area_m2 with mu_min = 0 is 2 pi R^2 (1 - R/D) and tends to 2 pi R^2 (1 - m)."""
    assert visible_area_m2(1.0, 4.0) == pytest.approx(2 * np.pi * (1 - 0.25), rel=1e-12)
    assert visible_area_m2(1.0, 1e9, 0.3) == pytest.approx(2 * np.pi * 0.7, rel=1e-8)
    assert cap_area_m2(1.0, 60.0) == pytest.approx(2 * np.pi * (1 - np.sqrt(3) / 2), rel=1e-12)


def test_plan_windows_cover_every_cap_pixel():
    """Claim: the planned windows hold every on-disk pixel with |lat| >= the limit, for a rotated,
    offset image (checked against the full-image geometry)."""
    for rot, b0 in [(0.0, 7.25), (57.0, -7.25), (180.0, 0.0)]:
        obs = make_observer(b0_deg=b0)
        geom = geometry_for(ObservingSetup(size=700, rotation_deg=rot, offset_pixels=(11.0, -4.0)), obs)
        full = surface_points(geom, obs, Window(0, 700, 0, 700))
        want = full.on_disk & (np.abs(full.latitude_deg) >= 60.0)
        got = np.zeros_like(want)
        windows = plan_windows(geom, obs, 60.0)
        for w in windows:
            got[w.row0:w.row1, w.col0:w.col1] = True
        assert not (want & ~got).any()
        if rot == 0.0:
            assert got.sum() < 0.5 * got.size  # and reads much less than the image


def test_non_tan_projection_falls_back_to_wcslib():
    """Reference library: wcslib through astropy.wcs; an ARC (zenithal equidistant) image gives
    the same surface points as sunpy."""
    obs = make_observer(b0_deg=-2.0)
    geom = geometry_for(ObservingSetup(size=96), obs)
    header = frame_header(geom, obs, "2032-01-01T00:00:00")
    header["CTYPE1"], header["CTYPE2"] = "HPLN-ARC", "HPLT-ARC"
    header["NAXIS"], header["NAXIS1"], header["NAXIS2"] = 2, 96, 96
    _compare(header, (96, 96))
