"""The fictional magnetograph: ephemeris, geometry helpers, files that sunpy opens correctly."""

import warnings

import numpy as np
import pytest

from pipeline.synth.archive import ArchiveSettings, write_archive
from pipeline.synth.instrument import (ObservingSetup, disk_centre_pixel, earth_observers, geometry_for,
                                       instrument_noise, pole_pixels)

warnings.filterwarnings("ignore", message=".*dubious year.*")


def test_earth_observer_is_within_known_ranges():
    # B0 stays within +-7.25 deg (inclination of the solar equator to the ecliptic, Carrington 1863;
    # from memory) and the Earth-Sun distance within 0.983-1.017 au (orbital eccentricity 0.0167;
    # common practice, no source)
    times = np.arange(np.datetime64("2031-01-01"), np.datetime64("2032-01-01"), np.timedelta64(10, "D"))
    obs = earth_observers(times)
    b0 = np.array([o.b0_deg for o in obs])
    d_au = np.array([o.distance_m for o in obs]) / 1.495978707e11
    assert np.abs(b0).max() == pytest.approx(7.25, abs=0.05)
    assert d_au.min() == pytest.approx(0.9833, abs=0.001) and d_au.max() == pytest.approx(1.0167, abs=0.001)
    # B0 is near zero early in June and December and extreme early in March/September
    # (common practice, no source)
    june = obs[int(np.flatnonzero(times == np.datetime64("2031-06-10"))[0])]
    assert abs(june.b0_deg) < 0.6
    # Carrington longitude decreases by 360 deg per synodic rotation (27.2753 d; common practice)
    l0 = np.unwrap(np.deg2rad([o.crln_deg for o in obs]))
    assert np.rad2deg(np.mean(np.diff(l0))) == pytest.approx(-360 * 10 / 27.2753, rel=0.01)


def test_noise_methods_by_name():
    rng = np.random.default_rng(0)
    assert np.std(instrument_noise(100000, 2.0, rng)) == pytest.approx(2.0, rel=0.02)
    assert not instrument_noise(10, 2.0, rng, "none").any()
    with pytest.raises(ValueError, match="method: got 'pink'; valid choices are gaussian, none"):
        instrument_noise(10, 1.0, rng, "pink")


@pytest.fixture(scope="module")
def rotated_archive(tmp_path_factory):
    d = tmp_path_factory.mktemp("kvm_rot")
    s = ArchiveSettings(start="2033-03-05", end="2033-09-10", cadence_days=90, size=96, seed=1,
                        rotation_deg=17.0, offset_pixels=(3.0, -2.5))
    write_archive(d, s)
    return d, s


def test_sunpy_opens_every_file_and_finds_disk_and_poles(rotated_archive):
    # sunpy.map.Map (reference library) must place the disk centre and both poles at the pixels the
    # generator used (its own WCS + observer -> world_to_pixel), to 0.01 pixel
    import astropy.units as u
    import sunpy.map
    from astropy.coordinates import SkyCoord
    from sunpy.coordinates import HeliographicStonyhurst

    d, s = rotated_archive
    files = sorted(d.glob("*.fits"))
    assert len(files) == 3
    for path in files:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            m = sunpy.map.Map(path)
        assert m.unit.is_equivalent(u.G)
        assert m.rotation_matrix == pytest.approx(np.array([[np.cos(np.deg2rad(17)), -np.sin(np.deg2rad(17))],
                                                            [np.sin(np.deg2rad(17)), np.cos(np.deg2rad(17))]]),
                                                  abs=1e-9)
        obs = earth_observers([np.datetime64(m.date.isot)])[0]
        geom = geometry_for(ObservingSetup(size=s.size, rotation_deg=17.0, offset_pixels=(3.0, -2.5)), obs)
        centre = SkyCoord(0 * u.arcsec, 0 * u.arcsec, frame=m.coordinate_frame)
        px = m.wcs.world_to_pixel(centre)
        assert np.allclose([float(px[0]), float(px[1])], disk_centre_pixel(geom), atol=0.01)
        (nx, ny), (sx, sy) = pole_pixels(geom, obs)
        for lat, expect in ((90, (nx, ny)), (-90, (sx, sy))):
            pole = SkyCoord(0 * u.deg, lat * u.deg, obs.rsun_m * u.m, frame=HeliographicStonyhurst,
                            obstime=m.date)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                ppx = m.wcs.world_to_pixel(pole.transform_to(m.coordinate_frame))
            assert np.allclose([float(ppx[0]), float(ppx[1])], expect, atol=0.01)
        # the generator's offset: disk centre 3, -2.5 pixels from the image centre
        assert np.allclose(disk_centre_pixel(geom), (s.size / 2 - 0.5 + 3.0, s.size / 2 - 0.5 - 2.5))
        # the data: NaN off the disk, finite on it (sunpy's BLANK handling)
        data = m.data
        yy, xx = np.mgrid[0:s.size, 0:s.size]
        cx, cy = disk_centre_pixel(geom)
        r_px = np.hypot(xx - cx, yy - cy)
        radius_px = np.rad2deg(np.arcsin(obs.rsun_m / obs.distance_m)) / np.sqrt(abs(np.linalg.det(geom.cd_deg)))
        assert np.all(np.isnan(data[r_px > radius_px + 1.5]))
        assert np.all(np.isfinite(data[r_px < radius_px - 1.5]))
