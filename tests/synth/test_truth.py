"""Truth helpers: visible-cap means, mu threshold, sign changes, precursor regression residual."""

import numpy as np
import pytest

from pipeline.projection import visible_area_m2
from pipeline.synth.demo import calibration_residual
from pipeline.synth.truth import (mu_threshold_cos, sign_changes_yr, visible_cap_means_gauss,
                                  visible_longitude_fraction)

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
