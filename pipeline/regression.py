"""Precursor calibration and the next-cycle amplitude forecast.

A calibration table pairs, for each past cycle, the polar-field precursor at
the cycle minimum (gauss) with the amplitude of the next cycle (maximum of the
13-month smoothed sunspot number).  :func:`forecast_amplitude` fits the table
with a named method, predicts the amplitude for a new precursor value with
prediction intervals for a *new cycle*, and cross-validates the method by
leave-one-out.

Methods (``METHODS``):

``ols``
    Ordinary least squares of amplitude on precursor; Student-t prediction
    interval (Draper & Smith 1998).
``odr``
    Orthogonal distance regression with errors in both variables
    (``scipy.odr``; Boggs & Rogers 1990), started from the OLS line; needs
    the table's error columns.  A fit ODRPACK does not report as converged
    is refused (:class:`FitError`, with ODRPACK's stop reasons).
``loglinear``
    OLS of ln(amplitude) on ln(precursor), a power law A = exp(a) P^b with
    multiplicative scatter (Box & Cox 1964); the interval is the exponential
    of the log-scale Student-t interval, the point forecast its median.

A precursor error given with the new precursor widens the interval by first-order propagation
(:func:`predict`).  The intervals' coverage of new cycles is checked on seeded synthetic tables in
tests/test_regression.py (two-sided binomial windows at 68.27% and 95%).

Every forecast carries :data:`CAUTIONS`.
"""

from __future__ import annotations

import csv
import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy import stats

from pipeline.config import check_choice, check_number

__all__ = [
    "ForecastSettings",
    "CalibrationTable",
    "FitError",
    "LineFit",
    "Forecast",
    "METHODS",
    "CAUTIONS",
    "CAUTION_SENTENCES",
    "LEVEL_68",
    "LEVEL_95",
    "read_calibration_csv",
    "fit_ols",
    "fit_odr",
    "fit_loglinear",
    "predict",
    "leave_one_out",
    "forecast_amplitude",
]

#: central probability of the "68%" interval: the Gaussian 1-sigma content
LEVEL_68 = 0.6826894921370859
LEVEL_95 = 0.95

#: The cautions every forecast, summary and report carries, sentence by sentence.
CAUTION_SENTENCES = (
    "This is a statistical forecast calibrated on few solar cycles; its intervals assume the calibration "
    "cycles are representative of the next one.",
    "Official space-weather forecasts and mission rules govern operational decisions about spacecraft "
    "and astronauts.",
)
CAUTIONS = " ".join(CAUTION_SENTENCES)


@dataclass(frozen=True)
class ForecastSettings:
    """How the forecast is made (configuration section ``[forecast]``).

    Attributes
    ----------
    method : str
        Name of the regression method (``ols``, ``odr``, ``loglinear``).
    min_cycles : int
        Refuse calibration tables with fewer cycles (at least 4).
    precursor_kind : str
        ``dipole`` (|(north - south)/2|) or ``hemispheres`` ((|north| + |south|)/2),
        for a precursor taken from a measured series (``pipeline.precursor``).
    window_years : float
        Half-width of the window the precursor is averaged over (years).
    lag_years : float or None
        Before the minimum: take the precursor this long after the final
        reversal (years); None takes the newest full window.
    """

    method: str = "ols"
    min_cycles: int = 4
    precursor_kind: str = "dipole"
    window_years: float = 0.5
    lag_years: float | None = None

    def __post_init__(self):
        from pipeline.precursor import PRECURSOR_KINDS

        check_choice("forecast.method", self.method, METHODS)
        check_number("forecast.min_cycles", self.min_cycles, lo=4, integer=True)
        check_choice("forecast.precursor_kind", self.precursor_kind, PRECURSOR_KINDS)
        check_number("forecast.window_years", self.window_years, lo=0.0, hi=5.0, lo_open=True)
        if self.lag_years is not None:
            check_number("forecast.lag_years", self.lag_years, lo=0.0, hi=15.0)


class FitError(ValueError):
    """A calibration fit that cannot be trusted (e.g. ODRPACK did not converge); one-line reason."""


@dataclass(frozen=True)
class CalibrationTable:
    """Past cycles: precursor (gauss) and next-cycle amplitude (sunspot number).

    ``precursor_error`` / ``amplitude_error`` are None when the file has no
    such column; ``problems`` lists one-line reasons for rows left out.
    """

    cycle: tuple
    precursor: np.ndarray
    amplitude: np.ndarray
    precursor_error: np.ndarray | None = None
    amplitude_error: np.ndarray | None = None
    problems: list = field(default_factory=list)

    @property
    def n_cycles(self) -> int:
        return int(self.precursor.size)


@dataclass(frozen=True)
class LineFit:
    """A fitted straight line ``y = intercept + slope * x`` and what a new point needs.

    Attributes
    ----------
    method : str
    intercept, slope : float
        On the method's scale (log scale for ``loglinear``).
    cov : numpy.ndarray
        2x2 covariance of (intercept, slope).
    new_point_variance : float
        Variance of a new observation about the line (excluding the parameter
        uncertainty), on the method's scale.
    dof : int
        Degrees of freedom of the Student-t quantile (n - 2).
    x_transform, y_transform : str
        ``"identity"`` or ``"log"`` (the scale the line is fitted on).
    odr_terms : dict or None
        For ``odr``: ``res_var`` and the mean squared errors, to rebuild the
        new-point variance for a precursor with its own error.
    """

    method: str
    intercept: float
    slope: float
    cov: np.ndarray
    new_point_variance: float
    dof: int
    x_transform: str = "identity"
    y_transform: str = "identity"
    odr_terms: dict | None = None


@dataclass(frozen=True)
class Forecast:
    """The next-cycle amplitude forecast (see :func:`forecast_amplitude`)."""

    amplitude: float
    interval_68: tuple
    interval_95: tuple
    method: str
    n_cycles: int
    r: float
    loo_rmse: float
    precursor: float
    precursor_error: float | None
    intercept: float
    slope: float
    calibrated_range: tuple
    warnings: list
    cautions: str = CAUTIONS

    def to_dict(self) -> dict:
        """Plain JSON-ready dict (the ``polecast forecast --format json`` object)."""
        return {
            "amplitude": self.amplitude,
            "interval_68": list(self.interval_68),
            "interval_95": list(self.interval_95),
            "method": self.method,
            "n_cycles": self.n_cycles,
            "r": self.r,
            "loo_rmse": self.loo_rmse,
            "precursor": self.precursor,
            "precursor_error": self.precursor_error,
            "intercept": self.intercept,
            "slope": self.slope,
            "calibrated_range": list(self.calibrated_range),
            "warnings": list(self.warnings),
            "cautions": self.cautions,
        }


def _as_xy(x, y, name_x="precursor", name_y="amplitude"):
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    if x.ndim != 1 or x.shape != y.shape:
        raise ValueError(f"{name_x} and {name_y}: expected 1-D arrays of one length, got shapes {x.shape} and {y.shape}")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise ValueError(f"{name_x} and {name_y}: all values must be finite; drop incomplete cycles")
    if x.size < 3:
        raise ValueError(f"{name_x}: got {x.size} cycles; a straight line with a prediction interval needs at least 3")
    if np.ptp(x) == 0:
        raise ValueError(f"{name_x}: all values equal ({x[0]!r}); the slope is undefined")
    return x, y


def fit_ols(precursor, amplitude, precursor_error=None, amplitude_error=None) -> LineFit:
    """Ordinary least squares of amplitude on precursor.

    Parameters
    ----------
    precursor : array_like
        Precursor per calibration cycle (gauss).
    amplitude : array_like
        Next-cycle amplitude (sunspot number).
    precursor_error, amplitude_error : array_like, optional
        Ignored (accepted so that every method has one signature).

    Notes
    -----
    With :math:`S_{xx} = \\sum (x_i - \\bar x)^2` and residual variance
    :math:`s^2 = \\sum r_i^2 / (n - 2)`, slope :math:`b = \\sum (x_i-\\bar x)(y_i-\\bar y)/S_{xx}`,
    and :math:`\\mathrm{cov}(a, b) = s^2 (X^T X)^{-1}` (Draper & Smith 1998, ch. 1).

    References
    ----------
    Draper, N. R. & Smith, H. 1998, *Applied Regression Analysis*, 3rd ed., Wiley.
    """
    x, y = _as_xy(precursor, amplitude)
    return _ols_xy(x, y, "ols")


def _ols_xy(x: np.ndarray, y: np.ndarray, method: str) -> LineFit:
    n = x.size
    xm, ym = x.mean(), y.mean()
    sxx = float(np.sum((x - xm) ** 2))
    slope = float(np.sum((x - xm) * (y - ym)) / sxx)
    intercept = float(ym - slope * xm)
    resid = y - intercept - slope * x
    s2 = float(np.sum(resid ** 2) / (n - 2))
    # Draper & Smith (1998) ch. 1: var(b) = s^2/Sxx, var(a) = s^2 (1/n + xm^2/Sxx), cov = -xm s^2/Sxx
    cov = s2 * np.array([[1.0 / n + xm ** 2 / sxx, -xm / sxx], [-xm / sxx, 1.0 / sxx]])
    return LineFit(method, intercept, slope, cov, s2, n - 2)


def _check_errors(name: str, err, n: int) -> np.ndarray:
    if err is None:
        raise ValueError(f"{name}: method 'odr' needs errors in both variables; add {name} columns to the "
                         f"calibration table or use method 'ols'")
    e = np.asarray(err, dtype=np.float64)
    if e.shape != (n,) or not np.all(np.isfinite(e)) or np.any(e <= 0):
        raise ValueError(f"{name}: expected {n} finite positive errors, got {err!r}")
    return e


def fit_odr(precursor, amplitude, precursor_error=None, amplitude_error=None, *,
            max_iterations: int = 1000) -> LineFit:
    """Orthogonal distance regression of amplitude on precursor (errors in both).

    Parameters
    ----------
    precursor, amplitude : array_like
        As :func:`fit_ols`.
    precursor_error, amplitude_error : array_like
        One-sigma errors (gauss; sunspot number); required.
    max_iterations : int
        ODRPACK's iteration limit (``maxit``).

    Raises
    ------
    FitError
        When ODRPACK reports anything but convergence (``info`` 1, 2 or 3:
        sum-of-squares and/or parameter convergence): the iteration limit
        (``info`` 4), questionable results such as a problem that is not of
        full rank at the solution, or a fatal error (``info`` >= 5).  The
        message gives ODRPACK's stop reasons.

    Notes
    -----
    Minimises :math:`\\sum_i [(y_i - a - b(x_i+\\delta_i))^2/\\sigma_{y,i}^2 + \\delta_i^2/\\sigma_{x,i}^2]`
    with ODRPACK through ``scipy.odr`` (Boggs & Rogers 1990).  The residual
    variance :math:`\\chi^2/(n-2)` ("res_var") rescales the stated errors to
    the scatter actually seen.  A new cycle with typical errors is assumed to
    scatter about the line with variance
    ``res_var * mean(sigma_y**2 + b**2 sigma_x**2)`` (the effective variance
    of a calibration point, Orear 1982), to which the prediction adds the
    parameter variance ``res_var * [1, x0] cov_beta [1, x0]^T`` and, when the
    new precursor has an error, :math:`b^2 \\sigma_{x0}^2` in place of the
    mean precursor term.

    References
    ----------
    Boggs, P. T. & Rogers, J. E. 1990, in *Statistical Analysis of
    Measurement Error Models and Applications*, Contemporary Mathematics 112,
    AMS, 183.
    Orear, J. 1982, American Journal of Physics 50, 912.
    """
    x, y = _as_xy(precursor, amplitude)
    sx = _check_errors("precursor_error", precursor_error, x.size)
    sy = _check_errors("amplitude_error", amplitude_error, x.size)
    with warnings.catch_warnings():
        # scipy.odr is deprecated from SciPy 1.17 (kept until 1.19); the issue asks for it
        warnings.simplefilter("ignore", DeprecationWarning)
        from scipy import odr
    start = np.polyfit(x, y, 1)  # the OLS line [slope, intercept] as the starting point
    # Boggs & Rogers (1990): ODRPACK weighted orthogonal distance regression; scipy's unilinear
    # model (beta = [slope, intercept], analytic derivatives), started from the OLS line
    check_number("max_iterations", max_iterations, lo=1, integer=True)
    job = odr.ODR(odr.RealData(x, y, sx=sx, sy=sy), odr.unilinear, beta0=start,
                  sstol=1e-15, partol=1e-15, maxit=int(max_iterations))
    out = job.run()
    _check_odr_converged(out, x.size)
    slope, intercept = (float(v) for v in out.beta)
    res_var = float(out.res_var)
    # reorder to (intercept, slope); scipy's cov_beta is unscaled: sd_beta^2 = diag(cov_beta) res_var
    cov = res_var * np.asarray(out.cov_beta, dtype=np.float64)[::-1, ::-1]
    # Orear (1982): effective variance sigma_y^2 + b^2 sigma_x^2 of a point about the line
    mean_sy2, mean_sx2 = float(np.mean(sy ** 2)), float(np.mean(sx ** 2))
    new_var = res_var * float(np.mean(sy ** 2 + slope ** 2 * sx ** 2))
    return LineFit("odr", intercept, slope, cov, new_var, x.size - 2,
                   odr_terms={"res_var": res_var, "mean_sy2": mean_sy2, "mean_sx2": mean_sx2})


#: ODRPACK's INFO codes that mean convergence: 1 sum of squares, 2 parameters, 3 both; 4 is the
#: iteration limit, >= 5 questionable results or a fatal error (scipy.odr.Output.info and its
#: stopreason; Boggs, Byrd, Rogers & Schnabel 1992, ODRPACK 2.01 User's Reference Guide, NISTIR 4834,
#: from memory)
_ODR_CONVERGED = (1, 2, 3)


def _check_odr_converged(out, n: int) -> None:
    """Refuse an ODRPACK result that did not converge, with its stop reasons in one line."""
    info = int(out.info)
    if info in _ODR_CONVERGED:
        return
    reasons = "; ".join(str(r) for r in out.stopreason) or "no reason given"
    raise FitError(f"method 'odr': ODRPACK returned no converged fit for the {n}-cycle table "
                   f"(info {info}: {reasons}); "
                   f"check the table for near-equal precursors or errors of very different sizes, "
                   f"or use method 'ols'")


def fit_loglinear(precursor, amplitude, precursor_error=None, amplitude_error=None) -> LineFit:
    """OLS of ln(amplitude) on ln(precursor): a power law with multiplicative scatter.

    Notes
    -----
    :math:`\\ln A = a + b \\ln P + \\varepsilon`, :math:`\\varepsilon \\sim N(0, s^2)`,
    fitted by OLS on the log scale (Box & Cox 1964 on transforming a positive
    response whose scatter grows with its level).  The forecast
    :math:`\\exp(\\hat a + \\hat b \\ln P_0)` is the median amplitude; the
    interval is the exponential of the log-scale Student-t interval (exact,
    since exp is monotonic).

    References
    ----------
    Box, G. E. P. & Cox, D. R. 1964, Journal of the Royal Statistical Society
    B 26, 211.
    """
    x, y = _as_xy(precursor, amplitude)
    if np.any(x <= 0) or np.any(y <= 0):
        raise ValueError("precursor and amplitude: method 'loglinear' needs positive values; "
                         "use method 'ols' for tables with zero or negative entries")
    # Box & Cox (1964): log transform of response and predictor
    fit = _ols_xy(np.log(x), np.log(y), "loglinear")
    return LineFit("loglinear", fit.intercept, fit.slope, fit.cov, fit.new_point_variance, fit.dof,
                   x_transform="log", y_transform="log")


#: regression methods by name
METHODS = {"ols": fit_ols, "odr": fit_odr, "loglinear": fit_loglinear}


def _method(name: str):
    try:
        return METHODS[name]
    except KeyError:
        raise ValueError(f"method: got {name!r}; valid methods are {', '.join(sorted(METHODS))}") from None


def predict(fit: LineFit, precursor: float, level: float = LEVEL_95, precursor_error: float | None = None):
    """Point forecast and the two-sided prediction interval for a new cycle.

    Parameters
    ----------
    fit : LineFit
    precursor : float
        Precursor of the cycle to forecast (gauss).
    level : float
        Central probability of the interval (0 < level < 1).
    precursor_error : float, optional
        One-sigma error of ``precursor`` (gauss), propagated as
        :math:`b^2\\sigma_{x0}^2` (first order; for ``loglinear`` the relative
        error :math:`\\sigma_{x0}/x_0` on the log scale).

    Returns
    -------
    (float, float, float)
        Amplitude, interval low, interval high (sunspot number).

    Notes
    -----
    :math:`\\hat y_0 \\pm t_{\\nu,(1+\\mathrm{level})/2}\\sqrt{V}`,
    :math:`V = \\sigma^2_{new} + [1, x_0]\\,C\\,[1, x_0]^T + V_{x0}`.

    Without a precursor error, :math:`V_{x0} = 0` and :math:`\\nu = n - 2`;
    for OLS this is :math:`s\\sqrt{1 + 1/n + (x_0-\\bar x)^2/S_{xx}}`, the
    prediction interval for a new observation (Draper & Smith 1998, sec. 1.4).

    ``ols``/``loglinear`` with a precursor error: the stated error is taken
    as known, :math:`V_{x0} = b^2\\sigma_{x0}^2`, added to the estimated
    variance :math:`V_e` (the first two terms, n - 2 degrees of freedom), and
    the quantile uses the Welch-Satterthwaite effective degrees of freedom
    :math:`\\nu = (V_e + V_{x0})^2 / (V_e^2/(n-2))` (Satterthwaite 1946;
    Welch 1947): a Student-t quantile on the whole variance would over-cover
    (seeded Monte Carlo in tests/test_regression.py).

    ``odr``: every stated error is known up to the common scale ``res_var``
    that the fit estimates, so the new precursor's error replaces the
    calibration's mean precursor error inside the scaled term,
    :math:`\\sigma^2_{new} = \\mathrm{res\\_var}\\,(\\overline{\\sigma_y^2} + b^2\\sigma_{x0}^2)`,
    and :math:`\\nu = n - 2`.  Without a precursor error, the new precursor
    is taken to have the calibration's typical error (see :func:`fit_odr`).

    References
    ----------
    Draper, N. R. & Smith, H. 1998, *Applied Regression Analysis*, 3rd ed., Wiley.
    Satterthwaite, F. E. 1946, Biometrics Bulletin 2, 110.
    Welch, B. L. 1947, Biometrika 34, 28.
    """
    check_number("level", level, lo=0.0, hi=1.0, lo_open=True)
    if not level < 1.0:
        raise ValueError(f"level: got {level!r}; expected a probability below 1")
    x0 = float(precursor)
    if not math.isfinite(x0):
        raise ValueError(f"precursor: got {precursor!r}; expected a finite number")
    sx0 = None if precursor_error is None else float(precursor_error)
    if sx0 is not None and (not math.isfinite(sx0) or sx0 < 0):
        raise ValueError(f"precursor_error: got {precursor_error!r}; expected a finite number >= 0")
    if fit.x_transform == "log":
        if x0 <= 0:
            raise ValueError(f"precursor: got {x0!r}; method 'loglinear' needs a positive precursor")
        if sx0 is not None:
            sx0 = sx0 / x0
        x0 = math.log(x0)
    g = np.array([1.0, x0])
    new_var = fit.new_point_variance
    known_var = 0.0
    odr_terms = fit.odr_terms
    if odr_terms is not None and sx0 is not None:
        # the new precursor's own error replaces the calibration's mean precursor error
        new_var = odr_terms["res_var"] * (odr_terms["mean_sy2"] + fit.slope ** 2 * sx0 ** 2)
    elif sx0 is not None:
        known_var = fit.slope ** 2 * sx0 ** 2  # first-order propagation of a stated (known) error
    # Draper & Smith (1998) sec. 1.4: new-observation variance plus parameter variance (n - 2 dof)
    estimated_var = new_var + float(g @ fit.cov @ g)
    dof = float(fit.dof)
    if known_var > 0:
        # Satterthwaite (1946), Welch (1947): effective dof of an estimated plus a known variance
        dof = (estimated_var + known_var) ** 2 / (estimated_var ** 2 / fit.dof)
    sd = math.sqrt(estimated_var + known_var)
    yhat = fit.intercept + fit.slope * x0
    half = float(stats.t.ppf(0.5 + level / 2.0, dof)) * sd
    lo, hi = yhat - half, yhat + half
    if fit.y_transform == "log":
        return math.exp(yhat), math.exp(lo), math.exp(hi)
    return float(yhat), float(lo), float(hi)


def leave_one_out(precursor, amplitude, method: str = "ols", precursor_error=None, amplitude_error=None):
    """Leave-one-out predictions of each calibration cycle's amplitude.

    Returns
    -------
    (numpy.ndarray, float)
        The prediction for each cycle from a fit to all the others
        (sunspot number), and the root-mean-square of (actual - predicted).

    Notes
    -----
    :math:`\\mathrm{RMSE}_{LOO} = \\sqrt{\\frac1n\\sum_i (y_i - \\hat y_{(-i)}(x_i))^2}`
    (Stone 1974).

    References
    ----------
    Stone, M. 1974, Journal of the Royal Statistical Society B 36, 111.
    """
    fitter = _method(method)
    x, y = _as_xy(precursor, amplitude)
    if x.size < 4:
        raise ValueError(f"precursor: got {x.size} cycles; leave-one-out needs at least 4")
    sx = None if precursor_error is None else np.asarray(precursor_error, dtype=np.float64)
    sy = None if amplitude_error is None else np.asarray(amplitude_error, dtype=np.float64)
    pred = np.empty(x.size)
    for i in range(x.size):
        keep = np.arange(x.size) != i
        fit = fitter(x[keep], y[keep], None if sx is None else sx[keep], None if sy is None else sy[keep])
        pred[i] = predict(fit, x[i])[0]
    # Stone (1974): cross-validatory assessment by leaving one out
    return pred, float(np.sqrt(np.mean((y - pred) ** 2)))


def forecast_amplitude(table: CalibrationTable, precursor: float, settings: ForecastSettings | None = None, *,
                       method: str | None = None, precursor_error: float | None = None) -> Forecast:
    """Forecast the next cycle's amplitude from the precursor.

    Parameters
    ----------
    table : CalibrationTable
        Past cycles (see :func:`read_calibration_csv`).
    precursor : float
        The precursor of the coming cycle (gauss).
    settings : ForecastSettings, optional
    method : str, optional
        Overrides ``settings.method``.
    precursor_error : float, optional
        One-sigma error of ``precursor`` (gauss).

    Returns
    -------
    Forecast
        Amplitude (sunspot number), 68.27% and 95% prediction intervals,
        method, number of cycles, Pearson r of the table, leave-one-out RMSE,
        warnings (precursor outside the calibrated range) and the cautions.

    Raises
    ------
    ValueError
        Fewer than ``settings.min_cycles`` cycles, an unknown method, or a
        method the table cannot support.
    """
    settings = settings or ForecastSettings()
    name = settings.method if method is None else method
    fitter = _method(name)
    n = table.n_cycles
    if n < settings.min_cycles:
        raise ValueError(f"calibration table: got {n} cycles; at least {settings.min_cycles} are needed "
                         f"for a forecast with honest intervals; add cycles to the table")
    x, y = table.precursor, table.amplitude
    fit = fitter(x, y, table.precursor_error, table.amplitude_error)
    amp, lo68, hi68 = predict(fit, precursor, LEVEL_68, precursor_error)
    _, lo95, hi95 = predict(fit, precursor, LEVEL_95, precursor_error)
    _, loo_rmse = leave_one_out(x, y, name, table.precursor_error, table.amplitude_error)
    r = float(stats.pearsonr(x, y)[0])
    found = []
    lo_x, hi_x = float(np.min(x)), float(np.max(x))
    if not lo_x <= float(precursor) <= hi_x:
        found.append(f"precursor {float(precursor):g} lies outside the calibrated range [{lo_x:g}, {hi_x:g}]; "
                     f"the forecast is an extrapolation")
    return Forecast(amplitude=amp, interval_68=(lo68, hi68), interval_95=(lo95, hi95), method=name,
                    n_cycles=n, r=r, loo_rmse=loo_rmse, precursor=float(precursor),
                    precursor_error=None if precursor_error is None else float(precursor_error),
                    intercept=fit.intercept, slope=fit.slope, calibrated_range=(lo_x, hi_x), warnings=found)


#: the calibration CSV's column names (a header is recognised by these names only; case and
#: surrounding spaces are ignored): required, then the optional pair of one-sigma errors
_COLUMNS = ("cycle", "precursor", "amplitude")
_ERROR_COLUMNS = ("precursor_error", "amplitude_error")
_ACCEPTED = _COLUMNS + _ERROR_COLUMNS


def _calibration_header(path: Path, lineno: int, cells: list) -> list:
    """The header's column names, or ValueError naming the line, what is wrong and what is accepted."""
    names = [c.strip().lower() for c in cells]
    accepted = ",".join(_COLUMNS) + " (optionally " + ",".join(_ERROR_COLUMNS) + ")"
    unknown = [n for n in names if n not in _ACCEPTED]
    if unknown:
        shown = ",".join(c.strip() for c in cells)
        raise ValueError(f"calibration file {path}: line {lineno} {shown!r} is not a header (unknown column "
                         f"name(s) {', '.join(repr(u) for u in unknown)}); the first line must name the columns "
                         f"{accepted}")
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise ValueError(f"calibration file {path}: line {lineno}: column(s) {', '.join(dup)} named twice; "
                         f"name each column once")
    missing = [c for c in _COLUMNS if c not in names]
    if missing:
        raise ValueError(f"calibration file {path}: missing column(s) {', '.join(missing)}; the header must "
                         f"name {accepted}")
    given = [c for c in _ERROR_COLUMNS if c in names]
    if len(given) == 1:
        other = [c for c in _ERROR_COLUMNS if c not in names][0]
        raise ValueError(f"calibration file {path}: column {given[0]} given without {other}; give both error "
                         f"columns (method 'odr' uses them) or neither")
    return names


def read_calibration_csv(path: str | Path) -> CalibrationTable:
    """Read a calibration CSV: a header line naming the columns, then one row per past cycle.

    The header is the first line that is neither blank nor a ``#`` comment,
    and it is recognised by its column names only (case and surrounding
    spaces ignored): ``cycle``, ``precursor`` (gauss), ``amplitude``
    (sunspot number), and optionally both ``precursor_error`` and
    ``amplitude_error`` (one-sigma, same units), in any order.  A data row
    that cannot be used (wrong number of cells, a missing or non-finite
    number, an error that is not positive, a cycle given twice) is left out
    with a one-line reason, naming its line in the file, in ``problems``.

    Raises
    ------
    ValueError
        When the file cannot be read, has no header line, its first line is
        not a header (for instance a data row: the columns would be
        guessed), a column name is unknown, repeated or missing, or only one
        of the two error columns is given.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise ValueError(f"calibration file {path}: cannot read ({exc})") from None
    lines = [(k, ln) for k, ln in enumerate(text.splitlines(), start=1)
             if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise ValueError(f"calibration file {path}: no header line; the first line must name the columns "
                         f"{','.join(_COLUMNS)}")
    rows = [next(csv.reader([ln])) for _, ln in lines]  # one row per line, so reasons name true lines
    header = _calibration_header(path, lines[0][0], rows[0])
    use_errors = all(c in header for c in _ERROR_COLUMNS)
    wanted = ("precursor", "amplitude") + (_ERROR_COLUMNS if use_errors else ())
    cycles, cols, problems = [], {c: [] for c in wanted}, []
    first_line_of = {}
    for (lineno, _), cells in zip(lines[1:], rows[1:]):
        if len(cells) != len(header):
            problems.append(f"line {lineno}: {len(cells)} cells, the header names {len(header)} columns; "
                            f"row left out")
            continue
        row = {name: cell.strip() for name, cell in zip(header, cells)}
        values = {}
        for c in wanted:
            raw = row[c]
            try:
                values[c] = float(raw)
            except ValueError:
                values[c] = math.nan
            if not math.isfinite(values[c]):
                problems.append(f"line {lineno}: {c} {raw!r} is not a finite number; row left out")
                break
            if c in _ERROR_COLUMNS and values[c] <= 0:
                problems.append(f"line {lineno}: {c} {raw!r} must be positive; row left out")
                break
        else:
            label = row["cycle"]
            if label in first_line_of:
                problems.append(f"line {lineno}: cycle {label!r} already given on line {first_line_of[label]}; "
                                f"row left out")
                continue
            first_line_of[label] = lineno
            cycles.append(label)
            for c in wanted:
                cols[c].append(values[c])
    return CalibrationTable(
        cycle=tuple(cycles),
        precursor=np.array(cols["precursor"]),
        amplitude=np.array(cols["amplitude"]),
        precursor_error=np.array(cols["precursor_error"]) if use_errors else None,
        amplitude_error=np.array(cols["amplitude_error"]) if use_errors else None,
        problems=problems)
