"""Tests of pipeline.smoothing (named smoothers on irregular, gappy series)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from pipeline.config import ConfigError
from pipeline.smoothing import Smoother, rotations_to_years, smooth, smoothing_matrix


def test_rotation_length_against_sunpys_carrington_ephemeris():
    # reference library: sunpy's carrington_rotation_time; over 1000 rotations (75 yr) the span agrees
    # with the mean synodic period 27.2753 d (Ulrich & Boyden 2006, Solar Physics 235, 17) to ~4e-4 d
    # per rotation (measured: 27.2750-27.2754 d from rotations 1500, 1800, 2000); astropy's year is the
    # Julian year the module uses
    import warnings

    import astropy.units as u
    from sunpy.coordinates.sun import carrington_rotation_time

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # ERFA's "dubious year" for UTC far from now
        t = carrington_rotation_time(np.array([1800.0, 2800.0]))
    assert rotations_to_years(1000.0) == pytest.approx((t[1] - t[0]).to_value(u.yr), rel=3e-5)


def test_weights_sum_to_one_and_constant_is_kept():
    rng = np.random.default_rng(0)
    t = np.sort(rng.uniform(2030, 2035, 60))
    w = smoothing_matrix(t, np.linspace(2030.5, 2034.5, 40), Smoother())
    assert np.allclose(w.sum(axis=1), 1.0)  # Nadaraya-Watson weights are normalised (Watson 1964)
    assert np.allclose(smooth(t, np.full(t.size, 3.5), t), 3.5)


def test_gaussian_transfer_of_a_sinusoid():
    # Fourier pair: a Gaussian of s.d. sigma multiplies a sinusoid of frequency f by
    # exp(-(2 pi f sigma)^2 / 2) (standard Fourier transform of a Gaussian, e.g. Bracewell 2000,
    # The Fourier Transform and its Applications, McGraw-Hill). Dense even sampling, interior only.
    t = np.arange(2000.0, 2020.0, 1.0 / 365.25)
    sm = Smoother("gaussian", 6.0, "rotations")
    sigma = sm.width_years / (2 * math.sqrt(2 * math.log(2)))
    g = np.linspace(2005.0, 2015.0, 400)
    out = smooth(t, np.sin(2 * np.pi * t), g, sm)
    expected = math.exp(-0.5 * (2 * np.pi * sigma) ** 2) * np.sin(2 * np.pi * g)
    assert np.max(np.abs(out - expected)) < 2e-3


def test_running_mean_matches_numpy_convolution():
    # running mean over N = 5 rotations on a per-rotation series = np.convolve with a 5-point boxcar
    step = rotations_to_years(1.0)
    t = 2030.0 + step * np.arange(50)
    x = np.random.default_rng(3).normal(size=50)
    out = smooth(t, x, t, Smoother("running", 5.0, "rotations"))
    ref = np.convolve(x, np.ones(5) / 5.0, mode="same")
    assert np.allclose(out[2:-2], ref[2:-2])


def test_none_is_linear_interpolation():
    t = np.array([2030.0, 2030.5, 2031.7, 2032.0])
    x = np.array([1.0, -1.0, 2.0, 0.0])
    g = np.linspace(2030.0, 2032.0, 17)
    assert np.allclose(smooth(t, x, g, Smoother("none", 1.0)), np.interp(g, t, x))


def test_gap_rule_and_nan_samples():
    t = np.concatenate([np.arange(2030.0, 2031.0, 0.05), np.arange(2034.0, 2035.0, 0.05)])
    x = np.ones(t.size)
    x[3] = np.nan
    g = np.array([2030.5, 2032.5, 2034.5])
    out = smooth(t, x, g, Smoother(max_gap_years=2.0))
    assert out[0] == pytest.approx(1.0) and out[2] == pytest.approx(1.0)
    assert np.isnan(out[1])  # 1.5 yr from any sample > max_gap/2
    assert np.isfinite(smooth(t, x, g, Smoother(max_gap_years=4.0))[1])


def test_validation_messages():
    with pytest.raises(ConfigError, match="series.smoothing: got 'boxcar'.*'gaussian'"):
        Smoother("boxcar")
    with pytest.raises(ConfigError, match="series.smoothing_width"):
        Smoother(width=0.0)
    with pytest.raises(ConfigError, match="series.smoothing_width_unit"):
        Smoother(width_unit="days")
    with pytest.raises(ValueError, match="lengths 2 and 3"):
        smooth([1.0, 2.0], [1.0, 2.0, 3.0], [1.0])
