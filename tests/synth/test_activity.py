"""Cycle shapes, smoothing and emergence laws."""

import numpy as np
import pytest

from pipeline.synth.activity import (HWR_C, cycle_sunspot_number, emergence_latitude_deg, hwr_parameters,
                                     hwr_shape, hwr_width_months, joy_tilt_deg, monthly_noise, smooth_13_month)


def test_hwr_shape_is_the_published_formula():
    # Hathaway, Wilson & Reichmann 1994, Solar Phys. 151, 177, eq. 1: a t^3 / (exp(t^2/b^2) - c), c = 0.71
    t = np.array([0.0, 12.0, 48.0, 100.0])
    a, b = 0.003, 45.0
    expected = a * t ** 3 / (np.exp(t ** 2 / b ** 2) - 0.71)
    assert np.allclose(hwr_shape(t, a, b), expected)
    assert HWR_C == 0.71
    assert hwr_shape(-5.0, a, b) == 0.0


def test_hwr_parameters_reproduce_the_requested_peak_and_width_relation():
    # the peak of the shape equals the requested amplitude; b follows b(a) (Hathaway 2015 relation, from memory)
    for peak in (60.0, 150.0, 250.0):
        a, b = hwr_parameters(peak)
        months = np.linspace(0, 200, 200001)
        assert hwr_shape(months, a, b).max() == pytest.approx(peak, rel=1e-6)
        assert b == pytest.approx(hwr_width_months(a), rel=1e-10)
    # Waldmeier effect: bigger cycles rise faster (common practice, no source)
    rise = [np.argmax(cycle_sunspot_number(np.linspace(0, 10, 10001), 0.0, p)) for p in (80.0, 200.0)]
    assert rise[1] < rise[0]


def test_smooth_13_month_matches_direct_sum_and_keeps_a_line():
    # R13 = (R_-6/2 + R_-5 + ... + R_5 + R_6/2) / 12 (standard smoothing; common practice, no source)
    x = np.random.default_rng(1).normal(50, 10, 40)
    s = smooth_13_month(x)
    n = 20
    direct = (0.5 * x[n - 6] + x[n - 5:n + 6].sum() + 0.5 * x[n + 6]) / 12.0
    assert s[n] == pytest.approx(direct, rel=1e-12)
    assert np.all(np.isnan(s[:6])) and np.all(np.isnan(s[-6:]))
    line = np.arange(30.0)
    assert np.allclose(smooth_13_month(line)[6:-6], line[6:-6])  # symmetric weights summing to 1


def test_emergence_latitude_and_joy_law():
    # Hathaway 2011 (Solar Phys. 273, 221) drift, from memory: 28 deg exp(-t / 90 months)
    assert emergence_latitude_deg(0.0) == pytest.approx(28.0)
    assert emergence_latitude_deg(90 / 12) == pytest.approx(28.0 / np.e)
    # Joy's law gamma = 32.1 deg sin|lat| (Stenflo & Kosovichev 2012, ApJ 745, 129; from memory)
    assert joy_tilt_deg(30.0) == pytest.approx(16.05)
    assert joy_tilt_deg(-30.0) == pytest.approx(16.05)


def test_monthly_noise_scatter_and_positivity():
    # sd = 1.5 sqrt(R) + 2 by construction, never negative (regression only)
    rng = np.random.default_rng(7)
    r = np.full(20000, 100.0)
    obs = monthly_noise(r, rng)
    assert obs.min() >= 0.0
    assert np.std(obs - r) == pytest.approx(17.0, rel=0.05)
    assert np.corrcoef(obs[1:] - 100, obs[:-1] - 100)[0, 1] == pytest.approx(0.5, abs=0.03)
