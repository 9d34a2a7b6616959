"""Truth helpers: visible-cap means, mu threshold, sign changes, precursor windows at each phase,
calibration rows, precursor regression residual."""

import numpy as np
import pytest

from pipeline.projection import visible_area_m2
from pipeline.synth.demo import calibration_residual
from pipeline.synth.truth import (TRUTH_SCALE, calibration_rows, final_reversal_yr, mu_threshold_cos,
                                  phase_precursors, precursor_gauss, sign_changes_yr, visible_cap_means_gauss,
                                  visible_longitude_fraction, window_mean_gauss)

AU_M = 1.495978707e11  # IAU 2012 Resolution B2
RSUN_M = 6.957e8       # IAU 2015 Resolution B3


@pytest.mark.parametrize("distance_rsun", [AU_M / RSUN_M, 10.0, 1.5])
@pytest.mark.parametrize("mu_min", [0.0, 0.05, 0.1, 0.3, 0.6, 0.95])
def test_mu_threshold_root_agrees_with_projection_quadratic(mu_min, distance_rsun):
    """Two routes: truth.mu_threshold_cos finds the root of mu(t) = mu_min on the 3-D vectors
    (scipy.optimize.brentq), pipeline.projection.visible_area_m2 solves the closed-form quadratic;
    its spherical cap 2 pi R^2 (1 - cos t) gives cos t.  Both are exact, so they agree to 1e-10
    (double rounding, about 1e-16, measured)."""
    distance_m = distance_rsun * RSUN_M
    c_root = mu_threshold_cos(RSUN_M, distance_m, mu_min)
    c_quadratic = 1.0 - visible_area_m2(RSUN_M, distance_m, mu_min) / (2.0 * np.pi * RSUN_M ** 2)
    assert c_root == pytest.approx(c_quadratic, abs=1e-10)


def test_mu_threshold_limits():
    """Analytic limits: mu = 0 is the tangent circle seen from D, cos t = R / D (a tangent line from an
    external point, elementary geometry); D -> infinity is the orthographic mu = cos t, so cos t -> mu_min
    with an error of order R / D (here 1e-9)."""
    assert mu_threshold_cos(1.0, 4.0, 0.0) == pytest.approx(0.25, abs=1e-12)
    assert mu_threshold_cos(RSUN_M, AU_M, 0.0) == pytest.approx(RSUN_M / AU_M, abs=1e-12)
    for m in (0.1, 0.5, 0.9):
        assert mu_threshold_cos(1.0, 1e9, m) == pytest.approx(m, abs=1e-8)
    with pytest.raises(ValueError, match="distance_m: got 0.5"):
        mu_threshold_cos(1.0, 0.5, 0.1)


def test_visible_fraction_limits():
    # seen from the equator (B0 = 0, orthographic limit c = 0) half of every circle is visible
    assert np.allclose(visible_longitude_fraction([0.0, 45.0, -70.0], 0.0, 0.0), 0.5)
    # the visible pole: with B0 = +7 the north pole is fully visible, the south one not at all
    assert visible_longitude_fraction(89.999, 7.0, 0.0) == pytest.approx(1.0)
    assert visible_longitude_fraction(-89.999, 7.0, 0.0) == pytest.approx(0.0)


def test_visible_cap_mean_of_uniform_and_linear_fields():
    lat = np.linspace(-90, 90, 181)
    n, s = visible_cap_means_gauss(lat, np.full(lat.size, 3.0), 5.0, AU_M, RSUN_M)
    assert n == pytest.approx(3.0) and s == pytest.approx(3.0)
    # B = sin(lat) seen edge-on (B0 = 0, mu >= 0): mean over a whole cap = (1 + sin 60)/2 by
    # symmetry (f = const), i.e. int sin cos / int cos over [60, 90] (elementary integral)
    n, s = visible_cap_means_gauss(lat, np.sin(np.deg2rad(lat)), 0.0, 1e30, RSUN_M, mu_min=1e-9)
    assert n == pytest.approx((1 + np.sin(np.pi / 3)) / 2, rel=1e-4)
    assert s == pytest.approx(-(1 + np.sin(np.pi / 3)) / 2, rel=1e-4)


def test_sign_changes_of_a_sine():
    # zeros of sin(2 pi t / 11) at multiples of 5.5 (elementary)
    t = np.linspace(0.2, 30, 3000)
    got = sign_changes_yr(t, np.sin(2 * np.pi * t / 11))
    assert np.allclose(got, [5.5, 11.0, 16.5, 22.0, 27.5], atol=1e-4)
    assert sign_changes_yr([0, 1, 2, 3], [1.0, 0.0, 1.0, 2.0]) == []  # a touch of zero is no crossing


def test_calibration_residual_matches_statsmodels():
    # OLS line and prediction standard error against statsmodels (reference library)
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(2)
    x = rng.uniform(2, 10, 25)
    y = 20 + 15 * x + rng.normal(0, 10, 25)
    rows = [dict(precursor=a, amplitude=b) for a, b in zip(x, y)]
    res = calibration_residual(rows, 6.0, 120.0)
    fit = sm.OLS(y, sm.add_constant(x)).fit()
    pred = fit.get_prediction(np.array([[1.0, 6.0]])).summary_frame(alpha=0.05)
    assert res["predicted"] == pytest.approx(float(pred["mean"].iloc[0]), rel=1e-10)
    se_obs = float(np.sqrt(pred["mean_se"].iloc[0] ** 2 + fit.scale))
    assert res["prediction_se"] == pytest.approx(se_obs, rel=1e-10)


# ---- precursor windows at a phase (issue 10) -------------------------------------------------------------

LAG_PHASES = ("reversal+2", "reversal+3", "reversal+4", "reversal+5", "reversal+6")


def test_window_mean_of_a_cosine_matches_its_integral():
    """The window mean of |A cos(2 pi t / P)| over a window free of zeros is the integral mean
    A (sin(k (c + w)) - sin(k (c - w))) / (2 k w), k = 2 pi / P (elementary calculus).  Sampled every
    0.001 yr the discrete mean differs from it by O(dt^2 / w^2) plus the end-point imbalance, under 1e-3 A."""
    amplitude, period = 5.0, 22.0
    k = 2 * np.pi / period
    t = np.arange(0.0, 40.0, 0.001)
    d = amplitude * np.cos(k * t)
    for c, w in ((1.0, 0.5), (12.0, 0.5), (20.0, 1.0)):  # cos has no zero in these windows (zeros at 5.5 + 11 n)
        expected = abs(amplitude * (np.sin(k * (c + w)) - np.sin(k * (c - w))) / (2 * k * w))
        mean, se = window_mean_gauss(t, np.abs(d), c, w)
        assert mean == pytest.approx(expected, abs=1e-3 * amplitude)
        assert np.isfinite(se) and se > 0
    with pytest.raises(ValueError, match="center_yr: got 99.0; no sample within"):
        window_mean_gauss(t, np.abs(d), 99.0, 0.5)


def test_final_reversal_is_the_last_sign_change_since_the_previous_minimum():
    """A cos(2 pi t / P) changes sign at P/4 + n P/2 (elementary): for P = 22 at 5.5, 16.5, 27.5, ...
    Between 'minima' at 0 and 11 the only one is 5.5; between 0 and 20 the last one is 16.5; a cycle with
    no sign change since its previous minimum has none (it does not borrow the older 5.5)."""
    t = np.arange(0.0, 40.0, 0.01)
    d = 3.0 * np.cos(2 * np.pi * t / 22.0)
    assert final_reversal_yr(t, d, 11.0, 0.0) == pytest.approx(5.5, abs=1e-5)
    assert final_reversal_yr(t, d, 20.0, 0.0) == pytest.approx(16.5, abs=1e-5)
    assert final_reversal_yr(t, d, 15.0, 6.0) is None
    # a crossing between the last sample before the previous minimum and the first after it: it precedes
    # that minimum (zero of the shifted cosine at 5.505, previous minimum 5.507), so it is not this cycle's
    shifted = 3.0 * np.cos(2 * np.pi * (t - 0.005) / 22.0)
    assert final_reversal_yr(t, shifted, 15.0, 5.503) == pytest.approx(5.505, abs=1e-5)
    assert final_reversal_yr(t, shifted, 15.0, 5.507) is None


def _square_dipole(reversals, magnitudes, t):
    """Dipole of constant magnitude magnitudes[i] after reversals[i], sign alternating at each reversal."""
    d = np.full(t.size, magnitudes[0])
    for i, r in enumerate(reversals):
        d[t > r] = (-1) ** (i + 1) * magnitudes[i + 1]
    return d


def test_constant_magnitude_between_reversals_gives_it_at_every_phase():
    """Identity: when |dipole| is constant between two reversals, every window between them has that mean,
    whatever its phase, and a zero standard error (arithmetic).  Reversals at 5.5 and 16.5 with magnitudes
    3 and 7 after them, the minimum at 11 (4.5 yr after the first): the phases minimum and reversal+2..6
    (a window past the minimum included) all give 3; a lag whose window reaches the next reversal
    (reversal+10.6: window up to 16.6) is left out, as is one whose window leaves the series."""
    t = np.arange(0.0, 30.0, 1.0 / 73.0)  # 5-day steps, no sample on a reversal
    d = _square_dipole([5.5, 16.5], [1.0, 3.0, 7.0], t)
    got = phase_precursors(t, d, 11.0, 0.0, lags_years=(2, 3, 4, 5, 6, 10, 10.6))
    assert got["reversal_time"] == pytest.approx(5.5, abs=1.0 / 73.0)
    phases = got["phases"]
    assert list(phases) == ["minimum", *LAG_PHASES, "reversal+10"]
    for phase, item in phases.items():
        assert item["precursor"] == pytest.approx(3.0, abs=1e-12), phase
        assert item["precursor_error"] == pytest.approx(0.0, abs=1e-12)
    assert phases["reversal+6"]["center_time"] == pytest.approx(got["reversal_time"] + 6.0, abs=1e-12)
    assert phases["minimum"]["center_time"] == 11.0
    # a window that leaves the given span is left out (to 11.4: the minimum's window needs 11.5,
    # reversal+6 needs 12.0, reversal+5 ends at 11.0)
    short = phase_precursors(t, d, 11.0, 0.0, within_yr=(0.0, 11.4))
    assert list(short["phases"]) == ["reversal+2", "reversal+3", "reversal+4", "reversal+5"]
    # no sign change since the previous minimum: no reversal+L phase at all
    none = phase_precursors(t, d, 11.0, 6.0)
    assert none["reversal_time"] is None and list(none["phases"]) == ["minimum"]


@pytest.fixture(scope="module")
def star():
    from pipeline.synth.star import star_history

    return star_history(1)


def test_calibration_rows_have_every_phase_for_every_cycle(star):
    """The demo star (seed 1; closed-loop truth of the synthetic star): every cycle of the table has a row
    at the phase minimum and at reversal+2..6 (all its windows lie inside the history and before its next
    reversal), with the same amplitude and amplitude error at every phase, and one declared scale."""
    rows = calibration_rows(star, 2039.2)
    by_phase = {}
    for r in rows:
        by_phase.setdefault(r["phase"], []).append(r)
    assert list(by_phase) == ["minimum", *LAG_PHASES]
    cycles = [r["cycle"] for r in by_phase["minimum"]]
    assert len(cycles) == 28
    for phase in LAG_PHASES:
        assert [r["cycle"] for r in by_phase[phase]] == cycles
        for a, b in zip(by_phase["minimum"], by_phase[phase]):
            assert (b["amplitude"], b["amplitude_error"]) == (a["amplitude"], a["amplitude_error"])
    assert {r["scale"] for r in rows} == {TRUTH_SCALE}
    # the minimum rows are the at-minimum precursor the table always had
    for r in by_phase["minimum"]:
        assert (r["precursor"], r["precursor_error"]) == precursor_gauss(star, r["center_time"])
    assert calibration_rows(star, 2039.2, lags_years=()) == by_phase["minimum"]


def test_reversal_rows_agree_with_a_recomputation_from_the_cap_means(star):
    """Closed-loop truth of the synthetic star, recomputed here from the true cap means alone (as
    truth_caps.csv gives them): dipole (N - S)/2 (DESIGN.md), the last zero crossing of the dipole between
    the previous minimum and the cycle's minimum found by its own route (np.diff of the sign bits, linear
    interpolation), the mean |dipole| of the samples within +-0.5 yr of reversal + L.  Same samples, so
    the two agree to rounding (regression only beyond the definitions)."""
    from pipeline.synth.truth import cycle_landmarks_truth

    t = star.time_yr
    dipole = 0.5 * (star.north_gauss - star.south_gauss)
    minima = {lm["cycle"]: lm["minimum_time"] for lm in cycle_landmarks_truth(star)}
    flips = np.flatnonzero(np.diff(np.signbit(dipole)))
    crossings = t[flips] + dipole[flips] / (dipole[flips] - dipole[flips + 1]) * (t[flips + 1] - t[flips])
    checked = 0
    for r in calibration_rows(star, 2039.2):
        if r["phase"] == "minimum":
            continue
        lag = float(r["phase"].split("+")[1])
        between = crossings[(crossings > minima[r["cycle"] - 1]) & (crossings < minima[r["cycle"]])]
        reversal = between[-1]
        assert r["reversal_time"] == pytest.approx(reversal, abs=1e-9)
        sel = np.abs(t - (reversal + lag)) <= 0.5
        assert r["precursor"] == pytest.approx(np.abs(dipole[sel]).mean(), rel=1e-12)
        checked += 1
    assert checked == 5 * 28
