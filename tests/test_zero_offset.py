"""Zero-point offset (pipeline.zero_offset) and the noise-weighted cap means (pipeline.measure).

Frames are rendered in the test (tests/_polar_frames.py: an axisymmetric field seen from the Earth, the
fictional KVM) with a known offset added to every on-disk line-of-sight pixel, so the truth is known.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest

from pipeline.config import MeasureSettings
from pipeline.measure import (FrameRecord, cap_statistics, kish_effective_number, measure_file,
                              stratified_cap_statistics)
from pipeline.synth.instrument import ObservingSetup, frame_header, geometry_for, render_los, write_magnetogram
from pipeline.timeutil import from_decimal_year, iso_time
from pipeline.zero_offset import estimate_zero_offset_gauss, toggle_records, toggle_zero_offset
from tests._polar_frames import earth_observer


def _polar_only(lat, lon):
    # 8 G sin^8|lat| with the hemispheres' signs opposite (Svalgaard, Duvall & Scherrer 1978 shape): no net
    # field at low latitudes, where the offset is estimated
    s8 = np.sin(np.radians(np.abs(lat))) ** 8
    return np.where(lat >= 0, 8.0, -8.0) * s8


def _frame(path, offset_gauss, seed, size=96, noise_gauss=2.0, year=2034.3):
    t64 = from_decimal_year(year)
    obs = earth_observer(t64)
    geom = geometry_for(ObservingSetup(size=size, radius_fraction=0.9), obs)
    img = render_los(_polar_only, geom, obs)
    on = np.isfinite(img)
    img[on] += offset_gauss + np.random.default_rng(seed).normal(0.0, noise_gauss, int(on.sum()))
    write_magnetogram(path, img, frame_header(geom, obs, iso_time(t64).rstrip("Z")), compression=None,
                      bscale=0.01)
    return path


def test_estimate_recovers_the_offset_and_its_error_covers_it(tmp_path):
    # 24 seeds, 0.5 G offset, 2 G Gaussian noise: the stated one-sigma error must hold the truth in about
    # 68 % of the frames (normal quantile, handbook; tolerance 3 binomial sd for 24 trials, 0.29); the mean
    # of the estimates within 3 standard errors of the truth
    hits, est = 0, []
    for k in range(24):
        r = measure_file(_frame(tmp_path / f"f{k}.fits", 0.5, seed=k))
        assert r.status == "ok" and r.zero_offset_pixels > 1000
        est.append(r.zero_offset_gauss)
        hits += abs(r.zero_offset_gauss - 0.5) <= r.zero_offset_error_gauss
    assert abs(hits / 24 - 0.683) <= 3 * math.sqrt(0.683 * 0.317 / 24), hits
    assert abs(np.mean(est) - 0.5) <= 3 * np.std(est) / math.sqrt(24)


def test_correction_is_exact_and_toggles_back(tmp_path):
    path = _frame(tmp_path / "f.fits", 0.5, seed=3)
    raw = measure_file(path, MeasureSettings(zero_offset="none"))
    fixed = measure_file(path, MeasureSettings(zero_offset="weak-field-mean"))
    assert raw.zero_offset_applied is False and fixed.zero_offset_applied is True
    assert raw.zero_offset_gauss == fixed.zero_offset_gauss     # estimated whatever the setting
    d = raw.zero_offset_gauss
    # linearity of a fixed-weight mean: corrected = raw - delta <1/mu> (exact up to float rounding)
    assert fixed.north_br_gauss == pytest.approx(raw.north_br_gauss - d * raw.north_inv_mu, rel=1e-12)
    assert fixed.south_br_gauss == pytest.approx(raw.south_br_gauss - d * raw.south_inv_mu, rel=1e-12)
    assert toggle_zero_offset(fixed, False).north_br_gauss == pytest.approx(raw.north_br_gauss, rel=1e-12)
    back = toggle_zero_offset(toggle_zero_offset(raw, True), False)
    assert back.zero_offset_applied is False and back.north_br_gauss == pytest.approx(raw.north_br_gauss, rel=1e-12)
    assert [v for v in back.profile_br_gauss if v is not None] == pytest.approx(
        [v for v in raw.profile_br_gauss if v is not None], rel=1e-9, abs=1e-12)
    assert toggle_zero_offset(raw, False) is raw                   # already in that state
    # <1/mu> of a cap is at least 1 and several near the limb (the bias is several times delta)
    assert 1.5 < raw.north_inv_mu < 10.0


def test_the_offset_measured_and_subtracted_in_the_data_agree(tmp_path):
    # measuring data + 0.5 G, then taking delta <1/mu> off the raw means, equals measuring the clean data
    # when delta is the true 0.5 G (a multiple of BSCALE, so the quantisation is the same): exact linearity
    with_off = measure_file(_frame(tmp_path / "a.fits", 0.5, seed=9), MeasureSettings(zero_offset="none"))
    clean = measure_file(_frame(tmp_path / "b.fits", 0.0, seed=9), MeasureSettings(zero_offset="none"))
    fixed = toggle_zero_offset(dataclasses.replace(with_off, zero_offset_gauss=0.5), True)
    assert fixed.north_br_gauss == pytest.approx(clean.north_br_gauss, abs=1e-4)
    assert fixed.south_br_gauss == pytest.approx(clean.south_br_gauss, abs=1e-4)
    # uncorrected, the same-sign offset moves both caps by about delta <1/mu> (> 0.75 G here)
    assert with_off.north_br_gauss - clean.north_br_gauss == pytest.approx(0.5 * clean.north_inv_mu, rel=1e-3)
    assert with_off.south_br_gauss - clean.south_br_gauss > 0.75


def test_bad_input_gives_no_estimate_and_old_records_load():
    assert estimate_zero_offset_gauss([], [], []) == (math.nan, math.nan, 0) or \
        math.isnan(estimate_zero_offset_gauss([], [], [])[0])
    off, err, n = estimate_zero_offset_gauss(np.full(10, np.nan), np.zeros(10), np.ones(10))
    assert math.isnan(off) and n == 0
    old = FrameRecord.from_dict({"file": "x.fits", "status": "ok", "north_br_gauss": 3.0})
    assert old.zero_offset_gauss is None and old.zero_offset_applied is None
    assert toggle_records([old], True) == [old]                    # nothing to correct with: unchanged


def test_noise_weighting_beats_area_weighting_and_stays_unbiased():
    # A cap of uniform Br = 5 G seen at mu from 0.1 to 0.6 (a polar cap near the limb), Blos noise 2 G:
    # the noise of Br = Blos/mu is 2/mu G.  Inverse-variance weights within a latitude bin lower the
    # scatter of the mean (the Gauss-Markov theorem, handbook); both estimators are unbiased.
    rng = np.random.default_rng(0)
    n = 400
    mu = rng.uniform(0.1, 0.6, n)
    area = rng.uniform(0.8, 1.2, n)
    bins = rng.integers(0, 5, n)
    wm, am = [], []
    for _ in range(300):
        br = 5.0 + rng.normal(0.0, 2.0, n) / mu
        wm.append(stratified_cap_statistics(br, area, mu, bins, 1.0).br_gauss)
        am.append(cap_statistics(br, area, 1.0).br_gauss)
    ratio = float(np.std(wm) / np.std(am))
    assert ratio < 0.8, ratio            # measured 0.56 when written
    for m in (wm, am):
        assert abs(np.mean(m) - 5.0) < 4 * np.std(m) / math.sqrt(300)
    # the stated error of the weighted mean matches its scatter (within 15 %, common practice, no source)
    br = 5.0 + rng.normal(0.0, 2.0, n) / mu
    se = stratified_cap_statistics(br, area, mu, bins, 1.0).br_error_gauss
    assert se == pytest.approx(np.std(wm), rel=0.15)


def test_kish_effective_number():
    # Kish 1965, Survey Sampling: equal weights give n; one dominant weight gives about 1
    assert kish_effective_number(np.ones(37)) == pytest.approx(37.0)
    assert kish_effective_number([1.0, 1e-9, 1e-9]) == pytest.approx(1.0, rel=1e-6)
    assert kish_effective_number([]) == 0.0
    rng = np.random.default_rng(1)
    s = stratified_cap_statistics(np.ones(50), np.ones(50), np.ones(50), rng.integers(0, 1, 50), 1.0)
    assert s.effective_pixels == pytest.approx(50.0)
