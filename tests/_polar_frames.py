"""Test helper: render and measure synthetic frames of an axisymmetric field seen from the Earth.

The observer is the Earth at each time (sunpy's ephemeris: B0, L0 and the
Earth-Sun distance), so the frames go through the true annual B0 swing.
Each frame is rendered with :func:`pipeline.synth.instrument.render_los`,
written as a FITS file and measured with :func:`pipeline.measure.measure_file`.
"""

from __future__ import annotations

import warnings

import numpy as np

from pipeline.config import MeasureSettings
from pipeline.measure import measure_file
from pipeline.projection import Observer
from pipeline.synth.instrument import ObservingSetup, frame_header, geometry_for, render_los, write_magnetogram
from pipeline.timeutil import from_decimal_year, iso_time

RSUN_M = 695.7e6  # IAU 2015 nominal solar radius (Prsa et al. 2016, AJ 152, 41)


def earth_observer(t64) -> Observer:
    from astropy.time import Time
    from sunpy.coordinates import sun

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tt = Time(str(np.datetime64(t64, "ms")), scale="utc")
        b0 = float(sun.B0(tt).deg)
        l0 = float(sun.L0(tt).deg)
        d = float(sun.earth_distance(tt).to_value("m"))
    return Observer(distance_m=d, b0_deg=b0, hgln_deg=0.0, crln_deg=l0, rsun_m=RSUN_M, source="header")


def render_frames(directory, years, br_of_lat_time, *, size=112, noise_gauss=0.0, seed=0):
    """Write frames at decimal ``years`` of ``br_of_lat_time(lat_deg, year) -> Br`` (gauss); their paths."""
    rng = np.random.default_rng(seed)
    setup = ObservingSetup(size=size, radius_fraction=0.9)
    paths = []
    for k, y in enumerate(years):
        t64 = from_decimal_year(float(y))
        obs = earth_observer(t64)
        geom = geometry_for(setup, obs)
        img = render_los(lambda lat, lon: br_of_lat_time(lat, float(y)), geom, obs)
        if noise_gauss:
            img = img + rng.normal(0.0, noise_gauss, img.shape)
        path = directory / f"kvm_{k:04d}.fits"
        write_magnetogram(path, img, frame_header(geom, obs, iso_time(t64).rstrip("Z")), compression=None,
                          bscale=0.01)
        paths.append(path)
    return paths


def render_and_measure(tmp_path, years, br_of_lat_time, *, size=112, noise_gauss=0.0, seed=0,
                       settings: MeasureSettings | None = None):
    """:func:`render_frames`, then :func:`pipeline.measure.measure_file` of each; the records."""
    paths = render_frames(tmp_path, years, br_of_lat_time, size=size, noise_gauss=noise_gauss, seed=seed)
    return [measure_file(p, settings) for p in paths]


def reversing_sin8_field(t_north: float, t_south: float, tau_years: float, amplitude_gauss: float = 10.0):
    """``Br(lat, year) = B(t) sin^8|lat|`` per hemisphere (Svalgaard, Duvall & Scherrer 1978 profile), B
    reversing as ``tanh((year - t_pole) / tau)``: north from - to +, south from + to -."""
    def field(lat, year):
        s8 = np.sin(np.radians(np.abs(lat))) ** 8
        north = amplitude_gauss * np.tanh((year - t_north) / tau_years)
        south = -amplitude_gauss * np.tanh((year - t_south) / tau_years)
        return np.where(lat >= 0, north, south) * s8
    return field
