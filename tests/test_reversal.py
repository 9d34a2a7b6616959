"""Tests of pipeline.reversal on seeded synthetic series with known answers."""

from __future__ import annotations

import math

import numpy as np
import pytest

from pipeline.config import ConfigError
from pipeline.reversal import (Crossing, ReversalSettings, find_reversals, persistent_crossings,
                               polar_reversals)
from pipeline.smoothing import Smoother, rotations_to_years

ROT_YR = rotations_to_years(1.0)  # one Carrington rotation in years (27.2753 d)
T = np.arange(2031.0, 2039.0, ROT_YR)  # one sample per rotation, 8 years


def _tanh_series(t, t0, amp=5.0, tau=1.0, noise=1.0, seed=0):
    rng = np.random.default_rng(seed)
    return amp * np.tanh((t - t0) / tau) + rng.normal(0.0, noise, t.size)


def test_single_reversal_with_noise():
    # known answer: the seeded truth crosses zero at 2034.3 (regression-free: the truth is the input)
    x = _tanh_series(T, 2034.3, seed=11)
    r = find_reversals(T, x)
    assert len(r.crossings) == 1
    c = r.crossings[0]
    assert c.sign_after == 1
    assert abs(c.time - 2034.3) < 2 * ROT_YR
    assert c.low <= 2034.3 <= c.high
    assert r.final == c
    assert c.low < c.time < c.high


def test_triple_reversal_all_found_last_final():
    # crossings 1.0 and 1.2 yr apart (>= 0.8 yr, the check); truth = the seeded epochs
    truth = [2033.0, 2034.0, 2035.2]
    sign = np.ones_like(T)
    for c in truth:
        sign = np.where(T > c, -sign, sign)
    rng = np.random.default_rng(5)
    x = 4.0 * sign + rng.normal(0.0, 1.0, T.size)
    r = find_reversals(T, x)
    assert [c.sign_after for c in r.crossings] == [-1, 1, -1]
    for c, tt in zip(r.crossings, truth):
        assert abs(c.time - tt) < 2 * ROT_YR
    assert r.final is r.crossings[-1]
    assert r.final.time == pytest.approx(r.crossings[2].time)


def test_triple_reversal_at_the_minimum_spacing():
    # steps 0.8 yr apart exactly (the minimum spacing); known answer = seeded epochs
    truth = [2033.5, 2034.3, 2035.1]
    sign = np.ones_like(T)
    for c in truth:
        sign = np.where(T > c, -sign, sign)
    rng = np.random.default_rng(8)
    x = 3.0 * sign + rng.normal(0.0, 0.8, T.size)
    r = find_reversals(T, x)
    assert len(r.crossings) == 3
    assert all(abs(c.time - tt) < 2 * ROT_YR for c, tt in zip(r.crossings, truth))


def test_data_gap_across_the_crossing():
    # 0.7 yr without data around the true crossing 2034.3 (known answer); the interval must span the gap
    keep = (T < 2033.95) | (T > 2034.65)
    t = T[keep]
    x = _tanh_series(T, 2034.3, seed=3)[keep]
    r = find_reversals(t, x)
    assert len(r.crossings) == 1
    c = r.crossings[0]
    gap_lo, gap_hi = t[t < 2034.3].max(), t[t > 2034.3].min()
    assert gap_lo <= c.time <= gap_hi
    assert c.low <= gap_lo + 1e-9 and c.high >= gap_hi - 1e-9
    assert c.low <= 2034.3 <= c.high


def test_annual_ripple_creates_no_crossing():
    # constant positive field + a 1-yr ripple larger than the mean (raw data change sign twice a
    # year for ~3 months each); the persistent rule and smoothing must report nothing.
    # Gaussian transfer exp(-(2 pi f sigma)^2 / 2) of the default FWHM 6 rotations at 1/yr is 0.49
    # (Fourier transform of a Gaussian), so the smoothed ripple (1.5 G) stays below the 2 G mean.
    rng = np.random.default_rng(2)
    x = 2.0 + 3.0 * np.sin(2 * np.pi * T) + rng.normal(0.0, 0.5, T.size)
    assert np.any(x < 0)
    assert find_reversals(T, x).crossings == ()


def test_annual_ripple_on_a_slow_reversal_gives_one_crossing():
    # slow reversal (tau 2 yr) plus a 1-yr ripple; raw smoothed series may wiggle around zero
    rng = np.random.default_rng(4)
    x = 5.0 * np.tanh((T - 2035.0) / 2.0) + 1.5 * np.sin(2 * np.pi * T) + rng.normal(0.0, 0.5, T.size)
    r = find_reversals(T, x)
    assert len(r.crossings) == 1
    # the ripple can move the zero of the sum by up to amp_ripple_smoothed / slope = 0.73 / 2.5 yr
    assert abs(r.crossings[0].time - 2035.0) < 0.35


def test_six_month_episode_is_resolved():
    # a polarity episode lasting 0.5 yr must be kept by the defaults (issue 5 requirement)
    x = np.where((T > 2034.0) & (T < 2034.5), 3.0, -3.0) + np.random.default_rng(9).normal(0, 0.7, T.size)
    r = find_reversals(T, x)
    assert [c.sign_after for c in r.crossings] == [1, -1]
    assert abs(r.crossings[0].time - 2034.0) < 2 * ROT_YR
    assert abs(r.crossings[1].time - 2034.5) < 2 * ROT_YR
    assert r.final.sign_after == -1


def test_two_month_excursion_is_not_a_reversal():
    # 2 rotations of opposite sign are not persistent (shorter than the 0.4 yr rule)
    x = np.where((T > 2034.0) & (T < 2034.0 + 2 * ROT_YR), 4.0, -3.0)
    assert find_reversals(T, x).crossings == ()


def test_persistent_crossings_median_of_cluster():
    # hand-built grid: + for 1 yr, three crossings 0.1 yr apart, then - for 1 yr -> median crossing
    g = np.linspace(0.0, 2.3, 2301)
    v = np.where(g < 1.0, 1.0, np.where(g < 1.1, -1.0, np.where(g < 1.2, 1.0, -1.0)))
    out = persistent_crossings(g, v, 0.4)
    assert len(out) == 1 and out[0][1] == -1
    assert out[0][0] == pytest.approx(1.1, abs=2e-3)


def test_bootstrap_interval_coverage():
    # 200 seeded trials of the single reversal; the nominal 90 % interval must hold the truth in a
    # fraction within 3 binomial standard deviations of 0.9 (sd = sqrt(0.9*0.1/200) = 0.021)
    # (Efron & Tibshirani 1993, ch. 9: residual bootstrap; binomial tolerance, common practice).
    settings = ReversalSettings(n_bootstrap=150)
    hits = 0
    trials = 200
    for k in range(trials):
        x = _tanh_series(T, 2034.3, noise=1.5, seed=1000 + k)
        r = find_reversals(T, x, settings)
        if len(r.crossings) == 1:
            c = r.crossings[0]
            hits += c.low <= 2034.3 <= c.high
    coverage = hits / trials
    assert abs(coverage - 0.9) <= 3 * math.sqrt(0.9 * 0.1 / trials), coverage


def test_json_shape_and_irregular_iso_times():
    rng = np.random.default_rng(1)
    t = np.sort(rng.uniform(2031.0, 2037.0, 120))
    x = -5.0 * np.tanh((t - 2034.0) / 0.8) + rng.normal(0, 1.0, t.size)
    from pipeline.timeutil import from_decimal_year

    r_iso = find_reversals(from_decimal_year(t), x)
    r_dec = find_reversals(t, x)
    d = r_dec.to_dict()
    assert set(d) == {"crossings", "final", "level", "bootstrap_block_rotations", "members_skipped"}
    assert set(d["crossings"][0]) == {"time", "low", "high", "level", "time_iso", "sign_after", "resolved", "reason",
                                      "support", "noise_interval", "systematic_interval", "ensemble"}
    c = d["crossings"][0]
    assert c["level"] == 0.9 and c["noise_interval"]["level"] == 0.9 and c["systematic_interval"]["level"] == 0.9
    assert c["resolved"] is True and c["reason"] is None and 0.5 < c["support"] <= 1.0
    assert set(c["ensemble"]) == {"smoothing_width_x0.5", "smoothing_width_x2"}
    assert c["low"] <= c["noise_interval"]["low"] and c["high"] >= c["noise_interval"]["high"]
    assert c["low"] <= c["systematic_interval"]["low"] <= c["time"] <= c["systematic_interval"]["high"] <= c["high"]
    assert d["bootstrap_block_rotations"] >= 13.0
    assert d["crossings"][0]["sign_after"] == -1
    assert d["final"] == d["crossings"][-1]
    assert r_iso.to_dict() == d  # datetime64 input gives the same answer
    assert d["crossings"][0]["time_iso"].startswith("2034-") or d["crossings"][0]["time_iso"].startswith("2033-12")


def test_polar_reversals_dipole_and_no_crossing():
    north = 5.0 * np.tanh((T - 2034.0) / 1.0)
    south = -5.0 * np.tanh((T - 2034.6) / 1.0)
    out = polar_reversals(T, north, south, ReversalSettings(n_bootstrap=0))
    assert abs(out["north"].final.time - 2034.0) < 0.05
    assert abs(out["south"].final.time - 2034.6) < 0.05
    # dipole (N - S)/2 = 2.5 [tanh(a) + tanh(b)] crosses zero midway by symmetry: 2034.3
    assert abs(out["dipole"].final.time - 2034.3) < 0.05
    flat = find_reversals(T, np.full(T.size, 3.0))
    d = flat.to_dict()
    assert flat.final is None and d["crossings"] == [] and d["final"] is None and d["level"] == 0.9


def test_too_few_points_and_mismatch():
    assert find_reversals([2030.0, 2031.0], [1.0, -1.0]).crossings == ()
    with pytest.raises(ValueError, match="lengths 3 and 2"):
        find_reversals([1.0, 2.0, 3.0], [1.0, 2.0])


def test_settings_validation():
    with pytest.raises(ConfigError, match="reversals.confidence"):
        ReversalSettings(confidence=1.5)
    with pytest.raises(ConfigError, match="reversals.n_bootstrap"):
        ReversalSettings(n_bootstrap=-1)
    with pytest.raises(ConfigError, match="series.smoothing"):
        Smoother(method="spline")


def test_crossing_iso_date():
    # 2034.5 is 2034-07-02T12:00 (timeutil's definition; 365-day year)
    assert Crossing(2034.5, 2034.4, 2034.6, 1).time_iso == "2034-07-02"


def test_synthetic_star_reversals_near_cycle_maximum():
    # Fact of the trade (common practice, no source): polar reversals happen near cycle maximum and
    # the two poles usually reverse months to about a year apart.  Checked on the true whole-cap
    # means of the synthetic star Tessaly (pipeline.synth.star), sampled once per rotation.
    star = pytest.importorskip("pipeline.synth.star")
    from pipeline.synth.truth import cycle_landmarks_truth
    from pipeline.timeutil import decimal_year

    h = star.star_history(1)
    ty = np.atleast_1d(decimal_year(h.times))
    step = max(1, int(round(27.2753 / float(np.median(np.diff(h.time_days))))))
    sel = slice(None, None, step)
    t, north, south = ty[sel], np.asarray(h.north_gauss)[sel], np.asarray(h.south_gauss)[sel]
    keep = t >= t[-1] - 150.0
    out = polar_reversals(t[keep], north[keep], south[keep], ReversalSettings(n_bootstrap=0))
    maxima = [c["maximum_time"] for c in cycle_landmarks_truth(h)
              if t[keep][0] + 3 < c["maximum_time"] < t[-1] - 3]
    assert len(maxima) >= 10
    lags, gaps = [], []
    for m in maxima:
        nt = [c.time for c in out["north"].crossings if abs(c.time - m) < 3.0]
        st = [c.time for c in out["south"].crossings if abs(c.time - m) < 3.0]
        assert len(nt) == 1 and len(st) == 1, (m, nt, st)  # one reversal per pole per cycle
        lags += [nt[0] - m, st[0] - m]
        gaps.append(abs(nt[0] - st[0]))
    assert np.median(np.abs(lags)) < 1.5  # near maximum (years)
    assert np.median(gaps) < 1.5 and max(gaps) < 3.0  # months to about a year apart
