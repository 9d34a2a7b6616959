"""Sunspot-number smoothing and solar-cycle landmarks (minima and maxima).

The conventional 13-month running mean of monthly mean sunspot numbers is
computed by :func:`smooth_13_month`; :func:`cycle_landmarks` finds every
cycle minimum and maximum of the smoothed series with a hysteresis
("zig-zag") rule and minimum-separation pruning, so that noise, double peaks
and flat stretches give no spurious extrema.  :func:`current_minimum` gives
the minimum that starts the current cycle in real time: ``confirmed``,
``pending`` (the lowest smoothed value since the last maximum) or ``pinned``
by the forecaster.

Sunspot input (:func:`read_sunspot_file`) is either a plain two-column CSV
(date, value; :func:`read_monthly_csv`) or the semicolon-separated monthly
layout that the world data centre for the sunspot index publishes
(year;month;decimal year;mean;standard deviation;observations;definitive;
:func:`read_semicolon_monthly`).  The layout is detected unless declared
(``[cycles] sunspot_format``); a file matching neither is refused.

Every as-of result (``as_of=``) uses only the months that ended before the
date, truncated before smoothing, so later data cannot change it.

Times are decimal years (``pipeline.timeutil``); sunspot numbers are
dimensionless, and the extrema keep the input's own scale (the declared
``sunspot_number_version``, 1 or 2).
"""

from __future__ import annotations

import csv
import dataclasses
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pipeline.config import ConfigError, check_choice, check_number
from pipeline.timeutil import decimal_year

__all__ = [
    "CycleSettings",
    "MonthlySeries",
    "SMOOTHING_METHODS",
    "SUNSPOT_FORMATS",
    "MINIMUM_STATUSES",
    "smooth_13_month",
    "smoothed_series",
    "find_extrema",
    "cycle_landmarks",
    "current_minimum",
    "as_of_decimal_year",
    "months_ended_before",
    "detect_sunspot_format",
    "read_sunspot_file",
    "read_monthly_csv",
    "read_semicolon_monthly",
    "SEMICOLON_FIELDS",
    "parse_time_decimal_year",
    "HEADER_DATE_NAMES",
    "HEADER_VALUE_NAMES",
]

#: weights of the 13-month running mean (half weights on the two end months)
_WEIGHTS_13 = np.r_[0.5, np.ones(11), 0.5] / 12.0

#: sunspot file layouts ``[cycles] sunspot_format`` may name ("auto" detects one of the others)
SUNSPOT_FORMATS = ("auto", "plain-csv", "semicolon-monthly")

#: statuses of :func:`current_minimum`
MINIMUM_STATUSES = ("confirmed", "pending", "pinned", "unresolved")


@dataclass(frozen=True)
class CycleSettings:
    """How cycle landmarks are found (configuration section ``[cycles]``).

    Attributes
    ----------
    smoothing : str
        ``"13_month"`` (the conventional 13-month running mean with half
        weights on the end months) or ``"none"`` (the input is already
        smoothed).
    max_missing_months : int
        A smoothed value is computed only when at most this many of its 13
        months are missing (weights renormalised over the months present);
        0, the default, is the conventional definition.
    prominence : float or None
        Hysteresis threshold in sunspot-number units: an extremum is
        confirmed only once the smoothed series has moved away from it by at
        least this much.  ``None`` uses ``prominence_fraction`` times the
        range of the smoothed series.
    prominence_fraction : float
        See ``prominence`` (dimensionless, default 0.1).
    min_phase_years : float
        Minimum time between a minimum and the next maximum or a maximum and
        the next minimum (years, default 2.0; the shortest rise on record is
        close to 3 years).
    min_cycle_years : float
        Minimum time between successive minima and between successive maxima
        (years, default 7.0; the shortest cycle on record is about 9 years).
    confirm_fraction : float
        The last cycle's maximum is reported only once the smoothed series has
        fallen from it by this fraction of the cycle's rise (and by at least
        the prominence); until then it may still be rising and is null
        (dimensionless, default 0.5).
    sunspot_number_version : int
        Which sunspot-number scale the input is on, 1 (the series before the
        2015 recalibration) or 2 (the recalibrated series the data centre
        publishes now; the default, because that is what a file fetched today
        holds).  It cannot be told from the numbers, so it is declared and
        carried into every output; the extrema keep the input's scale.
    sunspot_format : str
        ``"auto"`` (default: detect, and say so), ``"plain-csv"`` (date,value)
        or ``"semicolon-monthly"`` (year;month;decimal year;mean;standard
        deviation;observations;definitive).  See :func:`read_sunspot_file`.
    pinned_minimum : float or None
        The current cycle's minimum fixed by the forecaster (decimal year);
        :func:`current_minimum` then reports it with status ``pinned``.  It
        must lie after the last cycle maximum and within the data.  ``None``
        (default): the minimum comes from the data.
    """

    smoothing: str = "13_month"
    max_missing_months: int = 0
    prominence: float | None = None
    prominence_fraction: float = 0.1
    min_phase_years: float = 2.0
    min_cycle_years: float = 7.0
    confirm_fraction: float = 0.5
    sunspot_number_version: int = 2
    sunspot_format: str = "auto"
    pinned_minimum: float | None = None

    def __post_init__(self):
        check_choice("cycles.smoothing", self.smoothing, SMOOTHING_METHODS)
        check_number("cycles.max_missing_months", self.max_missing_months, lo=0, hi=12, integer=True)
        if self.prominence is not None:
            check_number("cycles.prominence", self.prominence, lo=0.0, lo_open=True)
        check_number("cycles.prominence_fraction", self.prominence_fraction, lo=0.0, hi=1.0, lo_open=True)
        check_number("cycles.min_phase_years", self.min_phase_years, lo=0.0)
        check_number("cycles.min_cycle_years", self.min_cycle_years, lo=0.0)
        check_number("cycles.confirm_fraction", self.confirm_fraction, lo=0.0, hi=1.0)
        check_number("cycles.sunspot_number_version", self.sunspot_number_version, lo=1, hi=2, integer=True)
        check_choice("cycles.sunspot_format", self.sunspot_format, SUNSPOT_FORMATS)
        if self.pinned_minimum is not None:
            check_number("cycles.pinned_minimum", self.pinned_minimum, lo=0.0, hi=10000.0, lo_open=True)


@dataclass(frozen=True)
class MonthlySeries:
    """A monthly series on a gap-free monthly grid.

    Attributes
    ----------
    time_decimal_year : numpy.ndarray
        Time of each month (decimal years), one per consecutive month.
    values : numpy.ndarray
        Monthly mean sunspot number (NaN where missing).
    problems : list of str
        One-line reasons for input rows that could not be used.
    format : str
        The file layout it was read from (a key of :data:`SUNSPOT_FORMATS`
        other than ``"auto"``).
    format_source : str
        ``"declared"`` (the caller named the layout) or ``"detected"``
        (:func:`detect_sunspot_format` guessed it: a fallback to record).
    standard_deviation : numpy.ndarray or None
        Per month, the published standard deviation of the daily values
        (sunspot number; NaN where unknown); None for a plain CSV.
    n_observations : numpy.ndarray or None
        Per month, the number of observations (float, NaN where unknown);
        None for a plain CSV.
    definitive : numpy.ndarray or None
        Per month, True where the value is flagged definitive, False where it
        is provisional or the month is absent; None for a plain CSV.
    """

    time_decimal_year: np.ndarray
    values: np.ndarray
    problems: list = field(default_factory=list)
    format: str = "plain-csv"
    format_source: str = "declared"
    standard_deviation: np.ndarray | None = None
    n_observations: np.ndarray | None = None
    definitive: np.ndarray | None = None


def smooth_13_month(values, max_missing_months: int = 0) -> np.ndarray:
    """Conventional 13-month running mean of monthly values.

    Parameters
    ----------
    values : array_like
        Monthly means on consecutive months (NaN where missing).
    max_missing_months : int
        Allow up to this many missing months in a window, renormalising the
        weights over those present; 0 (default) requires all 13.

    Returns
    -------
    numpy.ndarray
        Same length as ``values``; NaN for the first and last 6 months and
        wherever too many months are missing.

    Notes
    -----
    .. math:: \\bar R_n = \\frac{1}{12}\\Big(\\tfrac12 R_{n-6} + \\sum_{k=-5}^{5} R_{n+k}
              + \\tfrac12 R_{n+6}\\Big)

    The running mean centred on month *n* over 13 months with half weights on
    the two end months, so that it spans exactly 12 months (Waldmeier 1961).

    References
    ----------
    Waldmeier, M. 1961, *The Sunspot-Activity in the Years 1610-1960*,
    Schulthess & Co., Zurich.
    """
    x = np.asarray(values, dtype=np.float64)
    if x.ndim != 1:
        raise ValueError(f"values: expected a 1-D monthly series, got shape {x.shape}")
    check_number("max_missing_months", max_missing_months, lo=0, hi=12, integer=True)
    n = x.size
    out = np.full(n, np.nan)
    if n < 13:
        return out
    present = np.isfinite(x)
    filled = np.where(present, x, 0.0)
    # Waldmeier (1961): weights 1/24, 1/12 x 11, 1/24 centred on the month.
    win = np.lib.stride_tricks.sliding_window_view
    num = win(filled, 13) @ _WEIGHTS_13
    wsum = win(present.astype(np.float64), 13) @ _WEIGHTS_13
    missing = 13 - win(present.astype(np.int64), 13).sum(axis=1)
    ok = (missing <= max_missing_months) & (wsum > 0)
    out[6:n - 6] = np.where(ok, num / np.where(wsum > 0, wsum, 1.0), np.nan)
    return out


#: smoothing methods by name: monthly values, max missing months -> smoothed values
SMOOTHING_METHODS = {
    "13_month": smooth_13_month,
    "none": lambda values, max_missing_months=0: np.asarray(values, dtype=np.float64).copy(),
}


def smoothed_series(values, settings: CycleSettings | None = None) -> np.ndarray:
    """Smooth monthly values with the method named in ``settings.smoothing``."""
    settings = settings or CycleSettings()
    try:
        method = SMOOTHING_METHODS[settings.smoothing]
    except KeyError:  # pragma: no cover - settings validate the name already
        raise ValueError(f"smoothing: got {settings.smoothing!r}; valid: {', '.join(SMOOTHING_METHODS)}") from None
    return method(values, settings.max_missing_months)


def _zigzag(t: np.ndarray, v: np.ndarray, threshold: float) -> tuple[list, tuple | None]:
    """Hysteresis extrema: ``[(index, kind)]`` confirmed, plus the pending one.

    An extremum is confirmed when the series has since moved away from it by
    at least ``threshold``; kinds alternate (+1 maximum, -1 minimum).  Plateaus
    report their middle sample.
    """
    confirmed: list = []
    hi_i = lo_i = 0
    hi_end = lo_end = 0          # last sample of a plateau at the running extreme
    direction = 0                # 0 unknown, +1 looking for a maximum, -1 for a minimum
    for i in range(1, v.size):
        if direction >= 0:
            if v[i] > v[hi_i]:
                hi_i = hi_end = i
            elif v[i] == v[hi_i] and hi_end == i - 1:
                hi_end = i
        if direction <= 0:
            if v[i] < v[lo_i]:
                lo_i = lo_end = i
            elif v[i] == v[lo_i] and lo_end == i - 1:
                lo_end = i
        if direction >= 0 and v[hi_i] - v[i] >= threshold and (direction == 1 or hi_i > lo_i):
            confirmed.append(((hi_i + hi_end) // 2, 1))
            direction, lo_i, lo_end = -1, i, i
        elif direction <= 0 and v[i] - v[lo_i] >= threshold and (direction == -1 or lo_i > hi_i):
            confirmed.append(((lo_i + lo_end) // 2, -1))
            direction, hi_i, hi_end = 1, i, i
    pending = None
    if direction == 1:
        pending = ((hi_i + hi_end) // 2, 1)
    elif direction == -1:
        pending = ((lo_i + lo_end) // 2, -1)
    return confirmed, pending


def _prune(t: np.ndarray, v: np.ndarray, ext: list, min_phase_years: float, min_cycle_years: float) -> list:
    """Remove adjacent extremum pairs that are too close in time.

    Repeatedly removes, among all violating adjacent pairs, the one with the
    smallest value difference; removing a (minimum, maximum) pair keeps the
    alternation.  Successive extrema of the same kind closer than
    ``min_cycle_years`` remove whichever of the two pairs between them has the
    smaller value difference.
    """
    ext = list(ext)
    while len(ext) >= 2:
        worst, worst_dv = None, math.inf
        for k in range(len(ext) - 1):
            (i, _), (j, _) = ext[k], ext[k + 1]
            dv = abs(v[j] - v[i])
            if t[j] - t[i] < min_phase_years and dv < worst_dv:
                worst, worst_dv = k, dv
        for k in range(len(ext) - 2):
            if t[ext[k + 2][0]] - t[ext[k][0]] < min_cycle_years:
                for m in (k, k + 1):
                    dv = abs(v[ext[m + 1][0]] - v[ext[m][0]])
                    if dv < worst_dv:
                        worst, worst_dv = m, dv
        if worst is None:
            break
        del ext[worst:worst + 2]
    return ext


def find_extrema(time_decimal_year, smoothed, settings: CycleSettings | None = None) -> dict:
    """Cycle minima and maxima of an already smoothed series.

    Parameters
    ----------
    time_decimal_year : array_like
        Times (decimal years), increasing.
    smoothed : array_like
        Smoothed sunspot numbers (NaN samples are ignored).
    settings : CycleSettings, optional

    Returns
    -------
    dict
        ``extrema``: list of ``(time, value, kind)`` confirmed extrema in time
        order (kind ``"minimum"`` / ``"maximum"``); ``pending``: the running
        extreme after the last confirmed one (not yet confirmed) or None;
        ``prominence``: the threshold used.

    Notes
    -----
    Hysteresis rule: a maximum is confirmed once the series has fallen below
    it by the prominence *P*, a minimum once it has risen above it by *P*, so
    successive extrema alternate and differ by at least *P*; then adjacent
    pairs closer than ``min_phase_years`` and same-kind extrema closer than
    ``min_cycle_years`` are pruned, the pair with the smaller value difference
    first (common practice, no source).
    """
    settings = settings or CycleSettings()
    t = np.asarray(time_decimal_year, dtype=np.float64)
    v = np.asarray(smoothed, dtype=np.float64)
    if t.shape != v.shape or t.ndim != 1:
        raise ValueError(f"time_decimal_year and smoothed: expected 1-D arrays of one length, "
                         f"got shapes {t.shape} and {v.shape}")
    good = np.isfinite(t) & np.isfinite(v)
    t, v = t[good], v[good]
    if t.size and np.any(np.diff(t) <= 0):
        raise ValueError("time_decimal_year: times must increase strictly; sort the input and drop duplicates")
    if t.size < 3:
        return {"extrema": [], "pending": None, "prominence": settings.prominence}
    prominence = settings.prominence
    if prominence is None:
        prominence = settings.prominence_fraction * float(v.max() - v.min())
    if prominence <= 0:
        return {"extrema": [], "pending": None, "prominence": prominence}
    confirmed, pending = _zigzag(t, v, prominence)
    # the pending extreme is left out of the pruning: it is close to the end
    # of the data only because the data end there
    chain = _prune(t, v, confirmed, settings.min_phase_years, settings.min_cycle_years)
    if pending is not None and chain and chain[-1][1] == pending[1]:
        pending = None  # pruning removed the pair after it; no distinct running extreme
    kinds = {1: "maximum", -1: "minimum"}
    return {
        "extrema": [(float(t[i]), float(v[i]), kinds[k]) for i, k in chain],
        "pending": None if pending is None else (float(t[pending[0]]), float(v[pending[0]]), kinds[pending[1]]),
        "prominence": float(prominence),
    }


def cycle_landmarks(time_decimal_year, values, settings: CycleSettings | None = None, *,
                    smoothed: np.ndarray | None = None, as_of=None) -> list[dict]:
    """Every cycle's minimum and maximum of a monthly sunspot series.

    Parameters
    ----------
    time_decimal_year : array_like
        Time of each month (decimal years), consecutive months.
    values : array_like
        Monthly mean sunspot numbers (NaN where missing).
    settings : CycleSettings, optional
        Smoothing and extremum rules (defaults: 13-month smoothing).
    smoothed : array_like, optional
        Use this smoothed series instead of smoothing ``values`` (not with
        ``as_of``: a series smoothed over later months is not causal).
    as_of : float, numpy.datetime64 or str, optional
        Use only the months that ended before this date (decimal year, or a
        date; see :func:`as_of_decimal_year`).  The series is cut first and
        smoothed afterwards, so nothing after the date can change the result.

    Returns
    -------
    list of dict
        In time order, one per cycle that has begun: ``minimum_time``
        (decimal year), ``minimum_value``, ``maximum_time`` (decimal year or
        None) and ``maximum_value`` (or None).  The last cycle's maximum is
        None while the series may still be rising.

    Notes
    -----
    Smoothing by :func:`smooth_13_month` (Waldmeier 1961); extrema by the
    hysteresis-and-separation rule of :func:`find_extrema`.  Maxima before the
    first minimum are not reported.  The last cycle's maximum is reported only
    once the series has fallen from it by ``confirm_fraction`` of the cycle's
    rise (common practice, no source).

    References
    ----------
    Waldmeier, M. 1961, *The Sunspot-Activity in the Years 1610-1960*,
    Schulthess & Co., Zurich.
    """
    settings = settings or CycleSettings()
    if as_of is not None:
        if smoothed is not None:
            raise ValueError("smoothed: cannot be combined with as_of (it was smoothed over months after the "
                             "date); pass the monthly values only")
        time_decimal_year, values = _cut_as_of(time_decimal_year, values, as_of)
    if smoothed is None:
        smoothed = smoothed_series(values, settings)
    found = find_extrema(time_decimal_year, smoothed, settings)
    return _cycles_from_extrema(time_decimal_year, smoothed, found["extrema"], settings)


def _cycles_from_extrema(time_decimal_year, smoothed, extrema: list, settings: CycleSettings) -> list[dict]:
    """Group confirmed extrema into cycles starting at a minimum (see :func:`cycle_landmarks`)."""
    ext = list(extrema)
    while ext and ext[0][2] != "minimum":
        ext.pop(0)
    cycles: list[dict] = []
    for time, value, kind in ext:
        if kind == "minimum":
            cycles.append({"minimum_time": time, "minimum_value": value, "maximum_time": None, "maximum_value": None})
        else:
            cycles[-1]["maximum_time"], cycles[-1]["maximum_value"] = time, value
    if cycles and cycles[-1]["maximum_time"] is not None and ext[-1][2] == "maximum":
        # the last maximum: confirmed by the hysteresis, but is the decline real?
        last = cycles[-1]
        rise = last["maximum_value"] - last["minimum_value"]
        fall = last["maximum_value"] - _lowest_after(time_decimal_year, smoothed, last["maximum_time"])
        if fall < settings.confirm_fraction * rise:
            last["maximum_time"] = last["maximum_value"] = None
    return cycles


def _lowest_after(time_decimal_year, smoothed, after: float) -> float:
    t = np.asarray(time_decimal_year, dtype=np.float64)
    v = np.asarray(smoothed, dtype=np.float64)
    sel = (t > after) & np.isfinite(v)
    return float(v[sel].min()) if sel.any() else math.inf


def as_of_decimal_year(as_of) -> float:
    """An as-of date -> decimal year.

    Parameters
    ----------
    as_of : float, int, numpy.datetime64 or str
        A decimal year (``2019.5``), a ``datetime64`` (UTC) or a string: a
        decimal year or an ISO date/time (``2019-12`` is the first instant of
        December; ``2019-12-01T00:00``).

    Raises
    ------
    ValueError
        With the bad value and the accepted forms.
    """
    if isinstance(as_of, (bool, np.bool_)):
        raise ValueError(f"as_of: got {as_of!r}; expected a decimal year or an ISO date")
    if isinstance(as_of, (int, float, np.integer, np.floating)):
        value = float(as_of)
    else:
        text = str(as_of).strip() if isinstance(as_of, str) else None
        try:
            value = float(text) if text is not None and re.fullmatch(r"[0-9.]+", text) else decimal_year(as_of)
        except (ValueError, TypeError):
            value = math.nan
        value = float(value) if np.ndim(value) == 0 else math.nan
    if not math.isfinite(value) or not 0 < value < 10000:
        raise ValueError(f"as_of: got {as_of!r}; expected a decimal year (2019.5) or an ISO date (2019-07-02)")
    return value


def _month_end_decimal_year(time_decimal_year) -> np.ndarray:
    """Decimal year of the first instant after each month's end (the next month's start, UTC)."""
    k = _month_indices(time_decimal_year)
    nxt = (k + 1 - 1970 * 12).astype("datetime64[M]").astype("datetime64[ns]")
    return np.atleast_1d(decimal_year(nxt))


def months_ended_before(time_decimal_year, as_of) -> np.ndarray:
    """Which months ended at or before an as-of date.

    Parameters
    ----------
    time_decimal_year : array_like
        Time of each month (decimal years; month start or mid-month, see
        :func:`_month_index`).
    as_of : float, numpy.datetime64 or str
        See :func:`as_of_decimal_year`.

    Returns
    -------
    numpy.ndarray of bool
        True for a month whose last instant is before the date (a month that
        ends exactly at the date counts).
    """
    t = np.atleast_1d(np.asarray(time_decimal_year, dtype=np.float64))
    if t.size == 0:
        return np.zeros(0, dtype=bool)
    return _month_end_decimal_year(t) <= as_of_decimal_year(as_of)


def _cut_as_of(time_decimal_year, values, as_of) -> tuple[np.ndarray, np.ndarray]:
    t = np.asarray(time_decimal_year, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    if t.shape != v.shape or t.ndim != 1:
        raise ValueError(f"time_decimal_year and values: expected 1-D arrays of one length, "
                         f"got shapes {t.shape} and {v.shape}")
    keep = months_ended_before(t, as_of)
    return t[keep], v[keep]


def _lowest_index_after(t: np.ndarray, v: np.ndarray, after: float) -> int | None:
    """Index of the lowest finite value after ``after``; the middle of a plateau at that value."""
    sel = np.flatnonzero((t > after) & np.isfinite(v))
    if sel.size == 0:
        return None
    lowest = v[sel].min()
    first = int(sel[np.argmax(v[sel] == lowest)])
    last = first
    while last + 1 < v.size and v[last + 1] == lowest:
        last += 1
    return (first + last) // 2


def current_minimum(time_decimal_year, values, settings: CycleSettings | None = None, *, as_of=None) -> dict:
    """The minimum that starts the current cycle, with its status, in real time.

    Parameters
    ----------
    time_decimal_year : array_like
        Time of each month (decimal years), consecutive months.
    values : array_like
        Monthly mean sunspot numbers (NaN where missing).
    settings : CycleSettings, optional
        Smoothing and extremum rules, and ``pinned_minimum``.
    as_of : float, numpy.datetime64 or str, optional
        Use only the months that ended before this date (cut before
        smoothing; see :func:`cycle_landmarks`).

    Returns
    -------
    dict
        ``time`` (decimal year or None), ``value`` (smoothed sunspot number at
        it, or None), ``status`` (one of :data:`MINIMUM_STATUSES`),
        ``computed_time`` / ``computed_status`` (what the data alone give; the
        same as ``time`` / ``status`` unless pinned), ``last_maximum_time``
        (decimal year or None), ``months_after`` (months of data after the
        minimum's month), ``smoothed_months_after`` (of those, how many have a
        smoothed value), ``prominence`` (the rise that confirms a minimum,
        sunspot number), ``as_of`` (decimal year or None),
        ``newest_month_time`` (decimal year of the last month used, or None)
        and ``note`` (one line saying how the minimum was found).

    Raises
    ------
    pipeline.config.ConfigError
        When ``settings.pinned_minimum`` is not after the last cycle maximum,
        or not within the months used.

    Notes
    -----
    - ``confirmed``: the last cycle of :func:`cycle_landmarks` has no maximum
      yet, so its minimum, confirmed by the hysteresis rule of
      :func:`find_extrema`, starts the current cycle.
    - ``pending``: the last cycle's maximum is established but no minimum has
      been confirmed after it; the candidate is the lowest smoothed value
      since that maximum (the middle of a plateau).  It may still move.  With
      no cycle minimum in the data at all, the last maximum the hysteresis
      rule confirmed is used instead.  A candidate closer to the maximum than
      ``min_phase_years`` could not become a landmark: ``unresolved``.
    - ``pinned``: ``settings.pinned_minimum`` overrides the data.
    - ``unresolved``: no maximum and no minimum in the data (too short or too
      flat), or too soon after the maximum; ``time`` is None.
    """
    settings = settings or CycleSettings()
    t = np.asarray(time_decimal_year, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    as_of_year = None
    if as_of is not None:
        as_of_year = as_of_decimal_year(as_of)
        t, v = _cut_as_of(t, v, as_of_year)
    smoothed = smoothed_series(v, settings)
    found = find_extrema(t, smoothed, settings)
    cycles = _cycles_from_extrema(t, smoothed, found["extrema"], settings)
    maxima = [c["maximum_time"] for c in cycles if c["maximum_time"] is not None]
    last_max = maxima[-1] if maxima else None
    hysteresis_only = False
    if not cycles:
        ext_max = [e[0] for e in found["extrema"] if e[2] == "maximum"]
        if ext_max:
            last_max, hysteresis_only = ext_max[-1], True
    out = {"time": None, "value": None, "status": "unresolved", "computed_time": None,
           "computed_status": "unresolved", "last_maximum_time": last_max, "months_after": None,
           "smoothed_months_after": None, "prominence": found["prominence"], "as_of": as_of_year,
           "newest_month_time": float(t[-1]) if t.size else None, "note": ""}
    index = None
    if cycles and cycles[-1]["maximum_time"] is None:
        index = int(np.flatnonzero(t == cycles[-1]["minimum_time"])[0])
        out.update(status="confirmed",
                   note="minimum confirmed: the smoothed series has since risen above it by the prominence")
    elif last_max is not None:
        index = _lowest_index_after(t, smoothed, last_max)
        if index is not None and t[index] - last_max < settings.min_phase_years:
            out["note"] = (f"the lowest smoothed value since the maximum of {last_max:.3f} is at {t[index]:.3f}, "
                           f"closer to it than min_phase_years ({settings.min_phase_years:g} yr): too early for a "
                           "minimum candidate")
            index = None
        elif index is not None:
            out.update(status="pending",
                       note=(f"lowest smoothed value since the maximum of {last_max:.3f}"
                             + (" (confirmed by the hysteresis only: no earlier minimum in the data)"
                                if hysteresis_only else "")
                             + f"; not yet confirmed: a rise of {found['prominence']:.3g} above it would "
                               "confirm it, a lower value would replace it"))
    if index is None and not out["note"]:
        out["note"] = (f"no cycle maximum or minimum in {t.size} months"
                       + (f" ({int(np.isfinite(smoothed).sum())} with a smoothed value)" if t.size else "")
                       + "; give a longer series")
    elif index is not None:
        months_after = int(t.size - 1 - index)
        smoothed_after = int(np.isfinite(smoothed[index + 1:]).sum())
        out.update(time=float(t[index]), value=float(smoothed[index]), months_after=months_after,
                   smoothed_months_after=smoothed_after)
        out["note"] += (f"; {months_after} months of data follow it"
                        + (f", {months_after - smoothed_after} of them without a smoothed value yet"
                           if months_after > smoothed_after else ""))
    out["computed_time"], out["computed_status"] = out["time"], out["status"]
    if settings.pinned_minimum is not None:
        out.update(_pinned(t, smoothed, settings.pinned_minimum, last_max, as_of_year))
        computed = ("nothing" if out["computed_time"] is None
                    else f"{out['computed_status']} at {out['computed_time']:.3f}")
        out["note"] = f"pinned by the forecaster ([cycles] pinned_minimum); from the data alone: {computed}"
    return out


def _pinned(t: np.ndarray, smoothed: np.ndarray, pinned: float, last_max: float | None,
            as_of_year: float | None) -> dict:
    """The ``pinned`` part of :func:`current_minimum`, after checking the pinned time against the data."""
    pinned = float(pinned)
    span = "no months" if t.size == 0 else f"{t[0]:.3f} to the end of the month of {t[-1]:.3f}"
    where = f"within the sunspot data used ({span}{'' if as_of_year is None else f', as of {as_of_year:.3f}'})"
    inside = t.size > 0 and t[0] <= pinned <= float(_month_end_decimal_year(t[-1:])[0])
    if not inside or (last_max is not None and pinned <= last_max):
        need = where if last_max is None else f"after the last cycle maximum ({last_max:.3f}) and {where}"
        raise ConfigError(f"cycles.pinned_minimum: got {pinned!r}; it must lie {need}; correct it or remove it")
    months = _month_indices(t)
    k = _month_index(pinned)
    hit = np.flatnonzero(months == k)
    later = months > k
    return {"time": pinned,
            "value": float(smoothed[hit[0]]) if hit.size and np.isfinite(smoothed[hit[0]]) else None,
            "status": "pinned", "months_after": int(later.sum()),
            "smoothed_months_after": int((later & np.isfinite(smoothed)).sum())}


def _month_indices(time_decimal_year) -> np.ndarray:
    """Vectorised :func:`_month_index`."""
    return np.floor(np.asarray(time_decimal_year, dtype=np.float64) * 12.0 + 0.25).astype(np.int64)


_ISO_MONTH = re.compile(r"^(\d{4})-(\d{2})$")
_ISO_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}([T ].*)?$")
_MISSING = {"", "nan", "na", "n/a", "null", "none", "-"}

#: column names a monthly CSV's header may use (case ignored; spaces and hyphens count as "_"):
#: the date column, then the value column
HEADER_DATE_NAMES = ("date", "time", "month", "year", "decimal_year")
HEADER_VALUE_NAMES = ("value", "sunspot_number", "sunspots", "ssn")


def _header_name(cell: str) -> str:
    return re.sub(r"[\s\-]+", "_", cell.strip().lower())


def _is_header(cells: list) -> bool:
    """True when the first two cells are accepted column names (see ``HEADER_*_NAMES``)."""
    return (len(cells) >= 2 and _header_name(cells[0]) in HEADER_DATE_NAMES
            and _header_name(cells[1]) in HEADER_VALUE_NAMES)


def parse_time_decimal_year(text: str) -> float:
    """A date cell -> decimal year.

    Accepts a decimal year (``1958.167``), an ISO month (``1958-03``, taken at
    mid-month) or an ISO date/time (``1958-03-16``).

    Raises
    ------
    ValueError
        With the bad text and the accepted forms.
    """
    s = text.strip()
    m = _ISO_MONTH.match(s)
    try:
        if m:
            start = np.datetime64(f"{m.group(1)}-{m.group(2)}", "M")
            a, b = start.astype("datetime64[ns]"), (start + 1).astype("datetime64[ns]")
            return float(decimal_year(a + (b - a) // 2))
        if _ISO_DATE.match(s):
            return float(decimal_year(s))
        value = float(s)
    except ValueError:
        value = math.nan
    if not math.isfinite(value) or not 0 < value < 10000:
        raise ValueError(f"date {text!r}: expected a decimal year (1958.167), an ISO month (1958-03) "
                         f"or an ISO date (1958-03-16)")
    return value


def _month_index(time_decimal_year: float) -> int:
    """Calendar month count (year*12 + month-1) of a decimal year.

    The quarter-month offset accepts both the month-start (1958.167 for March)
    and the mid-month (1958.208) conventions and rounding of the last digit.
    """
    return int(math.floor(time_decimal_year * 12.0 + 0.25))


def read_monthly_csv(path: str | Path) -> MonthlySeries:
    """Read a two-column monthly CSV (date, value) onto a gap-free monthly grid.

    A header line is optional.  It is recognised by its column names only:
    the first line that is neither blank nor a ``#`` comment is a header when
    its first cell is one of :data:`HEADER_DATE_NAMES` (``date``, ``time``,
    ``month``, ``year``, ``decimal_year``) and its second one of
    :data:`HEADER_VALUE_NAMES` (``value``, ``sunspot_number``, ``sunspots``,
    ``ssn``), case ignored and spaces or hyphens read as ``_``.  Any other
    line is a data row: a first line that is neither a header nor a usable
    row is a problem row like any other, never silently skipped.

    Blank or missing values (``NaN``, ``NA``, empty) become NaN; months absent
    from the file are NaN.  Rows that cannot be read (bad date, bad or
    negative number, duplicate month) are left out with a one-line reason in
    ``problems``; cells after the second are not read.

    A file in the semicolon monthly layout (see :func:`read_semicolon_monthly`)
    is refused rather than misread (its year and month columns would read as
    a date and a value); :func:`read_sunspot_file` reads either.

    Raises
    ------
    ValueError
        When the file cannot be read, is in the semicolon monthly layout, or
        holds no usable row.
    """
    path = Path(path)
    text = _read_text(path)
    found, reason = detect_sunspot_format(text)
    if found == "semicolon-monthly":
        raise ValueError(f"sunspot file {path}: not a date,value CSV but the semicolon monthly layout ({reason}); "
                         "read it with read_sunspot_file or set [cycles] sunspot_format")
    return _parse_plain(text, path)


def _read_text(path: Path) -> str:
    try:
        return path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise ValueError(f"sunspot file {path}: cannot read ({exc}); give a CSV of date,value rows or the "
                         "semicolon monthly layout") from None


def _parse_plain(text: str, path: Path) -> MonthlySeries:
    """The rows of a two-column CSV (see :func:`read_monthly_csv`)."""
    sample = text[:4096]
    delimiter = ";" if sample.count(";") > sample.count(",") else ","
    problems: list[str] = []
    rows: dict[int, tuple[float, float]] = {}
    first = True
    for lineno, row in enumerate(csv.reader(text.splitlines(), delimiter=delimiter), start=1):
        cells = [c.strip() for c in row]
        if not cells or all(c == "" for c in cells) or cells[0].startswith("#"):
            continue
        is_first, first = first, False
        if is_first and _is_header(cells):
            continue
        if len(cells) < 2:
            cells.append("")
        try:
            t = parse_time_decimal_year(cells[0])
        except ValueError as exc:
            if is_first:
                problems.append(f"line {lineno}: neither a header (first column named "
                                f"{'/'.join(HEADER_DATE_NAMES)}, second {'/'.join(HEADER_VALUE_NAMES)}) "
                                f"nor a data row ({exc})")
            else:
                problems.append(f"line {lineno}: {exc}")
            continue
        raw = cells[1]
        if raw.lower() in _MISSING:
            value = math.nan
        else:
            try:
                value = float(raw)
            except ValueError:
                problems.append(f"line {lineno}: value {raw!r} is not a number; leave it blank if missing")
                continue
            if not math.isfinite(value) or value < 0:
                problems.append(f"line {lineno}: value {raw!r} is not a sunspot number (>= 0); "
                                f"leave it blank if missing")
                continue
        k = _month_index(t)
        if k in rows:
            problems.append(f"line {lineno}: month of {cells[0]!r} already given; rows must be one per month")
            continue
        rows[k] = (t, value)
    if not rows:
        raise ValueError(f"sunspot file {path}: no usable date,value row"
                         + (f" ({problems[0]})" if problems else ""))
    keys, times, (values,) = _on_grid(rows, 1)
    return MonthlySeries(time_decimal_year=times, values=values, problems=problems, format="plain-csv")


def _on_grid(rows: dict, n_columns: int) -> tuple[np.ndarray, np.ndarray, list]:
    """``{month index: (time, col1, ...)}`` -> (grid, times, columns) on a gap-free monthly grid.

    Absent months get NaN columns and a time interpolated between their
    neighbours' times.
    """
    keys = np.array(sorted(rows))
    grid = np.arange(keys[0], keys[-1] + 1)
    times = np.interp(grid, keys, [rows[k][0] for k in keys])
    columns = []
    for c in range(1, n_columns + 1):
        col = np.full(grid.size, np.nan)
        col[keys - keys[0]] = [rows[k][c] for k in keys]
        columns.append(col)
    return grid, times, columns


#: the semicolon monthly layout's fields, in order (the data centre's published layout, from memory)
SEMICOLON_FIELDS = ("year", "month", "decimal year", "monthly mean", "standard deviation",
                    "number of observations", "definitive flag")
_INT = re.compile(r"^\d+$")
_SIGNED = re.compile(r"^-?\d+$")
#: how many data lines detection looks at
_DETECT_LINES = 24


def _data_lines(text: str):
    """(line number, stripped line) of every line that is neither blank nor a ``#`` comment."""
    for lineno, line in enumerate(text.splitlines(), start=1):
        s = line.strip()
        if s and not s.startswith("#"):
            yield lineno, s


def _semicolon_month(line: str) -> tuple[int, int, float] | None:
    """(year, month, decimal year) when a line has the semicolon layout's shape, else None."""
    cells = [c.strip() for c in line.split(";")]
    if len(cells) != len(SEMICOLON_FIELDS) or not (_INT.match(cells[0]) and _INT.match(cells[1])):
        return None
    year, month = int(cells[0]), int(cells[1])
    try:
        dec = float(cells[2])
    except ValueError:
        return None
    # the decimal year lies in its month (mid-month in the published files; from memory); the
    # tolerance also admits the month-start convention and rounding to 0.001
    if not 1 <= month <= 12 or abs(dec - (year + (month - 0.5) / 12.0)) > 1.0 / 24.0 + 0.002:
        return None
    return year, month, dec


def detect_sunspot_format(text: str) -> tuple[str | None, str]:
    """Which sunspot file layout a text is in.

    Parameters
    ----------
    text : str
        The whole file.

    Returns
    -------
    (str or None, str)
        ``"semicolon-monthly"``, ``"plain-csv"`` or None (neither), and a
        one-line reason.

    Notes
    -----
    Looks at the first 24 lines that are neither blank nor ``#`` comments.
    Semicolon monthly when at least half of them have its 7 fields with a
    whole year, a month 1-12 and a decimal year inside that month; plain CSV
    when its first line is a header by name (see :func:`read_monthly_csv`) or
    any of them starts with a readable date; otherwise neither.
    """
    sample = []
    for item in _data_lines(text):
        sample.append(item)
        if len(sample) == _DETECT_LINES:
            break
    if not sample:
        return None, "no data line (only blank or # comment lines)"
    semi = sum(_semicolon_month(line) is not None for _, line in sample)
    if 2 * semi >= len(sample):
        return "semicolon-monthly", (f"{semi} of the first {len(sample)} lines have its "
                                     f"{len(SEMICOLON_FIELDS)} fields ({';'.join(SEMICOLON_FIELDS)})")
    delimiter = ";" if text[:4096].count(";") > text[:4096].count(",") else ","
    first = next(csv.reader([sample[0][1]], delimiter=delimiter))
    if _is_header([c.strip() for c in first]):
        return "plain-csv", f"line {sample[0][0]} is a date,value header"
    for lineno, line in sample:
        cell = next(csv.reader([line], delimiter=delimiter), [""])[0]
        try:
            parse_time_decimal_year(cell)
        except ValueError:
            continue
        return "plain-csv", f"line {lineno} starts with a date"
    lineno, line = sample[0]
    return None, (f"none of the first {len(sample)} lines starts with a date or has the semicolon monthly "
                  f"layout's {len(SEMICOLON_FIELDS)} fields; line {lineno} reads {line[:60]!r}")


def _semicolon_row(cells: list) -> tuple[int, tuple]:
    """One semicolon-layout row -> (month index, (time, mean, std, n_obs, definitive)); ValueError with the reason."""
    if len(cells) != len(SEMICOLON_FIELDS):
        raise ValueError(f"{len(cells)} fields; the semicolon monthly layout has {len(SEMICOLON_FIELDS)} "
                         f"({';'.join(SEMICOLON_FIELDS)})")
    year_txt, month_txt, dec_txt, mean_txt, std_txt, n_txt, flag_txt = cells
    if not (_INT.match(year_txt) and _INT.match(month_txt)) or not 1 <= int(month_txt) <= 12:
        raise ValueError(f"year {year_txt!r} and month {month_txt!r}: expected whole numbers, month 1-12")
    year, month = int(year_txt), int(month_txt)
    numbers = []
    for name, raw in (("decimal year", dec_txt), ("monthly mean", mean_txt), ("standard deviation", std_txt)):
        try:
            x = float(raw)
        except ValueError:
            raise ValueError(f"{name} {raw!r} is not a number") from None
        if not math.isfinite(x):
            raise ValueError(f"{name} {raw!r} is not a finite number; missing values are negative")
        numbers.append(x)
    dec, mean, std = numbers
    if _semicolon_month(";".join(cells)) is None:
        raise ValueError(f"decimal year {dec_txt!r} is not in month {year}-{month:02d}")
    if not _SIGNED.match(n_txt):
        raise ValueError(f"number of observations {n_txt!r} is not a whole number")
    if flag_txt not in ("0", "1"):
        raise ValueError(f"definitive flag {flag_txt!r}: expected 1 (definitive) or 0 (provisional)")
    n_obs = int(n_txt)
    # a negative mean, deviation or count marks it missing (the published layout, from memory: -1)
    return year * 12 + month - 1, (dec, math.nan if mean < 0 else mean, math.nan if std < 0 else std,
                                   math.nan if n_obs < 0 else float(n_obs), float(flag_txt == "1"))


def read_semicolon_monthly(path: str | Path) -> MonthlySeries:
    """Read the semicolon-separated monthly sunspot file onto a gap-free monthly grid.

    The layout the world data centre for the sunspot index publishes for
    monthly means (from memory): one line per month, 7 fields separated by
    ``;`` and padded with spaces -- year; month; decimal year (the middle of
    the month); monthly mean; standard deviation of the daily values; number
    of observations; definitive flag (1 definitive, 0 provisional).  No
    header.  For example ``1749;01;1749.042;  96.7; -1.0;   -1;1``.

    A negative mean (or deviation, or count) means missing and becomes NaN
    (not a problem row); months absent from the file are NaN.  Times are the
    file's decimal years.  Rows that cannot be read (wrong field count, bad
    number, a decimal year outside its month, a flag other than 0/1, a
    duplicate month) are left out with a one-line reason in ``problems``;
    blank lines and ``#`` comments are skipped.

    Raises
    ------
    ValueError
        When the file cannot be read or holds no usable row.
    """
    path = Path(path)
    return _parse_semicolon(_read_text(path), path)


def _parse_semicolon(text: str, path: Path) -> MonthlySeries:
    problems: list[str] = []
    rows: dict[int, tuple] = {}
    for lineno, line in _data_lines(text):
        cells = [c.strip() for c in line.split(";")]
        try:
            k, row = _semicolon_row(cells)
        except ValueError as exc:
            problems.append(f"line {lineno}: {exc}")
            continue
        if k in rows:
            problems.append(f"line {lineno}: month {cells[0]}-{cells[1]} already given; rows must be one per month")
            continue
        rows[k] = row
    if not rows:
        raise ValueError(f"sunspot file {path}: no usable row of the semicolon monthly layout"
                         + (f" ({problems[0]})" if problems else ""))
    _, times, (values, std, n_obs, flag) = _on_grid(rows, 4)
    return MonthlySeries(time_decimal_year=times, values=values, problems=problems, format="semicolon-monthly",
                         standard_deviation=std, n_observations=n_obs, definitive=flag == 1.0)


#: readers by layout name (``[cycles] sunspot_format``)
_READERS = {"plain-csv": _parse_plain, "semicolon-monthly": _parse_semicolon}


def read_sunspot_file(path: str | Path, sunspot_format: str = "auto") -> MonthlySeries:
    """Read a monthly sunspot file in either layout onto a gap-free monthly grid.

    Parameters
    ----------
    path : str or Path
    sunspot_format : str
        ``"auto"`` (default) detects the layout (:func:`detect_sunspot_format`)
        and records ``format_source="detected"``: a fallback a caller should
        state once.  ``"plain-csv"`` (:func:`read_monthly_csv`) or
        ``"semicolon-monthly"`` (:func:`read_semicolon_monthly`) declare it
        (``format_source="declared"``).

    Returns
    -------
    MonthlySeries
        With ``format`` and ``format_source`` set.

    Raises
    ------
    ValueError
        When the file cannot be read, matches neither layout (with the reason),
        is declared plain CSV but has the semicolon layout, or holds no usable
        row.
    """
    check_choice("sunspot_format", sunspot_format, SUNSPOT_FORMATS)
    path = Path(path)
    text = _read_text(path)
    found, reason = detect_sunspot_format(text)
    if sunspot_format == "auto":
        if found is None:
            raise ValueError(f"sunspot file {path}: format not recognised: {reason}; give a date,value CSV or "
                             f"the semicolon monthly layout ({';'.join(SEMICOLON_FIELDS)})")
        source = "detected"
    else:
        if sunspot_format == "plain-csv" and found == "semicolon-monthly":
            raise ValueError(f"sunspot file {path}: declared plain-csv but it has the semicolon monthly layout "
                             f"({reason}); set [cycles] sunspot_format to \"semicolon-monthly\" or \"auto\"")
        found, source = sunspot_format, "declared"
    series = _READERS[found](text, path)
    return dataclasses.replace(series, format=found, format_source=source)
