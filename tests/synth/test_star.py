"""The synthetic star behaves like a Sun-like star (facts of the trade as sanity checks)."""

import numpy as np
import pytest

from pipeline.synth.star import StarParameters, cap_mean_gauss, star_history
from pipeline.synth.truth import calibration_rows, cycle_landmarks_truth, pearson_r, sign_changes_yr

SEEDS = (1, 2)


@pytest.fixture(scope="module", params=SEEDS)
def history(request):
    return star_history(request.param)


def test_cycles_last_about_eleven_years(history):
    # common practice, no source: solar cycles last about 11 years on average, 9 to 14 years each
    lms = cycle_landmarks_truth(history)
    lengths = np.diff([lm["minimum_time"] for lm in lms])
    assert 10.0 <= lengths.mean() <= 12.0
    assert lengths.min() >= 8.5 and lengths.max() <= 14.5


def test_each_pole_reverses_within_about_two_years_of_maximum(history):
    # common practice, no source: polar fields reverse around cycle maximum
    lms = [lm for lm in cycle_landmarks_truth(history) if lm["cycle"] > history.cycles[0]["cycle"] + 2]
    ty = history.time_yr
    for series in (history.north_gauss, history.south_gauss):
        crossings = np.array(sign_changes_yr(ty, series))
        offsets = np.array([np.min(np.abs(crossings - lm["maximum_time"])) for lm in lms])
        assert np.mean(offsets <= 2.0) >= 0.9
        assert np.median(offsets) <= 1.0


def test_polar_fields_strongest_near_minimum(history):
    # common practice, no source: the polar field peaks around minimum and is weak at maximum
    ty = history.time_yr
    dip = np.abs(history.dipole_gauss)
    lms = [lm for lm in cycle_landmarks_truth(history) if lm["cycle"] > history.cycles[0]["cycle"] + 2]
    at_min = [dip[np.abs(ty - lm["minimum_time"]) <= 0.5].mean() for lm in lms]
    at_max = [dip[np.abs(ty - lm["maximum_time"]) <= 0.5].mean() for lm in lms]
    ratio = np.array(at_min) / np.array(at_max)
    assert np.mean(ratio > 1.0) >= 0.9 and np.median(ratio) > 3.0
    # the strongest |dipole| between two maxima comes in the late declining phase, a few years
    # before the minimum between them at most (on the Sun typically 1-3 yr; common practice, no source)
    offsets = []
    for a, b in zip(lms, lms[1:]):
        sel = (ty >= a["maximum_time"]) & (ty < b["maximum_time"])
        offsets.append(ty[sel][np.argmax(dip[sel])] - b["minimum_time"])
    offsets = np.array(offsets)
    assert np.median(np.abs(offsets)) <= 3.0 and np.all(np.abs(offsets) <= 5.5)


def test_precursor_relation_holds_in_calibration_table(history):
    # the Babcock-Leighton recurrence makes the polar field at minimum predict the next amplitude
    # (Schatten et al. 1978, GRL 5, 411); issue 3 asks for a correlation of about 0.8-0.95
    rows = calibration_rows(history, 2030.0, lags_years=())
    assert len(rows) >= 20 and {x["phase"] for x in rows} == {"minimum"}
    r = pearson_r([x["precursor"] for x in rows], [x["amplitude"] for x in rows])
    assert 0.8 <= r <= 0.97


def test_precursor_after_the_reversal_predicts_better_the_later_it_is_taken(history):
    # Kumar et al. 2021 (ApJ 909, 87, arXiv:2101.05013): the polar precursor's correlation with the next
    # amplitude rises with the time since the reversal, usable (r >= 0.8) from about 4 yr after it and
    # highest near the minimum.  The star's table: r at reversal+6 above r at reversal+2 by at least 0.05
    # (seed 1: 0.73 -> 0.90, seed 2: 0.88 -> 0.95, measured), and reversal+6 within 0.05 of the minimum's
    rows = calibration_rows(history, 2030.0)

    def r_at(phase):
        sel = [x for x in rows if x["phase"] == phase]
        assert len(sel) >= 20
        return pearson_r([x["precursor"] for x in sel], [x["amplitude"] for x in sel])

    assert r_at("reversal+6") >= r_at("reversal+2") + 0.05
    assert r_at("reversal+6") >= 0.8
    assert abs(r_at("reversal+6") - r_at("minimum")) <= 0.05


def test_hale_polarity_alternates_between_cycles(history):
    # Hale et al. 1919 (ApJ 49, 153): leading polarity flips each cycle and is opposite in the hemispheres
    reg = history.regions
    for number in (5, 6, 7):
        sel = reg["cycle"] == number
        north = sel & (reg["hemisphere"] > 0)
        south = sel & (reg["hemisphere"] < 0)
        sign_n = np.unique(reg["lead_sign"][north])
        assert sign_n.size == 1 and np.unique(reg["lead_sign"][south]).tolist() == [-sign_n[0]]
        assert sign_n[0] == (1 if number % 2 == 0 else -1)


def test_whole_cap_means_match_cell_fields(history):
    # the stored cap means are the area-weighted means of the cells above 60 degrees (regression only)
    k = 12345
    n, s = cap_mean_gauss(history.grid, history.br_gauss[k])
    assert n == pytest.approx(history.north_gauss[k], rel=1e-12)
    assert s == pytest.approx(history.south_gauss[k], rel=1e-12)


def test_history_is_deterministic_and_seed_dependent():
    a = star_history.__wrapped__(3)
    b = star_history.__wrapped__(3)
    assert np.array_equal(a.br_gauss, b.br_gauss) and np.array_equal(a.sunspot_observed, b.sunspot_observed)
    assert not np.array_equal(a.north_gauss, star_history(1).north_gauss)


def test_star_flux_budget_is_conserved_without_decay():
    # with no decay the transported field keeps the (zero) net flux of bipolar sources (regression only)
    from pipeline.synth.transport import TransportModel

    p = StarParameters(history_start_yr=1700.0, history_end_yr=1760.0, initial_polar_gauss=0.0,
                       transport=TransportModel(decay_years=None))
    h = star_history.__wrapped__(5, p)
    net = h.br_gauss @ h.grid.area_m2
    gross = np.abs(h.br_gauss) @ h.grid.area_m2
    assert np.max(np.abs(net) / np.maximum(gross, 1e-300)) < 1e-10
