"""Sunspot-number smoothing and solar-cycle landmarks (minima and maxima).

The conventional 13-month running mean of monthly mean sunspot numbers is
computed by :func:`smooth_13_month`; :func:`cycle_landmarks` finds every
cycle minimum and maximum of the smoothed series with a hysteresis
("zig-zag") rule and minimum-separation pruning, so that noise, double peaks
and flat stretches give no spurious extrema.  :func:`read_monthly_csv` reads
the two-column monthly CSV used by ``polecast cycles``.

Times are decimal years (``pipeline.timeutil``); sunspot numbers are
dimensionless, and the extrema keep the input's own scale.
"""

from __future__ import annotations

import csv
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pipeline.config import check_choice, check_number
from pipeline.timeutil import decimal_year

__all__ = [
    "CycleSettings",
    "MonthlySeries",
    "SMOOTHING_METHODS",
    "smooth_13_month",
    "smoothed_series",
    "find_extrema",
    "cycle_landmarks",
    "read_monthly_csv",
    "parse_time_decimal_year",
    "HEADER_DATE_NAMES",
    "HEADER_VALUE_NAMES",
]

#: weights of the 13-month running mean (half weights on the two end months)
_WEIGHTS_13 = np.r_[0.5, np.ones(11), 0.5] / 12.0


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
    """

    smoothing: str = "13_month"
    max_missing_months: int = 0
    prominence: float | None = None
    prominence_fraction: float = 0.1
    min_phase_years: float = 2.0
    min_cycle_years: float = 7.0
    confirm_fraction: float = 0.5

    def __post_init__(self):
        check_choice("cycles.smoothing", self.smoothing, SMOOTHING_METHODS)
        check_number("cycles.max_missing_months", self.max_missing_months, lo=0, hi=12, integer=True)
        if self.prominence is not None:
            check_number("cycles.prominence", self.prominence, lo=0.0, lo_open=True)
        check_number("cycles.prominence_fraction", self.prominence_fraction, lo=0.0, hi=1.0, lo_open=True)
        check_number("cycles.min_phase_years", self.min_phase_years, lo=0.0)
        check_number("cycles.min_cycle_years", self.min_cycle_years, lo=0.0)
        check_number("cycles.confirm_fraction", self.confirm_fraction, lo=0.0, hi=1.0)


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
    """

    time_decimal_year: np.ndarray
    values: np.ndarray
    problems: list = field(default_factory=list)


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
                    smoothed: np.ndarray | None = None) -> list[dict]:
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
        Use this smoothed series instead of smoothing ``values``.

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
    if smoothed is None:
        smoothed = smoothed_series(values, settings)
    found = find_extrema(time_decimal_year, smoothed, settings)
    ext = list(found["extrema"])
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

    Raises
    ------
    ValueError
        When the file cannot be read or holds no usable row.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise ValueError(f"sunspot file {path}: cannot read ({exc}); give a CSV of date,value rows") from None
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
    keys = np.array(sorted(rows))
    grid = np.arange(keys[0], keys[-1] + 1)
    times = np.interp(grid, keys, [rows[k][0] for k in keys])
    values = np.full(grid.size, np.nan)
    values[keys - keys[0]] = [rows[k][1] for k in keys]
    return MonthlySeries(time_decimal_year=times, values=values, problems=problems)
