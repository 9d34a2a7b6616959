"""The state of the forecast as of a date: series, reversal, landmarks, phase and precursor.

:func:`forecast_inputs` builds, from frame records (a store's) or a polar-series
table, and a monthly sunspot series, everything a forecast needs as it was
known on an as-of date: the polar series, the final dipole reversal, the cycle
landmarks, the current cycle minimum with its status, the chosen phase
(:func:`pipeline.precursor.choose_phase`), the precursor there and the target
cycle.  :func:`forecast_document` adds the calibrated forecast.
``polecast forecast``, ``polecast run`` and the hindcasts share them, so a
forecast made today and a hindcast made as of a past date are the same
computation.

Causal by construction
----------------------
Every input is cut at the as-of date *before* anything is computed: frame
records with ``time < as_of`` (:func:`records_before`) before the polar
series, the B0 fill and the smoothers see them; series-table rows with
``time < as_of``; sunspot months that ended by the date
(:func:`pipeline.cycles.months_ended_before`, cut before the 13-month
smoothing).  The two-sided smoothers, the B0 fill and the reversal finder then
see only the past, so nothing observed after the date can change an as-of
result (tests/test_asof.py appends later data and compares whole results).

Results that later data may revise say so (``provisional_reasons``): a final
reversal within the persistence plus the smoothing width of the data end, a
``pending`` minimum used at the phase ``minimum``, and (B0 method ``fill``) a
window ending within ``series.fill_max_gap_years`` of the newest frame, whose
hidden latitude bins later frames may fill differently.

Target cycle
------------
``target_cycle`` is the number of the predicted cycle in the sunspot series:
cycle k begins at the k-th cycle minimum found there (as of the date), or at
the (k - n + 1)-th when the first minimum begins cycle n
(``first_cycle_number``).  The
precursor at a minimum predicts the cycle that minimum begins; a precursor
taken after a final reversal predicts the cycle that begins at the next
minimum after it.  The numbering follows the sunspot file given (a file that
starts at another cycle numbers from there).
"""

from __future__ import annotations

import csv
import dataclasses
import datetime as _dt
import math
import numbers
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import xarray as xr

from pipeline.precursor import PhaseChoice, check_lags_years, check_phase_request, choose_phase, precursor_at_phase
from pipeline.timeutil import decimal_year, from_decimal_year, iso_date, to_datetime64

__all__ = [
    "AsOf",
    "as_of_instant",
    "check_as_of",
    "records_before",
    "SeriesTable",
    "SERIES_TABLE_COLUMNS",
    "SERIES_TABLE_ERROR_COLUMNS",
    "read_series_table",
    "series_from_table",
    "store_scale",
    "NoForecastError",
    "ForecastInputs",
    "forecast_inputs",
    "forecast_document",
]

#: required columns of a polar-series table (``--series CSV``), as ``polecast reversals --series`` reads
SERIES_TABLE_COLUMNS = ("time", "north_br_gauss", "south_br_gauss")
#: optional one-sigma error columns of a polar-series table (gauss)
SERIES_TABLE_ERROR_COLUMNS = ("north_br_error_gauss", "south_br_error_gauss")


# ---- the as-of date --------------------------------------------------------------------------------------

@dataclass(frozen=True)
class AsOf:
    """An as-of cut-off: the first instant *not* used.

    Attributes
    ----------
    instant : numpy.datetime64
        UTC, nanoseconds.
    decimal_year : float
    date : str
        ``YYYY-MM-DD`` of the instant (the label written to outputs).
    """

    instant: np.datetime64
    decimal_year: float
    date: str


def as_of_instant(as_of) -> AsOf | None:
    """Parse an as-of date.

    Parameters
    ----------
    as_of : None, str, datetime.date, numpy.datetime64 or float
        An ISO date or date-time (``2055-06-01``, ``2055-06-01T12:00``), a
        date (TOML's ``as_of = 2055-06-01``) or a decimal year (``2055.5``).

    Returns
    -------
    AsOf or None
        None when ``as_of`` is None.

    Raises
    ------
    ValueError
        Naming the bad value and the accepted forms.
    """
    if as_of is None:
        return None
    bad = ValueError(f"as_of: got {as_of!r}; expected an ISO date YYYY-MM-DD (or a decimal year such as 2055.5)")
    if isinstance(as_of, bool):
        raise bad
    if isinstance(as_of, numbers.Real):
        year = float(as_of)
        if not (math.isfinite(year) and 1000.0 < year < 10000.0):
            raise bad
        instant = from_decimal_year(year)
    else:
        if isinstance(as_of, _dt.datetime):
            text = as_of.replace(tzinfo=None).isoformat()
        elif isinstance(as_of, _dt.date):
            text = as_of.isoformat()
        else:
            text = str(as_of).strip()
        try:
            year_text = float(text)
        except ValueError:
            year_text = None
        if year_text is not None:
            return as_of_instant(year_text)
        if len(text) < 10 or text[4] != "-" or text[7] != "-":
            raise bad  # a full date: "2055-06" alone is ambiguous about the day
        try:
            instant = to_datetime64(text)
        except ValueError:
            raise bad from None
        if np.isnat(instant):
            raise bad
    instant = np.datetime64(instant, "ns")
    return AsOf(instant, float(decimal_year(instant)), iso_date(instant))


def check_as_of(name: str, value):
    """Validate an as-of setting (``[forecast] as_of``): None, an ISO date string or a decimal year.

    Returns
    -------
    None, str or float
        A TOML date becomes its ``YYYY-MM-DD`` string (so the configuration
        stays JSON-ready); strings and numbers are returned as given.

    Raises
    ------
    pipeline.config.ConfigError
        Naming the key, the bad value and the accepted forms.
    """
    from pipeline.config import ConfigError

    if value is None:
        return None
    try:
        as_of_instant(value)
    except ValueError:
        raise ConfigError(f"{name}: got {value!r}; expected an ISO date YYYY-MM-DD (or a decimal year such as "
                          f"2055.5)") from None
    if isinstance(value, (_dt.date, _dt.datetime)):
        return value.isoformat()
    return value


def records_before(records, as_of) -> list:
    """The frame records observed before the as-of date (all of them when ``as_of`` is None).

    Parameters
    ----------
    records : iterable of pipeline.measure.FrameRecord
    as_of : None, AsOf or anything :func:`as_of_instant` reads

    Returns
    -------
    list
        Records with a time strictly before the cut-off, in the given order;
        with a cut-off, records without a time are left out too (they cannot
        be placed before it).
    """
    cut = as_of if isinstance(as_of, AsOf) or as_of is None else as_of_instant(as_of)
    records = list(records)
    if cut is None:
        return records
    out = []
    for r in records:
        t = getattr(r, "time", None)
        if not t:
            continue
        if to_datetime64(t) < cut.instant:
            out.append(r)
    return out


# ---- a polar-series table (--series CSV) -----------------------------------------------------------------

@dataclass(frozen=True)
class SeriesTable:
    """Polar-field samples read from a table (e.g. one row per rotation).

    Attributes
    ----------
    time_decimal_year : numpy.ndarray
        Increasing sample times (decimal years).
    north_br_gauss, south_br_gauss : numpy.ndarray
        Cap means (gauss; NaN where missing).
    north_br_error_gauss, south_br_error_gauss : numpy.ndarray or None
        One-sigma errors (gauss; NaN where unknown), None without the columns.
    problems : list of str
        One line per row left out.
    source : str
        Where it came from (the file name).
    """

    time_decimal_year: np.ndarray
    north_br_gauss: np.ndarray
    south_br_gauss: np.ndarray
    north_br_error_gauss: np.ndarray | None = None
    south_br_error_gauss: np.ndarray | None = None
    problems: list = field(default_factory=list)
    source: str = ""

    def before(self, as_of) -> "SeriesTable":
        """The rows with ``time < as_of`` (all rows when None)."""
        cut = as_of if isinstance(as_of, AsOf) or as_of is None else as_of_instant(as_of)
        if cut is None:
            return self
        keep = self.time_decimal_year < cut.decimal_year

        def sub(a):
            return None if a is None else a[keep]

        return dataclasses.replace(self, time_decimal_year=self.time_decimal_year[keep],
                                   north_br_gauss=self.north_br_gauss[keep], south_br_gauss=self.south_br_gauss[keep],
                                   north_br_error_gauss=sub(self.north_br_error_gauss),
                                   south_br_error_gauss=sub(self.south_br_error_gauss))


def _cell_number(text: str) -> float:
    text = (text or "").strip()
    if text == "" or text.lower() in ("nan", "na", "null", "none"):
        return math.nan
    return float(text)


def _cell_time(text: str) -> float:
    text = (text or "").strip()
    try:
        return float(text)
    except ValueError:
        return float(decimal_year(to_datetime64(text)))


def read_series_table(path) -> SeriesTable:
    """Read a polar-series CSV: ``time,north_br_gauss,south_br_gauss`` and optional ``*_error_gauss``.

    ``time`` is a decimal year (or an ISO date, as ``polecast series --format
    csv`` writes); other columns are ignored; an empty cell is a missing
    value.  The table ``polecast reversals --series`` reads.

    Returns
    -------
    SeriesTable
        Rows sorted by time; a row whose time repeats an earlier one is left
        out with a reason, as is an unreadable row.

    Raises
    ------
    ValueError
        When the file cannot be read or lacks a required column (naming them).
    """
    path = Path(path)
    rows, problems = [], []
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            reader = csv.DictReader(fh)
            cols = [(c or "").strip() for c in (reader.fieldnames or [])]
            missing = [c for c in SERIES_TABLE_COLUMNS if c not in cols]
            if missing:
                raise ValueError(f"series table {path}: missing column(s) {', '.join(missing)}; it needs columns "
                                 f"{', '.join(SERIES_TABLE_COLUMNS)} (time in decimal years), optionally "
                                 f"{', '.join(SERIES_TABLE_ERROR_COLUMNS)}")
            errors = [c for c in SERIES_TABLE_ERROR_COLUMNS if c in cols]
            for line, raw in enumerate(reader, start=2):
                row = {(k or "").strip(): (v or "") for k, v in raw.items() if k is not None}
                try:
                    t = _cell_time(row["time"])
                    values = [_cell_number(row[c]) for c in SERIES_TABLE_COLUMNS[1:] + tuple(errors)]
                except ValueError as exc:
                    problems.append(f"{path} line {line}: unreadable row ({exc}); left out")
                    continue
                if not math.isfinite(t):
                    problems.append(f"{path} line {line}: time {row['time']!r} is not finite; left out")
                    continue
                rows.append((t, line, values))
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise ValueError(f"series table {path}: cannot read ({exc})") from None
    rows.sort(key=lambda r: r[0])
    kept = []
    for t, line, values in rows:
        if kept and t == kept[-1][0]:
            problems.append(f"{path} line {line}: time {t!r} repeats an earlier row; left out")
            continue
        kept.append((t, line, values))
    arr = np.array([[t] + v for t, _, v in kept], dtype=np.float64).reshape(len(kept), 3 + len(errors))
    err = {c: arr[:, 3 + i] for i, c in enumerate(errors)}
    return SeriesTable(arr[:, 0], arr[:, 1], arr[:, 2], err.get("north_br_error_gauss"),
                       err.get("south_br_error_gauss"), problems, str(path))


def series_from_table(table: SeriesTable) -> xr.Dataset:
    """A PolarSeries-like Dataset from a table: one ``rotation`` per row.

    Variables ``*_br_rotation_gauss`` (north, south, dipole ``(N - S)/2``)
    and, when the table has both error columns, ``*_br_rotation_error_gauss``
    (dipole error ``sqrt(eN^2 + eS^2)/2``); coordinate ``rotation_time``.
    Enough for :mod:`pipeline.precursor`; the rows are used as given (no
    smoothing, no B0 handling: the table's maker did that).
    """
    n, s = table.north_br_gauss, table.south_br_gauss
    ds = xr.Dataset(
        {"north_br_rotation_gauss": ("rotation", n, {"units": "G", "long_name": "north polar-cap mean Br"}),
         "south_br_rotation_gauss": ("rotation", s, {"units": "G", "long_name": "south polar-cap mean Br"}),
         # axial dipole proxy (N - S) / 2 (DESIGN.md)
         "dipole_br_rotation_gauss": ("rotation", 0.5 * (n - s), {"units": "G",
                                                                  "long_name": "axial dipole proxy (north - south)/2"})},
        coords={"rotation": np.arange(n.size, dtype=np.int64),
                "rotation_time": ("rotation", from_decimal_year(table.time_decimal_year))},
        attrs={"title": "polar-series table", "source": table.source})
    if table.north_br_error_gauss is not None and table.south_br_error_gauss is not None:
        en, es = table.north_br_error_gauss, table.south_br_error_gauss
        ds["north_br_rotation_error_gauss"] = ("rotation", en, {"units": "G"})
        ds["south_br_rotation_error_gauss"] = ("rotation", es, {"units": "G"})
        ds["dipole_br_rotation_error_gauss"] = ("rotation", 0.5 * np.hypot(en, es), {"units": "G"})
    return ds


# ---- the measurement definition of a store ---------------------------------------------------------------

def store_scale(records, series_settings=None, precursor_kind: str = "dipole") -> tuple[str, list]:
    """The scale (measurement definition) of a precursor taken from frame records.

    Parameters
    ----------
    records : iterable of pipeline.measure.FrameRecord
        The ``ok`` records used.
    series_settings : pipeline.aggregator.SeriesSettings, optional
        Its ``b0_method``.
    precursor_kind : str

    Returns
    -------
    (str, list of str)
        :func:`pipeline.regression.describe_scale` of the records' instrument
        (their ``instrument`` names joined by ``+`` when several) and cap
        latitude, the B0 method and the precursor kind; and notes on the
        fallbacks used (records without an instrument name give ``unnamed``).
    """
    from pipeline.aggregator import SeriesSettings
    from pipeline.regression import describe_scale

    settings = series_settings or SeriesSettings()
    good = [r for r in records if getattr(r, "status", None) == "ok"]
    names = sorted({(r.instrument or "").strip().replace(";", ",") for r in good} - {""})
    notes = []
    if not names:
        names = ["unnamed"]
        notes.append("the records name no instrument; the scale says instrument=unnamed")
    caps = sorted({float(r.cap_latitude_deg) for r in good if r.cap_latitude_deg is not None})
    cap = caps[0] if len(caps) == 1 else (settings.cap_latitude_deg or 60.0)
    if len(caps) != 1:
        notes.append(f"the records state no single cap latitude; the scale says {cap:g} deg")
    return describe_scale(instrument="+".join(names), cap_latitude_deg=cap, b0_method=settings.b0_method,
                          precursor_kind=precursor_kind), notes


# ---- the whole state as of a date ------------------------------------------------------------------------

class NoForecastError(ValueError):
    """No forecast can be made from what is known (no reversal yet, no complete window, too few
    calibration rows of the phase): ``str(exc)`` is the one-line reason (``polecast forecast`` exits 3)."""


@dataclass(frozen=True)
class ForecastInputs:
    """Everything a forecast needs, as known on the as-of date (see :func:`forecast_inputs`).

    Attributes
    ----------
    as_of : AsOf or None
    data_end : float or None
        Time of the newest measured sample used (decimal year).
    data_date : str or None
        ``YYYY-MM-DD`` of ``data_end``.
    source : str
        ``"store"`` (frame records) or ``"series"`` (a series table).
    series : xarray.Dataset
        The polar series built from the data before the date.
    final_reversal : pipeline.reversal.Crossing or None
        The final persistent crossing of the per-rotation dipole.
    reversal_provisional : bool
        The final reversal lies within the persistence plus the smoothing
        width of the data end, so later data may move or remove it.
    cycles : list of dict
        :func:`pipeline.cycles.cycle_landmarks` as of the date.
    current_minimum : dict
        :func:`pipeline.cycles.current_minimum` as of the date.
    choice : pipeline.precursor.PhaseChoice
    precursor : dict or None
        :func:`pipeline.precursor.precursor_at_phase`; None when unavailable.
    minimum_time, minimum_status : float or None, str or None
        The minimum that begins the target cycle, when one is known in any status.
    target_cycle : int or None
        Ordinal of the predicted cycle in the sunspot series (module docstring).
    unavailable : str or None
        One line: why no precursor can be taken (None when it can).
    provisional_reasons : tuple of str
        Why later data may revise the result (empty when nothing is known to).
    notes : tuple of str
        Fallbacks and choices worth saying once.
    scale : str or None
        The measurement definition of the precursor (:func:`store_scale`);
        None for a series table (unknown).
    frames_used : int or None
        Frame records used (None for a series table).
    sunspot_input : dict
        ``sunspot_number_version`` (declared, ``[cycles]``), ``format`` and
        ``format_source`` of the sunspot file (None for plain arrays),
        ``months_used`` (before the as-of date).
    """

    as_of: AsOf | None
    data_end: float | None
    data_date: str | None
    source: str
    series: xr.Dataset
    final_reversal: object
    reversal_provisional: bool
    cycles: list
    current_minimum: dict
    choice: PhaseChoice
    precursor: dict | None
    minimum_time: float | None
    minimum_status: str | None
    target_cycle: int | None
    unavailable: str | None
    provisional_reasons: tuple = ()
    notes: tuple = ()
    scale: str | None = None
    frames_used: int | None = None
    sunspot_input: dict = field(default_factory=dict)

    @property
    def reversal_time(self) -> float | None:
        """The final dipole reversal (decimal year) or None."""
        return None if self.final_reversal is None else float(self.final_reversal.time)

    def to_dict(self) -> dict:
        """The keys this state adds to the forecast JSON object.

        ``phase``, ``lag_years`` (null at the minimum), ``minimum_time``,
        ``minimum_status``, ``reversal_time``, ``target_cycle``, ``data_date``,
        ``as_of`` (``YYYY-MM-DD`` or null), ``as_of_decimal_year``,
        ``phase_requested``, ``phase_notes``, ``provisional`` (bool),
        ``provisional_reasons``, ``reversal_provisional``,
        ``forecast_unavailable`` (the reason or null), ``precursor_source``,
        ``precursor_detail`` (the window: time, n_rotations, errors, route, ...),
        ``current_minimum`` and ``sunspot_input``.
        """
        return {
            "phase": self.choice.phase,
            "lag_years": self.choice.lag_years if self.choice.available else None,
            "minimum_time": self.minimum_time,
            "minimum_status": self.minimum_status,
            "reversal_time": self.reversal_time,
            "target_cycle": self.target_cycle,
            "data_date": self.data_date,
            "as_of": None if self.as_of is None else self.as_of.date,
            "as_of_decimal_year": None if self.as_of is None else self.as_of.decimal_year,
            "phase_requested": self.choice.requested,
            "phase_notes": list(self.choice.notes),
            "provisional": bool(self.provisional_reasons),
            "provisional_reasons": list(self.provisional_reasons),
            "reversal_provisional": self.reversal_provisional,
            "forecast_unavailable": self.unavailable,
            "precursor_source": self.source,
            "precursor_detail": None if self.precursor is None else dict(self.precursor),
            "current_minimum": dict(self.current_minimum),
            "sunspot_input": dict(self.sunspot_input),
        }


def _sunspot_arrays(sunspots):
    if hasattr(sunspots, "time_decimal_year"):
        return (np.asarray(sunspots.time_decimal_year, dtype=np.float64),
                np.asarray(sunspots.values, dtype=np.float64))
    t, v = sunspots
    return np.asarray(t, dtype=np.float64), np.asarray(v, dtype=np.float64)


def _newest_sample(time_years, north, south) -> float | None:
    t = np.atleast_1d(np.asarray(time_years, dtype=np.float64))
    ok = np.isfinite(t) & (np.isfinite(np.asarray(north, dtype=np.float64))
                           | np.isfinite(np.asarray(south, dtype=np.float64)))
    return float(t[ok].max()) if ok.any() else None


def _target_cycle(cycles, choice: PhaseChoice, reversal_time, first: int = 1) -> int | None:
    """Number of the predicted cycle: ``first`` + the landmark minima before the cycle's start (module docstring)."""
    minima = np.array([c["minimum_time"] for c in cycles], dtype=np.float64)
    if choice.phase == "minimum":
        half_month = 1.0 / 24.0
        return first + int(np.sum(minima < choice.center_time - half_month))
    if reversal_time is not None:
        return first + int(np.sum(minima < reversal_time))
    return None


def forecast_inputs(source, sunspots, config=None, *, phase=None, lags_years=None, as_of=None,
                    first_cycle_number: int = 1) -> ForecastInputs:
    """The state of the forecast as of a date, from frame records or a series table.

    Parameters
    ----------
    source : iterable of pipeline.measure.FrameRecord or SeriesTable
        A store's records (measured under one definition, as
        :func:`pipeline.store.check_measure_settings` ensures), or a
        polar-series table (:func:`read_series_table`).
    sunspots : pipeline.cycles.MonthlySeries or (times, values)
        Monthly mean sunspot numbers (decimal years, consecutive months).
    config : pipeline.config.Config, optional
        Its ``series``, ``reversals``, ``cycles`` and ``forecast`` sections
        (defaults when None).
    phase : str, optional
        ``"auto"`` or a phase; default ``config.forecast.phase``.
    lags_years : sequence of float, optional
        Default ``config.forecast.lags_years``.
    as_of : str, date, datetime64 or float, optional
        Use only what was known before this date; default
        ``config.forecast.as_of`` (None: everything).
    first_cycle_number : int
        The number of the cycle that begins at the first minimum of the
        sunspot series (default 1: ordinals of the file); ``target_cycle``
        counts on from it.

    Returns
    -------
    ForecastInputs
        With ``unavailable`` set (and ``precursor`` None) when no precursor
        can be taken: no reversal yet, no complete window, no rotation in it.

    Raises
    ------
    pipeline.config.ConfigError
        A bad phase, lag list or as-of date, or a ``[cycles] pinned_minimum``
        outside the data.
    pipeline.b0.MixedRecordsError
        Records of different cap latitudes or profile edges.

    Notes
    -----
    The cut comes first (module docstring): records ``time < as_of``, table
    rows ``time < as_of``, sunspot months ended by ``as_of``; then
    :func:`pipeline.aggregator.polar_series`, the final reversal of the
    per-rotation dipole (:func:`pipeline.reversal.find_reversals`, without
    bootstrap: only the epoch is needed), :func:`pipeline.cycles.cycle_landmarks`
    and :func:`pipeline.cycles.current_minimum`, :func:`pipeline.precursor.choose_phase`
    and :func:`pipeline.precursor.precursor_at_phase`.
    """
    from pipeline.aggregator import SeriesSettings, polar_series
    from pipeline.config import ConfigError
    from pipeline.cycles import CycleSettings, current_minimum, cycle_landmarks, months_ended_before
    from pipeline.regression import ForecastSettings
    from pipeline.reversal import ReversalSettings, find_reversals

    def section(name, cls):
        return getattr(config, name) if config is not None else cls()

    ss, rs = section("series", SeriesSettings), section("reversals", ReversalSettings)
    cs, fs = section("cycles", CycleSettings), section("forecast", ForecastSettings)
    requested = check_phase_request("phase" if phase is not None else "forecast.phase",
                                    phase if phase is not None else fs.phase)
    lags = check_lags_years("lags_years" if lags_years is not None else "forecast.lags_years",
                            lags_years if lags_years is not None else fs.lags_years)
    try:
        cut = as_of_instant(as_of if as_of is not None else fs.as_of)
    except ValueError as exc:
        name = "as_of" if as_of is not None else "forecast.as_of"
        raise ConfigError(str(exc).replace("as_of:", f"{name}:", 1)) from None
    smoother = ss.smoother
    notes: list[str] = []
    if isinstance(source, SeriesTable):
        table = source.before(cut)
        series = series_from_table(table)
        data_end = _newest_sample(table.time_decimal_year, table.north_br_gauss, table.south_br_gauss)
        kind, scale, frames = "series", None, None
    else:
        records = records_before(source, cut)
        series = polar_series(records, ss)
        frame_t = np.atleast_1d(decimal_year(series["time"].values)) if series.sizes["time"] else np.array([])
        data_end = _newest_sample(frame_t, series["north_br_gauss"].values, series["south_br_gauss"].values)
        kind, frames = "store", int(series.attrs["frames_used"])
        scale, scale_notes = store_scale(records, ss, fs.precursor_kind)
        notes += scale_notes
    rot_t = np.atleast_1d(decimal_year(series["rotation_time"].values)) if series.sizes["rotation"] else np.array([])
    rev_result = find_reversals(rot_t, series["dipole_br_rotation_gauss"].values,
                                dataclasses.replace(rs, n_bootstrap=0), smoother)
    final = rev_result.final
    rev = None if final is None else float(final.time)

    t_ssn, v_ssn = _sunspot_arrays(sunspots)
    year = None if cut is None else cut.decimal_year
    cycles = cycle_landmarks(t_ssn, v_ssn, cs, as_of=year)
    minimum = current_minimum(t_ssn, v_ssn, cs, as_of=year)
    sunspot_input = {"sunspot_number_version": cs.sunspot_number_version,
                     "format": getattr(sunspots, "format", None), "format_source": getattr(sunspots, "format_source", None),
                     "months_used": int(t_ssn.size if year is None else np.sum(months_ended_before(t_ssn, year)))}

    w = fs.window_years
    choice = choose_phase(rev, minimum, data_end, lags, w, requested)
    item, unavailable = None, choice.reason
    if choice.available:
        try:
            item = precursor_at_phase(series, choice, rev, kind=fs.precursor_kind, window_years=w)
        except ValueError as exc:
            unavailable = f"no precursor at the phase {choice.phase!r}: {exc}"

    if choice.phase == "minimum":
        min_time, min_status = choice.center_time, minimum["status"]
    elif minimum["time"] is not None and (rev is None or minimum["time"] > rev):
        min_time, min_status = float(minimum["time"]), minimum["status"]
    else:
        min_time, min_status = None, None

    provisional: list[str] = []
    reversal_provisional = False
    if rev is not None and data_end is not None:
        margin = rs.min_persistence_years + smoother.width_years
        if rev > data_end - margin:
            reversal_provisional = True
            provisional.append(f"the final dipole reversal at {rev:.3f} lies within {margin:.2f} yr (persistence "
                               f"plus smoothing width) of the data end {data_end:.3f}; later data may move or "
                               f"remove it")
    if item is not None and choice.phase == "minimum" and min_status == "pending":
        provisional.append(f"the cycle minimum at {min_time:.3f} is pending; later sunspot data may move it")
    if item is not None and kind == "store" and ss.b0_method == "fill" and data_end is not None:
        if choice.center_time + w > data_end - ss.fill_max_gap_years:
            provisional.append(f"the window ends within series.fill_max_gap_years ({ss.fill_max_gap_years:g} yr) "
                               f"of the newest frame; later frames may fill its hidden latitude bins differently")

    return ForecastInputs(
        as_of=cut, data_end=data_end, data_date=None if data_end is None else iso_date(float(data_end)),
        source=kind, series=series, final_reversal=final, reversal_provisional=reversal_provisional,
        cycles=cycles, current_minimum=minimum, choice=choice, precursor=item,
        minimum_time=min_time, minimum_status=min_status,
        target_cycle=_target_cycle(cycles, choice, rev, int(first_cycle_number)),
        unavailable=unavailable, provisional_reasons=tuple(provisional), notes=tuple(notes), scale=scale,
        frames_used=frames, sunspot_input=sunspot_input)


def forecast_document(inputs: ForecastInputs, table, settings=None, *, scale=None,
                      allow_scale_mismatch: bool = False) -> dict:
    """The forecast JSON object of an as-of state and a calibration table.

    Parameters
    ----------
    inputs : ForecastInputs
    table : pipeline.regression.CalibrationTable
    settings : pipeline.regression.ForecastSettings, optional
    scale : str, optional
        The scale in force; default ``inputs.scale`` (the store's definition).
    allow_scale_mismatch : bool
        Forecast despite a scale mismatch (the output records the override).

    Returns
    -------
    dict
        :meth:`pipeline.regression.Forecast.to_dict` with
        :meth:`ForecastInputs.to_dict` merged in, ``warnings`` extended by the
        precursor's cautions (e.g. a lag under about 4 years), ``notes`` (how
        the phase was chosen, fallbacks such as an unnamed instrument) and
        ``skipped_rows`` (the table's problems).  Not yet passed through
        :func:`pipeline.jsonio.finite_or_none`.

    Raises
    ------
    NoForecastError
        No precursor (``inputs.unavailable``) or too few calibration rows of
        the phase (from :class:`pipeline.regression.InsufficientCalibrationError`).
    pipeline.regression.ScaleMismatchError
        The table's declared scale differs from the one in force (not allowed).
    ValueError, pipeline.regression.FitError
        A method the table cannot support, a fit that cannot be trusted.
    """
    from pipeline.regression import InsufficientCalibrationError, forecast_amplitude

    if inputs.precursor is None:
        raise NoForecastError(inputs.unavailable or "no precursor")
    item = inputs.precursor
    try:
        result = forecast_amplitude(table, item["precursor_gauss"], settings,
                                    precursor_error=item["precursor_error_gauss"], phase=inputs.choice.phase,
                                    scale=inputs.scale if scale is None else scale,
                                    allow_scale_mismatch=allow_scale_mismatch)
    except InsufficientCalibrationError as exc:
        raise NoForecastError(str(exc)) from exc
    doc = result.to_dict()
    doc.update(inputs.to_dict())
    doc["warnings"] = list(doc.get("warnings", [])) + list(item.get("notes", []) or [])
    doc["notes"] = list(inputs.choice.notes) + list(inputs.notes)
    doc["skipped_rows"] = list(table.problems)
    return doc
