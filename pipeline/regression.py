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

Phase and scale (only like is regressed on like)
-----------------------------------------------
Every precursor carries a *phase* (:func:`parse_phase`): ``minimum`` (the
window around a cycle minimum) or ``reversal+L`` (the window centred L years
after that cycle's final dipole reversal).  Each calibration row has one
(column ``phase``; a table without the column is read as ``minimum`` and
says so in ``notes``) and a free-text *scale* naming what was measured
(column ``scale``: instrument, cap latitude, B0 method, precursor kind;
:func:`describe_scale` spells one).  :func:`forecast_amplitude` fits only the
rows of the precursor's phase (:func:`select_phase`; fewer than
``min_cycles`` is an :class:`InsufficientCalibrationError`) and refuses rows
whose declared scale differs from the one in force (:func:`check_scale`,
:class:`ScaleMismatchError`) unless the mismatch is allowed, which the
forecast then records.  :func:`merge_tables` joins two tables only where
phase and scale match.

Through the origin
------------------
``through_origin=True`` fits amplitude = slope x precursor (no intercept)
for ``ols`` and ``odr``; ``loglinear`` refuses it (a power law already
passes through the origin; a zero log-scale intercept would fix A = 1 at
P = 1 G, which depends on the units).

Correlation and honest intervals
--------------------------------
The forecast reports Pearson's r with its 95% interval by Fisher's z
transform (:func:`pearson_r_interval`).  When the leave-one-out RMSE exceeds
the model's own leave-one-out prediction standard error, the intervals are
widened by that ratio and a warning says so (:func:`loo_interval_inflation`
states the rule).

Every forecast carries :data:`CAUTIONS`.
"""

from __future__ import annotations

import csv
import io
import math
import numbers
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy import stats

from pipeline.config import ConfigError, check_choice, check_number

__all__ = [
    "ForecastSettings",
    "CalibrationTable",
    "FitError",
    "InsufficientCalibrationError",
    "ScaleMismatchError",
    "LineFit",
    "Forecast",
    "METHODS",
    "ORIGIN_METHODS",
    "CAUTIONS",
    "CAUTION_SENTENCES",
    "LEVEL_68",
    "LEVEL_95",
    "DEFAULT_PHASE",
    "PHASE_FORMS",
    "SELF_CALIBRATION_COLUMNS",
    "parse_phase",
    "reversal_phase",
    "normalise_scale",
    "describe_scale",
    "read_calibration_csv",
    "format_calibration_csv",
    "select_phase",
    "check_scale",
    "merge_tables",
    "fit_ols",
    "fit_odr",
    "fit_loglinear",
    "fit_line",
    "predict",
    "leave_one_out",
    "loo_interval_inflation",
    "pearson_r_interval",
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

#: the phase of a precursor (and of a calibration row) when none is stated: the window around a minimum
DEFAULT_PHASE = "minimum"
#: the valid spellings of a phase, for messages
PHASE_FORMS = ("'minimum'", "'reversal+L' (L >= 0 years after the cycle's final dipole reversal, e.g. 'reversal+4')")
_REVERSAL_PREFIX = "reversal+"
#: a lag written as a plain non-negative decimal (no sign, exponent, underscore, inf or nan)
_LAG_RE = re.compile(r"^(?:\d+(?:\.\d*)?|\.\d+)$")


def reversal_phase(lag_years: float) -> str:
    """The canonical phase name of a precursor taken ``lag_years`` after the final reversal.

    Parameters
    ----------
    lag_years : float
        Window centre after the cycle's final dipole reversal (years, finite, >= 0).

    Returns
    -------
    str
        ``"reversal+L"`` with L in the shortest plain decimal that reads back
        as the same float (``reversal+4``, ``reversal+2.5``).
    """
    lag = float(lag_years) if isinstance(lag_years, numbers.Real) and not isinstance(lag_years, bool) else math.nan
    if not (math.isfinite(lag) and lag >= 0):
        raise ValueError(f"lag_years: got {lag_years!r}; expected a finite number of years >= 0, e.g. 4")
    # numpy's shortest round-trip positional form, trailing zeros and point trimmed: 4.0 -> "4"
    return _REVERSAL_PREFIX + np.format_float_positional(float(lag) + 0.0, trim="-")


def parse_phase(text) -> str:
    """Validate a phase and return its canonical spelling.

    Parameters
    ----------
    text : str
        ``minimum``, or ``reversal+L`` with L a plain non-negative decimal
        number of years (``reversal+4``, ``reversal+2.50``).  Case and
        spaces around the words are ignored.

    Returns
    -------
    str
        ``"minimum"`` or ``"reversal+L"`` with L in its shortest form
        (``reversal+4.0`` -> ``reversal+4``; ``reversal+2.50`` -> ``reversal+2.5``).

    Raises
    ------
    ValueError
        Naming the bad value and the valid forms.
    """
    if isinstance(text, str):
        word = re.sub(r"\s+", "", text).lower()
        if word == DEFAULT_PHASE:
            return DEFAULT_PHASE
        if word.startswith(_REVERSAL_PREFIX) and _LAG_RE.match(word[len(_REVERSAL_PREFIX):]):
            return reversal_phase(float(word[len(_REVERSAL_PREFIX):]))
    raise ValueError(f"phase: got {text!r}; valid phases are {' or '.join(PHASE_FORMS)}")


def normalise_scale(text) -> str:
    """The form in which two scale names are compared.

    A scale is free text naming what a precursor measures; parts separated
    by ``;`` (such as ``instrument=KVM; cap_latitude_deg=60``) are compared
    in any order, without case and with runs of spaces as one.  An empty or
    missing scale is ``""`` (not declared).
    """
    if text is None:
        return ""
    parts = [" ".join(part.split()).casefold() for part in str(text).split(";")]
    parts = [re.sub(r"\s*=\s*", "=", part) for part in parts if part]
    return "; ".join(sorted(parts))


def describe_scale(*, instrument: str, cap_latitude_deg: float, b0_method: str, precursor_kind: str) -> str:
    """One spelling of a measurement definition, for the ``scale`` column and the check.

    Parameters
    ----------
    instrument : str
        Name of the instrument (as the FITS files give it, or a default the output records).
    cap_latitude_deg : float
        Lower |latitude| of the polar cap (degrees).
    b0_method : str
        The B0 method of the series (``fill``, ``visible``, ...).
    precursor_kind : str
        ``dipole`` or ``hemispheres``.

    Returns
    -------
    str
        ``"instrument=...; cap_latitude_deg=...; b0_method=...; precursor_kind=..."``.
    """
    cap = np.format_float_positional(float(check_number("cap_latitude_deg", cap_latitude_deg, lo=0.0, hi=90.0,
                                                        lo_open=True)), trim="-")
    fields = {"instrument": instrument, "b0_method": b0_method, "precursor_kind": precursor_kind}
    for key, value in fields.items():
        if not isinstance(value, str) or not value.strip() or ";" in value:
            raise ValueError(f"{key}: got {value!r}; expected a non-empty name without ';'")
    return (f"instrument={instrument.strip()}; cap_latitude_deg={cap}; b0_method={b0_method.strip()}; "
            f"precursor_kind={precursor_kind.strip()}")


@dataclass(frozen=True)
class ForecastSettings:
    """How the forecast is made (configuration section ``[forecast]``).

    Attributes
    ----------
    method : str
        Name of the regression method (``ols``, ``odr``, ``loglinear``).
    min_cycles : int
        Refuse calibration tables with fewer cycles of the precursor's phase (at least 4).
    precursor_kind : str
        ``dipole`` (|(north - south)/2|) or ``hemispheres`` ((|north| + |south|)/2),
        for a precursor taken from a measured series (``pipeline.precursor``).
    window_years : float
        Half-width of the window the precursor is averaged over (years).
    lag_years : float or None
        The older spelling of ``phase = "reversal+L"``: when given, the phase
        is ``reversal+lag_years`` (a different explicit ``phase`` is refused).
    through_origin : bool
        Fit amplitude = slope x precursor, without an intercept (methods in
        :data:`ORIGIN_METHODS`: ``ols`` and ``odr``).
    phase : str
        ``auto`` (the minimum once known, else ``reversal+L`` with the largest
        complete lag; :func:`pipeline.precursor.choose_phase`), ``minimum`` or
        ``reversal+L``: where a measured precursor is taken.
    lags_years : tuple of float
        The lags L that ``auto`` may take (years after the final reversal).
    as_of : str, float or None
        Forecast with only what was known before this date (ISO date or
        decimal year; :mod:`pipeline.asof`); None uses all the data.
    """

    method: str = "ols"
    min_cycles: int = 4
    precursor_kind: str = "dipole"
    window_years: float = 0.5
    lag_years: float | None = None
    through_origin: bool = False
    phase: str = "auto"
    lags_years: tuple = (2.0, 3.0, 4.0, 5.0, 6.0)
    as_of: str | float | None = None

    def __post_init__(self):
        from pipeline.asof import check_as_of
        from pipeline.precursor import PRECURSOR_KINDS, check_lags_years, check_phase_request

        # frozen: the phase, lags and date are stored in their canonical form
        object.__setattr__(self, "phase", check_phase_request("forecast.phase", self.phase))
        object.__setattr__(self, "lags_years", check_lags_years("forecast.lags_years", self.lags_years))
        object.__setattr__(self, "as_of", check_as_of("forecast.as_of", self.as_of))

        check_choice("forecast.method", self.method, METHODS)
        check_number("forecast.min_cycles", self.min_cycles, lo=4, integer=True)
        check_choice("forecast.precursor_kind", self.precursor_kind, PRECURSOR_KINDS)
        check_number("forecast.window_years", self.window_years, lo=0.0, hi=5.0, lo_open=True)
        if self.lag_years is not None:
            check_number("forecast.lag_years", self.lag_years, lo=0.0, hi=15.0)
            as_phase = reversal_phase(self.lag_years)
            if self.phase not in ("auto", as_phase):
                raise ConfigError(f"forecast.lag_years: got {self.lag_years!r} with forecast.phase {self.phase!r}; "
                                  f"lag_years means phase {as_phase!r}: give one of the two")
            object.__setattr__(self, "phase", as_phase)  # never a key that is read and then ignored
        if not isinstance(self.through_origin, bool):
            raise ConfigError(f"forecast.through_origin: got {self.through_origin!r}; expected true or false")
        _check_origin_method(self.method, self.through_origin)


class FitError(ValueError):
    """A calibration fit that cannot be trusted (e.g. ODRPACK did not converge); one-line reason."""


class InsufficientCalibrationError(ValueError):
    """Fewer calibration rows of the precursor's phase than a forecast needs; one-line reason.

    Attributes
    ----------
    phase : str
        The precursor's phase.
    n_matching, n_needed : int
        Rows of that phase; rows needed (``ForecastSettings.min_cycles``).
    phase_counts : dict
        Rows of each phase the table has.
    """

    def __init__(self, message: str, *, phase: str, n_matching: int, n_needed: int, phase_counts: dict):
        super().__init__(message)
        self.phase, self.n_matching, self.n_needed = phase, n_matching, n_needed
        self.phase_counts = dict(phase_counts)


class ScaleMismatchError(ValueError):
    """The calibration rows declare a scale other than the one in force (or several); one line naming both.

    Attributes
    ----------
    table_scales : tuple of str
        The distinct scales the rows declare (as first written).
    scale_in_force : str or None
    """

    def __init__(self, message: str, *, table_scales: tuple, scale_in_force: str | None):
        super().__init__(message)
        self.table_scales, self.scale_in_force = tuple(table_scales), scale_in_force


@dataclass(frozen=True)
class CalibrationTable:
    """Past cycles: precursor (gauss) and next-cycle amplitude (sunspot number).

    ``precursor_error`` / ``amplitude_error`` are None when the file has no
    such column; within a column NaN means the row's error is unknown.
    ``phase`` and ``scale`` give each row's phase (:func:`parse_phase`
    spelling; all ``minimum`` when not given) and declared scale (``""`` when
    not declared).  ``problems`` lists one-line reasons for rows left out;
    ``notes`` says how the table was read (e.g. without a phase column).
    """

    cycle: tuple
    precursor: np.ndarray
    amplitude: np.ndarray
    precursor_error: np.ndarray | None = None
    amplitude_error: np.ndarray | None = None
    problems: list = field(default_factory=list)
    phase: tuple | None = None
    scale: tuple | None = None
    notes: list = field(default_factory=list)

    def __post_init__(self):
        n = int(np.asarray(self.precursor).size)
        # frozen dataclass: fill the per-row defaults once, on construction
        if self.phase is None:
            object.__setattr__(self, "phase", (DEFAULT_PHASE,) * n)
        if self.scale is None:
            object.__setattr__(self, "scale", ("",) * n)
        object.__setattr__(self, "phase", tuple(self.phase))
        object.__setattr__(self, "scale", tuple("" if s is None else str(s) for s in self.scale))
        for name in ("cycle", "amplitude", "precursor_error", "amplitude_error", "phase", "scale"):
            value = getattr(self, name)
            if value is not None and len(value) != n:
                raise ValueError(f"{name}: got {len(value)} values for {n} precursors; give one per row")

    @property
    def n_cycles(self) -> int:
        return int(self.precursor.size)

    def phase_counts(self) -> dict:
        """Rows of each phase, in the order the phases first appear."""
        counts: dict = {}
        for ph in self.phase:
            counts[ph] = counts.get(ph, 0) + 1
        return counts

    def _take(self, keep) -> "CalibrationTable":
        idx = np.flatnonzero(np.asarray(keep, dtype=bool))

        def sub(a):
            return None if a is None else np.asarray(a)[idx]

        return CalibrationTable(tuple(self.cycle[i] for i in idx), sub(self.precursor), sub(self.amplitude),
                                sub(self.precursor_error), sub(self.amplitude_error), list(self.problems),
                                tuple(self.phase[i] for i in idx), tuple(self.scale[i] for i in idx),
                                list(self.notes))


@dataclass(frozen=True)
class LineFit:
    """A fitted straight line ``y = intercept + slope * x`` and what a new point needs.

    Attributes
    ----------
    method : str
    intercept, slope : float
        On the method's scale (log scale for ``loglinear``); intercept 0 through the origin.
    cov : numpy.ndarray
        2x2 covariance of (intercept, slope) (intercept row and column zero through the origin).
    new_point_variance : float
        Variance of a new observation about the line (excluding the parameter
        uncertainty), on the method's scale.
    dof : int
        Degrees of freedom of the Student-t quantile (n - 2; n - 1 through the origin).
    x_transform, y_transform : str
        ``"identity"`` or ``"log"`` (the scale the line is fitted on).
    odr_terms : dict or None
        For ``odr``: ``res_var`` and the mean squared errors, to rebuild the
        new-point variance for a precursor with its own error.
    through_origin : bool
        The line was fitted without an intercept.
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
    through_origin: bool = False


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
    phase: str = DEFAULT_PHASE
    scale: str = ""
    scale_override: dict | None = None
    r_interval_95: tuple | None = None
    through_origin: bool = False
    interval_inflation: float = 1.0
    loo_se_ratio: float = math.nan
    calibration_notes: tuple = ()

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
            "phase": self.phase,
            "scale": self.scale,
            "scale_override": None if self.scale_override is None else dict(self.scale_override),
            "r_interval_95": None if self.r_interval_95 is None else list(self.r_interval_95),
            "through_origin": self.through_origin,
            "interval_inflation": self.interval_inflation,
            "loo_se_ratio": self.loo_se_ratio,
            "calibration_notes": list(self.calibration_notes),
        }


def _as_xy(x, y, name_x="precursor", name_y="amplitude", *, through_origin=False):
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    if x.ndim != 1 or x.shape != y.shape:
        raise ValueError(f"{name_x} and {name_y}: expected 1-D arrays of one length, got shapes {x.shape} and {y.shape}")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise ValueError(f"{name_x} and {name_y}: all values must be finite; drop incomplete cycles")
    if x.size < 3:
        raise ValueError(f"{name_x}: got {x.size} cycles; a straight line with a prediction interval needs at least 3")
    if through_origin:
        if not np.any(x != 0):
            raise ValueError(f"{name_x}: all values are 0; the slope through the origin is undefined")
    elif np.ptp(x) == 0:
        raise ValueError(f"{name_x}: all values equal ({float(x[0])!r}); the slope is undefined")
    return x, y


#: methods that can fit a line through the origin (``through_origin=True``)
ORIGIN_METHODS = ("ols", "odr")


def _check_origin_method(method: str, through_origin: bool, key: str = "forecast.through_origin") -> None:
    if through_origin and method not in ORIGIN_METHODS:
        raise ConfigError(f"{key}: got true with method {method!r}, which cannot fit through the origin "
                          f"(a power law A = exp(a) P^b already passes through it; a zero log-scale intercept "
                          f"would fix A = 1 at P = 1 G, which depends on the units); use method "
                          f"{' or '.join(map(repr, ORIGIN_METHODS))}, or through_origin = false")


def fit_ols(precursor, amplitude, precursor_error=None, amplitude_error=None, *,
            through_origin: bool = False) -> LineFit:
    """Ordinary least squares of amplitude on precursor.

    Parameters
    ----------
    precursor : array_like
        Precursor per calibration cycle (gauss).
    amplitude : array_like
        Next-cycle amplitude (sunspot number).
    precursor_error, amplitude_error : array_like, optional
        Ignored (accepted so that every method has one signature).
    through_origin : bool
        Fit ``amplitude = slope * precursor`` (no intercept).

    Notes
    -----
    With :math:`S_{xx} = \\sum (x_i - \\bar x)^2` and residual variance
    :math:`s^2 = \\sum r_i^2 / (n - 2)`, slope :math:`b = \\sum (x_i-\\bar x)(y_i-\\bar y)/S_{xx}`,
    and :math:`\\mathrm{cov}(a, b) = s^2 (X^T X)^{-1}` (Draper & Smith 1998, ch. 1).

    Through the origin, :math:`b = \\sum x_i y_i / \\sum x_i^2`,
    :math:`s^2 = \\sum (y_i - b x_i)^2 / (n - 1)`, :math:`\\mathrm{var}(b) = s^2 / \\sum x_i^2`,
    and the prediction variance of a new cycle is :math:`s^2 (1 + x_0^2/\\sum x_i^2)` with
    n - 1 degrees of freedom (Eisenhauer 2003; the model matrix without its column of ones in
    Draper & Smith 1998).

    References
    ----------
    Draper, N. R. & Smith, H. 1998, *Applied Regression Analysis*, 3rd ed., Wiley.
    Eisenhauer, J. G. 2003, "Regression through the origin", Teaching Statistics 25, 76.
    """
    x, y = _as_xy(precursor, amplitude, through_origin=through_origin)
    return _ols_origin_xy(x, y, "ols") if through_origin else _ols_xy(x, y, "ols")


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


def _ols_origin_xy(x: np.ndarray, y: np.ndarray, method: str) -> LineFit:
    n = x.size
    sxx = float(np.sum(x ** 2))
    # Eisenhauer (2003): b = sum(x y) / sum(x^2), s^2 = RSS / (n - 1), var(b) = s^2 / sum(x^2)
    slope = float(np.sum(x * y) / sxx)
    s2 = float(np.sum((y - slope * x) ** 2) / (n - 1))
    cov = np.array([[0.0, 0.0], [0.0, s2 / sxx]])
    return LineFit(method, 0.0, slope, cov, s2, n - 1, through_origin=True)


def _check_errors(name: str, err, n: int) -> np.ndarray:
    if err is None:
        raise ValueError(f"{name}: method 'odr' needs errors in both variables; add {name} columns to the "
                         f"calibration table or use method 'ols'")
    e = np.asarray(err, dtype=np.float64)
    if e.shape == (n,) and np.any(np.isnan(e)) and np.all(np.isnan(e) | (e > 0)):
        missing = int(np.sum(np.isnan(e)))
        raise ValueError(f"{name}: method 'odr' needs an error for every cycle; {missing} of {n} have none "
                         f"(blank cells); give them or use method 'ols'")
    if e.shape != (n,) or not np.all(np.isfinite(e)) or np.any(e <= 0):
        raise ValueError(f"{name}: expected {n} finite positive errors, got {err!r}")
    return e


def _scipy_odr():
    with warnings.catch_warnings():
        # scipy.odr is deprecated from SciPy 1.17 (kept until 1.19); the issue asks for it
        warnings.simplefilter("ignore", DeprecationWarning)
        from scipy import odr
    return odr


def _origin_line_model(odr):
    """y = beta[0] x with its analytic derivatives (scipy.odr.Model; shapes as scipy's unilinear)."""
    return odr.Model(lambda beta, x: beta[0] * x,
                     fjacb=lambda beta, x: x.reshape((1,) + x.shape),
                     fjacd=lambda beta, x: np.full(x.shape, beta[0]))


def fit_odr(precursor, amplitude, precursor_error=None, amplitude_error=None, *,
            max_iterations: int = 1000, through_origin: bool = False) -> LineFit:
    """Orthogonal distance regression of amplitude on precursor (errors in both).

    Parameters
    ----------
    precursor, amplitude : array_like
        As :func:`fit_ols`.
    precursor_error, amplitude_error : array_like
        One-sigma errors (gauss; sunspot number); required.
    max_iterations : int
        ODRPACK's iteration limit (``maxit``).
    through_origin : bool
        Fit ``amplitude = slope * precursor`` (no intercept; n - 1 degrees of freedom).

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
    with ODRPACK through ``scipy.odr`` (Boggs & Rogers 1990), with :math:`a = 0` through the
    origin.  The residual variance :math:`\\chi^2/(n-p)` ("res_var", p the number of
    parameters) rescales the stated errors to the scatter actually seen.  A new cycle with
    typical errors is assumed to scatter about the line with variance
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
    x, y = _as_xy(precursor, amplitude, through_origin=through_origin)
    sx = _check_errors("precursor_error", precursor_error, x.size)
    sy = _check_errors("amplitude_error", amplitude_error, x.size)
    odr = _scipy_odr()
    check_number("max_iterations", max_iterations, lo=1, integer=True)
    data = odr.RealData(x, y, sx=sx, sy=sy)
    if through_origin:
        # Boggs & Rogers (1990): ODRPACK on y = b x (analytic derivatives), started from the OLS slope
        job = odr.ODR(data, _origin_line_model(odr), beta0=[float(np.sum(x * y) / np.sum(x * x))],
                      sstol=1e-15, partol=1e-15, maxit=int(max_iterations))
    else:
        # Boggs & Rogers (1990): ODRPACK weighted orthogonal distance regression; scipy's unilinear
        # model (beta = [slope, intercept], analytic derivatives), started from the OLS line
        job = odr.ODR(data, odr.unilinear, beta0=np.polyfit(x, y, 1), sstol=1e-15, partol=1e-15,
                      maxit=int(max_iterations))
    out = job.run()
    _check_odr_converged(out, x.size)
    res_var = float(out.res_var)
    cov_beta = np.asarray(out.cov_beta, dtype=np.float64)
    if through_origin:
        slope, intercept = float(out.beta[0]), 0.0
        cov = np.array([[0.0, 0.0], [0.0, res_var * float(cov_beta[0, 0])]])
    else:
        slope, intercept = (float(v) for v in out.beta)
        # reorder to (intercept, slope); scipy's cov_beta is unscaled: sd_beta^2 = diag(cov_beta) res_var
        cov = res_var * cov_beta[::-1, ::-1]
    # Orear (1982): effective variance sigma_y^2 + b^2 sigma_x^2 of a point about the line
    mean_sy2, mean_sx2 = float(np.mean(sy ** 2)), float(np.mean(sx ** 2))
    new_var = res_var * float(np.mean(sy ** 2 + slope ** 2 * sx ** 2))
    return LineFit("odr", intercept, slope, cov, new_var, x.size - (1 if through_origin else 2),
                   odr_terms={"res_var": res_var, "mean_sy2": mean_sy2, "mean_sx2": mean_sx2},
                   through_origin=through_origin)


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


def fit_loglinear(precursor, amplitude, precursor_error=None, amplitude_error=None, *,
                  through_origin: bool = False) -> LineFit:
    """OLS of ln(amplitude) on ln(precursor): a power law with multiplicative scatter.

    Parameters
    ----------
    precursor, amplitude : array_like
        As :func:`fit_ols` (positive).
    precursor_error, amplitude_error : array_like, optional
        Ignored.
    through_origin : bool
        Must be False: refused with a :class:`pipeline.config.ConfigError`
        (see :data:`ORIGIN_METHODS`).

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
    _check_origin_method("loglinear", through_origin, "through_origin")
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


def fit_line(precursor, amplitude, method: str = "ols", precursor_error=None, amplitude_error=None, *,
             through_origin: bool = False) -> LineFit:
    """Fit a calibration with the named method (:data:`METHODS`), as :func:`forecast_amplitude` does.

    Parameters
    ----------
    precursor, amplitude : array_like
        Gauss; sunspot number.
    method : str
        ``ols``, ``odr`` or ``loglinear``.
    precursor_error, amplitude_error : array_like, optional
        One-sigma errors (``odr`` needs both).
    through_origin : bool
        No intercept (``ols`` and ``odr`` only).
    """
    fitter = _method(method)
    _check_origin_method(method, through_origin, "through_origin")
    return fitter(precursor, amplitude, precursor_error, amplitude_error, through_origin=through_origin)


def _predictive(fit: LineFit, precursor, precursor_error):
    """(point, standard deviation, degrees of freedom) of a new cycle on the fit's scale."""
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
    return fit.intercept + fit.slope * x0, math.sqrt(estimated_var + known_var), dof


def predict(fit: LineFit, precursor: float, level: float = LEVEL_95, precursor_error: float | None = None, *,
            inflation: float = 1.0):
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
    inflation : float
        Factor (> 0) on the interval's half-width, on the fit's scale (the
        log scale for ``loglinear``); see :func:`loo_interval_inflation`.

    Returns
    -------
    (float, float, float)
        Amplitude, interval low, interval high (sunspot number).

    Notes
    -----
    :math:`\\hat y_0 \\pm k\\,t_{\\nu,(1+\\mathrm{level})/2}\\sqrt{V}`, k the inflation,
    :math:`V = \\sigma^2_{new} + [1, x_0]\\,C\\,[1, x_0]^T + V_{x0}`.

    Without a precursor error, :math:`V_{x0} = 0` and :math:`\\nu = n - 2`;
    for OLS this is :math:`s\\sqrt{1 + 1/n + (x_0-\\bar x)^2/S_{xx}}`, the
    prediction interval for a new observation (Draper & Smith 1998, sec. 1.4);
    through the origin :math:`s\\sqrt{1 + x_0^2/\\sum x_i^2}` with
    :math:`\\nu = n - 1`.

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
    check_number("inflation", inflation, lo=0.0, lo_open=True)
    yhat, sd, dof = _predictive(fit, precursor, precursor_error)
    half = float(stats.t.ppf(0.5 + level / 2.0, dof)) * sd * float(inflation)
    lo, hi = yhat - half, yhat + half
    if fit.y_transform == "log":
        return math.exp(yhat), math.exp(lo), math.exp(hi)
    return float(yhat), float(lo), float(hi)


def _loo_terms(x, y, method, sx, sy, through_origin):
    """Per cycle, from the fit to all the others: the predicted amplitude, the error on the fit's
    scale (actual - predicted) and the prediction standard deviation the fit states there."""
    fitter = _method(method)
    _check_origin_method(method, through_origin, "through_origin")
    x, y = _as_xy(x, y, through_origin=through_origin)
    if x.size < 4:
        raise ValueError(f"precursor: got {x.size} cycles; leave-one-out needs at least 4")
    sx = None if sx is None else np.asarray(sx, dtype=np.float64)
    sy = None if sy is None else np.asarray(sy, dtype=np.float64)
    fitter(x, y, sx, sy, through_origin=through_origin)  # the whole table first: its errors name the table
    pred, err, sd = np.empty(x.size), np.empty(x.size), np.empty(x.size)
    for i in range(x.size):
        keep = np.arange(x.size) != i
        fit = fitter(x[keep], y[keep], None if sx is None else sx[keep], None if sy is None else sy[keep],
                     through_origin=through_origin)
        yhat, sd[i], _ = _predictive(fit, x[i], None)
        log = fit.y_transform == "log"
        err[i] = (math.log(y[i]) if log else y[i]) - yhat
        pred[i] = math.exp(yhat) if log else yhat
    return y, pred, err, sd


def leave_one_out(precursor, amplitude, method: str = "ols", precursor_error=None, amplitude_error=None, *,
                  through_origin: bool = False):
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
    y, pred, _, _ = _loo_terms(precursor, amplitude, method, precursor_error, amplitude_error, through_origin)
    # Stone (1974): cross-validatory assessment by leaving one out
    return pred, float(np.sqrt(np.mean((y - pred) ** 2)))


def loo_interval_inflation(precursor, amplitude, method: str = "ols", precursor_error=None,
                           amplitude_error=None, *, through_origin: bool = False) -> dict:
    """The factor on the prediction intervals' half-widths from leave-one-out cross-validation.

    The rule: each calibration cycle i is predicted by the fit to all the
    others, which states a prediction standard deviation :math:`\\sigma_{(-i)}`
    for it (:func:`predict`'s :math:`\\sqrt V` at :math:`x_i`, no stated
    precursor error).  When the leave-one-out RMSE exceeds the rms of those
    stated standard deviations, the forecast's intervals are too narrow for
    the errors the method actually makes, and their half-widths are
    multiplied by the ratio; otherwise they are kept (never narrowed).

    Returns
    -------
    dict
        ``loo_rmse`` (sunspot number: the RMSE of :func:`leave_one_out`),
        ``loo_rmse_fit_scale`` and ``prediction_se_rms`` (on the fit's scale:
        sunspot number, or ln(amplitude) for ``loglinear``), ``ratio`` (their
        quotient) and ``inflation`` (``max(ratio, 1)``).

    Notes
    -----
    :math:`k = \\max\\left(1, \\sqrt{\\sum_i e_{(-i)}^2 / \\sum_i \\sigma_{(-i)}^2}\\right)`,
    :math:`e_{(-i)} = y_i - \\hat y_{(-i)}(x_i)` on the fit's scale.  Comparing
    each left-out error with the standard deviation its own fit states is the
    like-for-like choice: for OLS :math:`\\sigma_{(-i)}^2 = s_{(-i)}^2/(1-h_{ii})`
    and :math:`e_{(-i)} = e_i/(1-h_{ii})`, so :math:`e_{(-i)}/\\sigma_{(-i)}` is
    the externally studentised residual, Student-t with n - 3 degrees of
    freedom under the model (Belsley, Kuh & Welsch 1980), and the ratio is
    near 1 for a table the model describes.  The residual standard error s, or
    the full fit's prediction standard error at the calibration precursors
    :math:`s\\sqrt{1+h_{ii}}`, would sit below the leave-one-out error even on
    such a table and widen nearly always.  Widening by the excess of the
    cross-validated over the stated error is common practice (no source).
    On a table the model describes the ratio is near 1, so the rule fires on
    about 40% of such 9-cycle tables, by a few percent; since it never
    narrows, it over-covers a little (measured over seeded 9-cycle tables:
    0.697 at 68.27% and 0.955 at 95%, against 0.684 and 0.951 unwidened;
    tests/test_regression.py).  An outlier of low leverage inflates the
    residual variance of the fits too, so it widens the stated errors
    itself and the ratio stays near 1; one of high leverage (at an end of
    the precursor range) bends the line and raises the ratio.

    References
    ----------
    Stone, M. 1974, Journal of the Royal Statistical Society B 36, 111.
    Belsley, D. A., Kuh, E. & Welsch, R. E. 1980, *Regression Diagnostics*, Wiley.
    """
    y, pred, err, sd = _loo_terms(precursor, amplitude, method, precursor_error, amplitude_error, through_origin)
    loo_fit = float(np.sqrt(np.mean(err ** 2)))
    se_rms = float(np.sqrt(np.mean(sd ** 2)))
    ratio = loo_fit / se_rms if se_rms > 0 else math.inf
    return {"loo_rmse": float(np.sqrt(np.mean((y - pred) ** 2))), "loo_rmse_fit_scale": loo_fit,
            "prediction_se_rms": se_rms, "ratio": ratio, "inflation": max(ratio, 1.0)}


def pearson_r_interval(precursor, amplitude, level: float = LEVEL_95):
    """Pearson's r of a table with its confidence interval by Fisher's z transform.

    Parameters
    ----------
    precursor, amplitude : array_like
    level : float
        Central probability of the interval (default 0.95).

    Returns
    -------
    (float, float, float)
        r, interval low, interval high; the interval is (nan, nan), unresolved,
        for fewer than 4 cycles or |r| = 1.

    Notes
    -----
    :math:`z = \\operatorname{artanh} r` is close to normal with standard error
    :math:`1/\\sqrt{n-3}`; the interval is
    :math:`\\tanh(z \\pm z_{(1+\\mathrm{level})/2}/\\sqrt{n-3})` (Fisher 1921).
    It is approximate for bivariate-normal data (coverage checked by seeded
    Monte Carlo in tests/test_regression.py).

    References
    ----------
    Fisher, R. A. 1921, "On the 'probable error' of a coefficient of correlation deduced from a
    small sample", Metron 1, 3.
    """
    check_number("level", level, lo=0.0, hi=1.0, lo_open=True)
    if not level < 1.0:
        raise ValueError(f"level: got {level!r}; expected a probability below 1")
    x, y = _as_xy(precursor, amplitude)
    if np.ptp(y) == 0:
        raise ValueError(f"amplitude: all values equal ({float(y[0])!r}); the correlation is undefined")
    r = float(np.clip(np.corrcoef(x, y)[0, 1], -1.0, 1.0))
    n = x.size
    if n < 4 or abs(r) == 1.0:
        return r, math.nan, math.nan
    # Fisher (1921): z = artanh r, standard error 1/sqrt(n - 3)
    half = float(stats.norm.ppf(0.5 + level / 2.0)) / math.sqrt(n - 3)
    z = math.atanh(r)
    return r, math.tanh(z - half), math.tanh(z + half)


def select_phase(table: CalibrationTable, phase: str) -> CalibrationTable:
    """The rows of ``table`` whose phase is ``phase`` (any spelling :func:`parse_phase` accepts).

    ``problems`` and ``notes`` are carried over unchanged.
    """
    want = parse_phase(phase)
    return table._take([ph == want for ph in table.phase])


def _counts_text(counts: dict) -> str:
    if not counts:
        return "no usable rows"
    return "rows of phase " + ", ".join(f"{ph!r}: {k}" for ph, k in counts.items())


def _insufficient(table: CalibrationTable, phase: str, n_needed: int) -> InsufficientCalibrationError:
    counts = table.phase_counts()
    k = counts.get(phase, 0)
    return InsufficientCalibrationError(
        f"calibration table: got {k} cycles; at least {n_needed} are needed for a forecast with honest intervals "
        f"at phase {phase!r} (the table has {_counts_text(counts)}); add cycles of phase {phase!r} to the table "
        f"or take the precursor at a phase the table has",
        phase=phase, n_matching=k, n_needed=n_needed, phase_counts=counts)


def _declared_scales(table: CalibrationTable) -> dict:
    """Normalised scale -> the spelling first written, for the rows that declare one."""
    seen: dict = {}
    for s in table.scale:
        key = normalise_scale(s)
        if key and key not in seen:
            seen[key] = s.strip()
    return seen


def check_scale(table: CalibrationTable, scale_in_force: str | None, allow_mismatch: bool = False) -> dict | None:
    """Check that the calibration rows measure what the precursor in force measures.

    Parameters
    ----------
    table : CalibrationTable
        The rows to be fitted (usually :func:`select_phase` of the table).
    scale_in_force : str or None
        The precursor's scale (the store's measurement definition, e.g.
        :func:`describe_scale`); None or ``""`` when unknown (a precursor
        given by hand): then only the rows' agreement with each other is checked.
    allow_mismatch : bool
        Go on despite a mismatch, and return a record of the override.

    Returns
    -------
    dict or None
        None when nothing was overridden (the declared scale equals the one in
        force, or nothing is declared to compare); otherwise the override
        record ``{"table_scales": [...], "scale_in_force": ..., "message": ...}``.

    Raises
    ------
    ScaleMismatchError
        When not allowed and the rows declare a scale other than the one in
        force, or declare several scales (rows that declare none are not
        compared).  The message is one line naming both.

    Notes
    -----
    Scales are compared by :func:`normalise_scale` (parts in any order,
    without case).  Regressing a precursor on a calibration of another scale
    (another instrument, cap latitude, B0 method or precursor kind) would
    mix quantities that differ by calibration factors; hence the refusal
    (common practice, no source).
    """
    declared = _declared_scales(table)
    shown = tuple(declared.values())
    in_force = None if scale_in_force is None or not normalise_scale(scale_in_force) else str(scale_in_force).strip()
    if len(declared) > 1:
        what = (f"calibration table: its rows declare {len(declared)} different scales "
                f"({', '.join(map(repr, shown))})")
        fix = "one fit must regress like on like: keep the rows of one scale"
    elif declared and in_force is not None and normalise_scale(in_force) not in declared:
        what = f"calibration table scale {shown[0]!r} differs from the scale in force {in_force!r}"
        fix = ("calibrate on precursors measured the same way, or allow the mismatch explicitly "
               "(--allow-scale-mismatch)")
    else:
        return None
    if not allow_mismatch:
        raise ScaleMismatchError(f"{what}; {fix}", table_scales=shown, scale_in_force=in_force)
    # the scales themselves may hold ';', so the recorded message is built from its parts, never split
    return {"table_scales": list(shown), "scale_in_force": in_force, "message": "scale mismatch allowed: " + what}


def merge_tables(a: CalibrationTable, b: CalibrationTable, *, names: tuple = ("first table", "second table")
                 ) -> CalibrationTable:
    """Join two calibration tables where phase and scale match.

    Every row of ``a`` is kept.  A row of ``b`` joins only when ``a`` has rows
    of the same phase and the same scale (:func:`normalise_scale`; an
    undeclared scale matches only an undeclared one); a row of ``b`` for a
    cycle, phase and scale ``a`` already gives is dropped when its values
    are the same and refused when they differ.  Each row left out gets a
    one-line reason in ``problems``; the two tables' own problems and notes
    follow, each prefixed by its table's name.

    Parameters
    ----------
    a, b : CalibrationTable
    names : (str, str)
        How the two tables are named in the reasons (e.g. their file names).

    Returns
    -------
    CalibrationTable
        Error columns are kept when either table has them (NaN where a row's
        table had none).
    """
    name_a, name_b = names
    kinds = {(ph, normalise_scale(s)) for ph, s in zip(a.phase, a.scale)}
    index_a = {(c, ph, normalise_scale(s)): i for i, (c, ph, s) in enumerate(zip(a.cycle, a.phase, a.scale))}
    have = "; ".join(f"phase {ph!r} scale {sc!r}" for ph, sc in sorted(kinds)) or "no rows"
    keep_b, refused = [], []
    for j, (c, ph, s) in enumerate(zip(b.cycle, b.phase, b.scale)):
        key = (ph, normalise_scale(s))
        where = f"{name_b}: cycle {c!r} (phase {ph!r}, scale {s!r})"
        if key not in kinds:
            refused.append(f"{where} left out: {name_a} has no rows of that phase and scale ({have})")
            continue
        i = index_a.get((c,) + key)
        if i is not None:
            same = (a.precursor[i] == b.precursor[j] and a.amplitude[i] == b.amplitude[j])
            if not same:
                refused.append(f"{where} left out: {name_a} gives precursor {a.precursor[i]:g}, amplitude "
                               f"{a.amplitude[i]:g}; {name_b} gives {b.precursor[j]:g}, {b.amplitude[j]:g}")
            continue
        keep_b.append(j)
    nb = len(keep_b)

    def errors(ea, eb):
        if ea is None and eb is None:
            return None
        ea = np.full(a.n_cycles, math.nan) if ea is None else np.asarray(ea, dtype=np.float64)
        eb = np.full(nb, math.nan) if eb is None else np.asarray(eb, dtype=np.float64)[keep_b]
        return np.concatenate([ea, eb])

    return CalibrationTable(
        cycle=tuple(a.cycle) + tuple(b.cycle[j] for j in keep_b),
        precursor=np.concatenate([a.precursor, b.precursor[keep_b]]),
        amplitude=np.concatenate([a.amplitude, b.amplitude[keep_b]]),
        precursor_error=errors(a.precursor_error, b.precursor_error),
        amplitude_error=errors(a.amplitude_error, b.amplitude_error),
        problems=[f"{name_a}: {p}" for p in a.problems] + [f"{name_b}: {p}" for p in b.problems] + refused,
        phase=tuple(a.phase) + tuple(b.phase[j] for j in keep_b),
        scale=tuple(a.scale) + tuple(b.scale[j] for j in keep_b),
        notes=[f"{name_a}: {n}" for n in a.notes] + [f"{name_b}: {n}" for n in b.notes])


def forecast_amplitude(table: CalibrationTable, precursor: float, settings: ForecastSettings | None = None, *,
                       method: str | None = None, precursor_error: float | None = None,
                       phase: str = DEFAULT_PHASE, scale: str | None = None,
                       allow_scale_mismatch: bool = False) -> Forecast:
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
    phase : str
        The precursor's phase (:func:`parse_phase`); only the table's rows of
        this phase are fitted.
    scale : str, optional
        The precursor's scale (the measurement definition in force); checked
        against the rows' declared scale (:func:`check_scale`).
    allow_scale_mismatch : bool
        Forecast despite a scale mismatch; the output records the override
        (``scale_override`` and a warning).

    Returns
    -------
    Forecast
        Amplitude (sunspot number), 68.27% and 95% prediction intervals
        (widened by ``interval_inflation`` when the leave-one-out RMSE exceeds
        the stated prediction error, :func:`loo_interval_inflation`), method,
        number of cycles of the phase, Pearson r with its 95% Fisher-z interval,
        leave-one-out RMSE, phase, scale (the one in force, else the rows'
        declared one, else ""), warnings (extrapolation, widening, scale
        override), the table's notes and the cautions.

    Raises
    ------
    InsufficientCalibrationError
        Fewer than ``settings.min_cycles`` rows of the precursor's phase.
    ScaleMismatchError
        The rows declare another scale than ``scale`` (or several), not allowed.
    pipeline.config.ConfigError
        ``through_origin`` with a method that cannot fit through the origin.
    FitError
        The fit cannot be trusted (ODRPACK did not converge).
    ValueError
        An unknown method or phase, or a method the table cannot support.
    """
    settings = settings or ForecastSettings()
    name = settings.method if method is None else method
    _method(name)
    origin = settings.through_origin
    _check_origin_method(name, origin)
    want = parse_phase(phase)
    rows = select_phase(table, want)
    override = check_scale(rows, scale, allow_scale_mismatch)
    n = rows.n_cycles
    if n < settings.min_cycles:
        raise _insufficient(table, want, settings.min_cycles)
    x, y, sx, sy = rows.precursor, rows.amplitude, rows.precursor_error, rows.amplitude_error
    fit = fit_line(x, y, name, sx, sy, through_origin=origin)
    loo = loo_interval_inflation(x, y, name, sx, sy, through_origin=origin)
    k = loo["inflation"]
    amp, lo68, hi68 = predict(fit, precursor, LEVEL_68, precursor_error, inflation=k)
    _, lo95, hi95 = predict(fit, precursor, LEVEL_95, precursor_error, inflation=k)
    r, r_lo, r_hi = pearson_r_interval(x, y, LEVEL_95)
    found = []
    lo_x, hi_x = float(np.min(x)), float(np.max(x))
    if not lo_x <= float(precursor) <= hi_x:
        found.append(f"precursor {float(precursor):g} lies outside the calibrated range [{lo_x:g}, {hi_x:g}]; "
                     f"the forecast is an extrapolation")
    if k > 1.0:
        on = " (on the log scale)" if fit.y_transform == "log" else ""
        found.append(f"the leave-one-out RMSE exceeds the prediction standard error the leave-one-out fits "
                     f"state by a factor {k:.3f}; the 68% and 95% intervals are widened by that factor{on}")
    if override is not None:
        found.append(override["message"])
    declared = tuple(_declared_scales(rows).values())
    in_force = "" if scale is None else str(scale).strip()
    notes = list(rows.notes)
    if in_force and not declared:
        notes.append(f"the calibration rows declare no scale; taken to be on the scale in force {in_force!r}")
    return Forecast(amplitude=amp, interval_68=(lo68, hi68), interval_95=(lo95, hi95), method=name,
                    n_cycles=n, r=r, loo_rmse=loo["loo_rmse"], precursor=float(precursor),
                    precursor_error=None if precursor_error is None else float(precursor_error),
                    intercept=fit.intercept, slope=fit.slope, calibrated_range=(lo_x, hi_x), warnings=found,
                    phase=want, scale=in_force or (declared[0] if len(declared) == 1 else ""),
                    scale_override=override,
                    r_interval_95=None if math.isnan(r_lo) else (r_lo, r_hi), through_origin=origin,
                    interval_inflation=k, loo_se_ratio=loo["ratio"], calibration_notes=tuple(notes))


#: the calibration CSV's column names (a header is recognised by these names only; case and
#: surrounding spaces are ignored): required, then the optional one-sigma errors, phase and scale
_COLUMNS = ("cycle", "precursor", "amplitude")
_ERROR_COLUMNS = ("precursor_error", "amplitude_error")
_LABEL_COLUMNS = ("phase", "scale")
_ACCEPTED = _COLUMNS + _ERROR_COLUMNS + _LABEL_COLUMNS
#: the columns of a calibration table made from the measured series (``amplitude_error`` follows
#: ``precursor_error`` when a table has amplitude errors)
SELF_CALIBRATION_COLUMNS = ("cycle", "precursor", "amplitude", "precursor_error", "phase", "scale")


def _calibration_header(path: Path, lineno: int, cells: list) -> list:
    """The header's column names, or ValueError naming the line, what is wrong and what is accepted."""
    names = [c.strip().lower() for c in cells]
    accepted = ",".join(_COLUMNS) + " (optionally " + ",".join(_ERROR_COLUMNS + _LABEL_COLUMNS) + ")"
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
    if "amplitude_error" in names and "precursor_error" not in names:
        raise ValueError(f"calibration file {path}: column amplitude_error given without precursor_error; "
                         f"give precursor_error too (method 'odr' needs both) or neither")
    return names


def _row_values(row: dict, numeric: tuple, lineno: int):
    """The row's numbers (blank error = unknown, NaN), or a one-line reason."""
    values = {}
    for c in numeric:
        raw = row[c]
        if c in _ERROR_COLUMNS and raw == "":
            values[c] = math.nan  # an error not known for this row
            continue
        try:
            values[c] = float(raw)
        except ValueError:
            values[c] = math.nan
        if not math.isfinite(values[c]):
            return None, f"line {lineno}: {c} {raw!r} is not a finite number; row left out"
        if c in _ERROR_COLUMNS and values[c] <= 0:
            return None, f"line {lineno}: {c} {raw!r} must be positive; row left out"
    return values, None


def read_calibration_csv(path: str | Path) -> CalibrationTable:
    """Read a calibration CSV: a header line naming the columns, then one row per past cycle.

    The header is the first line that is neither blank nor a ``#`` comment,
    and it is recognised by its column names only (case and surrounding
    spaces ignored), in any order: ``cycle``, ``precursor`` (gauss),
    ``amplitude`` (sunspot number), and optionally ``precursor_error``
    (one-sigma, gauss), ``amplitude_error`` (one-sigma, sunspot number; only
    with ``precursor_error``: no method uses amplitude errors alone, and
    ``odr`` needs both), ``phase`` (``minimum`` or ``reversal+L``,
    :func:`parse_phase`) and ``scale`` (free text: what the precursor
    measures).  A table without ``phase`` is read as ``minimum``, and
    ``notes`` says so; a blank ``scale`` is not declared.  A blank error
    cell is an unknown error (NaN: ``odr`` refuses the table, the others do
    not use errors).

    A data row that cannot be used (wrong number of cells, a missing or
    non-finite number, an error that is not positive, a phase that is not
    one, a cycle given twice at one phase and scale) is left out with a
    one-line reason, naming its line in the file, in ``problems``.

    Raises
    ------
    ValueError
        When the file cannot be read, has no header line, its first line is
        not a header (for instance a data row: the columns would be
        guessed), a column name is unknown, repeated or missing, or
        ``amplitude_error`` is given without ``precursor_error``.
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
    errors = tuple(c for c in _ERROR_COLUMNS if c in header)
    numeric = ("precursor", "amplitude") + errors
    labelled = "phase" in header or "scale" in header
    cycles, phases, scales, problems = [], [], [], []
    cols = {c: [] for c in numeric}
    first_line_of = {}
    for (lineno, _), cells in zip(lines[1:], rows[1:]):
        if len(cells) != len(header):
            problems.append(f"line {lineno}: {len(cells)} cells, the header names {len(header)} columns; "
                            f"row left out")
            continue
        row = {name: cell.strip() for name, cell in zip(header, cells)}
        values, reason = _row_values(row, numeric, lineno)
        if reason is None and "phase" in header:
            try:
                phase = parse_phase(row["phase"])
            except ValueError:
                reason = f"line {lineno}: phase {row['phase']!r} is not a phase (valid: {' or '.join(PHASE_FORMS)}); " \
                         f"row left out"
        else:
            phase = DEFAULT_PHASE
        if reason is not None:
            problems.append(reason)
            continue
        label, scale = row["cycle"], row.get("scale", "")
        key = (label, phase, normalise_scale(scale))
        if key in first_line_of:
            at = f" at phase {phase!r}" + (f" with scale {scale!r}" if scale else "") if labelled else ""
            problems.append(f"line {lineno}: cycle {label!r}{at} already given on line {first_line_of[key]}; "
                            f"row left out")
            continue
        first_line_of[key] = lineno
        cycles.append(label)
        phases.append(phase)
        scales.append(scale)
        for c in numeric:
            cols[c].append(values[c])
    notes = [] if "phase" in header else [
        f"calibration file {path}: no phase column; every row read as phase {DEFAULT_PHASE!r} "
        f"(the window around a cycle minimum)"]
    return CalibrationTable(
        cycle=tuple(cycles),
        precursor=np.array(cols["precursor"]),
        amplitude=np.array(cols["amplitude"]),
        precursor_error=np.array(cols["precursor_error"]) if "precursor_error" in errors else None,
        amplitude_error=np.array(cols["amplitude_error"]) if "amplitude_error" in errors else None,
        problems=problems, phase=tuple(phases), scale=tuple(scales), notes=notes)


def format_calibration_csv(table: CalibrationTable) -> str:
    """The calibration table as CSV text that :func:`read_calibration_csv` reads back unchanged.

    Columns :data:`SELF_CALIBRATION_COLUMNS` (``cycle,precursor,amplitude,
    precursor_error,phase,scale``), with ``amplitude_error`` after
    ``precursor_error`` when the table has amplitude errors.  Numbers are
    written in Python's shortest round-trip form; an unknown error is a blank
    cell.
    """
    columns = list(SELF_CALIBRATION_COLUMNS)
    if table.amplitude_error is not None:
        columns.insert(columns.index("precursor_error") + 1, "amplitude_error")

    def num(v):
        return "" if not math.isfinite(v) else repr(float(v))

    def err(a, i):
        return "" if a is None else num(float(a[i]))

    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(columns)
    for i in range(table.n_cycles):
        cells = {"cycle": table.cycle[i], "precursor": num(float(table.precursor[i])),
                 "amplitude": num(float(table.amplitude[i])), "precursor_error": err(table.precursor_error, i),
                 "amplitude_error": err(table.amplitude_error, i), "phase": table.phase[i],
                 "scale": table.scale[i]}
        writer.writerow([cells[c] for c in columns])
    return buf.getvalue()
