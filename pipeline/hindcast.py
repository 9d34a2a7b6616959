"""Self-calibration from the archive and hindcasts: the forecast as it would have been made.

:func:`archive_calibration` builds calibration rows from the archive's own
past cycles (``polecast calibrate``): for each cycle that the polar series
covers, the precursor at a phase (the same window, kind and half-width as
the forecast, :func:`pipeline.precursor.precursor_at`) and the next cycle's
amplitude, the maximum of the 13-month smoothed sunspot number of the same
sunspot series (:func:`pipeline.cycles.cycle_landmarks`).

:func:`hindcast` gives, for every past cycle whose amplitude is known, the
forecast as it would have been made (``polecast hindcast``): as of the first
date on which that phase's window was complete, using data up to then only
(:func:`pipeline.asof.forecast_inputs` with ``as_of``, causal by
construction), with a calibration that leaves the target cycle out.
:func:`trajectory` gives the as-of forecasts of one target on a monthly grid
of dates.

Cycle numbering
---------------
A cycle is named by its ordinal in the sunspot series, as
:mod:`pipeline.asof` numbers ``target_cycle``: cycle k begins at the k-th
cycle minimum of the (whole) sunspot series.  The rows of
:func:`archive_calibration` carry that ordinal in ``cycle``; a given
calibration table must use it too (or be shifted by ``cycle_offset``: its
label is ``k + cycle_offset``) so that "the table less the target cycle"
drops the right row.

Which reversal, which window
----------------------------
The precursor of target cycle k at the phase ``minimum`` is the window mean
centred on the k-th minimum; at ``reversal+L`` it is centred L years after
the final dipole reversal before that minimum (the last persistent sign
change of the per-rotation dipole after the (k-1)-th minimum), as
:func:`pipeline.asof.forecast_inputs` takes it as of a date.  A cycle is
covered when its whole window lies within the polar series.

The as-of date of a hindcast row
--------------------------------
The search starts on the first day of the month after the window's end as
seen with all the data (centre + half-width), and steps one month at a time
(at most ``max_search_months``) until the as-of state has a precursor at the
phase for that target cycle.  The first date is therefore the first month
start on which the window was complete *as known then* (a reversal found
later than in hindsight moves it later; one found earlier is not searched
for: common practice, no source).

Skill
-----
Over the rows with a truth: ``n``; ``r``, Pearson's correlation of forecast
and truth (None for fewer than 3 rows or no spread); ``rmse``
:math:`\\sqrt{\\overline{(F - T)^2}}`; ``bias`` :math:`\\overline{F - T}`;
``median_relative_error`` :math:`\\mathrm{median}((F - T)/T)`;
``coverage_68`` / ``coverage_95``, the fraction of truths inside the 68% /
95% prediction intervals (intervals: noise of the calibration fit and of the
precursor, :func:`pipeline.regression.forecast_amplitude`).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np

from pipeline.asof import NoForecastError, as_of_instant, forecast_document, forecast_inputs
from pipeline.regression import CalibrationTable, InsufficientCalibrationError, parse_phase
from pipeline.timeutil import decimal_year, from_decimal_year

__all__ = [
    "CycleWindow",
    "SelfCalibration",
    "Hindcast",
    "HINDCAST_ROW_KEYS",
    "SKILL_KEYS",
    "cycle_windows",
    "archive_calibration",
    "leave_cycle_out",
    "hindcast",
    "trajectory",
    "skill",
    "month_starts",
]

#: the keys of every hindcast row (the JSON objects and the CSV columns, intervals as [low, high])
HINDCAST_ROW_KEYS = ("target_cycle", "as_of", "as_of_date", "phase", "precursor", "precursor_error", "amplitude",
                     "interval_68", "interval_95", "truth_amplitude", "error", "inside_68", "inside_95",
                     "n_calibration_cycles")
#: the keys of the skill summary
SKILL_KEYS = ("n", "r", "rmse", "bias", "median_relative_error", "coverage_68", "coverage_95")


@dataclass(frozen=True)
class CycleWindow:
    """Where the precursor of one target cycle is taken, as seen with all the data.

    Attributes
    ----------
    target_cycle : int
        Ordinal of the predicted cycle in the sunspot series (module docstring).
    center_time : float or None
        Window centre (decimal year); None when the phase cannot be placed.
    reversal_time : float or None
        The final dipole reversal before the cycle's minimum (None at ``minimum`` or when none).
    minimum_time : float
        The cycle's minimum (decimal year).
    truth_amplitude : float or None
        The cycle's 13-month smoothed maximum (sunspot number); None while unknown.
    reason : str or None
        One line: why the window cannot be taken from the polar series (None when it can).
    """

    target_cycle: int
    center_time: float | None
    reversal_time: float | None
    minimum_time: float
    truth_amplitude: float | None
    reason: str | None = None


@dataclass(frozen=True)
class SelfCalibration:
    """Calibration rows from the archive's own cycles (:func:`archive_calibration`).

    Attributes
    ----------
    table : pipeline.regression.CalibrationTable
        Columns cycle (ordinal), precursor (G), amplitude, precursor_error (G), phase, scale.
    windows : tuple of CycleWindow
        Every cycle of the sunspot series, with its window or the reason it has none.
    skipped : tuple of str
        One line per cycle without a row (not covered, amplitude not known yet).
    scale : str
        The scale of the rows (the store's measurement definition, or the one given; ``""`` unknown).
    """

    table: CalibrationTable
    windows: tuple
    skipped: tuple
    scale: str


@dataclass(frozen=True)
class Hindcast:
    """Hindcast rows and their skill (:func:`hindcast`, :func:`trajectory`).

    Attributes
    ----------
    phase : str
        The requested phase (``auto`` only for a trajectory).
    rows : list of dict
        :data:`HINDCAST_ROW_KEYS` each.
    skill : dict
        :data:`SKILL_KEYS` (:func:`skill`).
    skipped : tuple of str
        One line per target (or as-of date) without a row.
    notes : tuple of str
        Fallbacks worth saying once (e.g. the scale of an unnamed instrument).
    """

    phase: str
    rows: list
    skill: dict
    skipped: tuple = ()
    notes: tuple = ()

    def to_dict(self) -> dict:
        """The ``polecast hindcast --format json`` object: ``phase``, ``rows``, ``skill``, ``skipped``, ``notes``."""
        return {"phase": self.phase, "rows": [dict(r) for r in self.rows], "skill": dict(self.skill),
                "skipped": list(self.skipped), "notes": list(self.notes)}


# ---- windows of the archive's cycles -------------------------------------------------------------------

def _settings(config):
    from pipeline.regression import ForecastSettings
    from pipeline.reversal import ReversalSettings
    from pipeline.aggregator import SeriesSettings

    if config is None:
        return SeriesSettings(), ReversalSettings(), ForecastSettings()
    return config.series, config.reversals, config.forecast


def _rotation_span(series) -> tuple[float, float] | None:
    from pipeline.precursor import rotation_magnitude

    t, v, _ = rotation_magnitude(series, "dipole")
    ok = np.isfinite(t) & np.isfinite(v)
    return (float(t[ok].min()), float(t[ok].max())) if ok.any() else None


def _all_crossings(series, config) -> np.ndarray:
    """Times (decimal years) of every persistent crossing of the per-rotation dipole, as forecast_inputs finds them."""
    from pipeline.reversal import find_reversals

    ss, rs, _ = _settings(config)
    if not series.sizes["rotation"]:
        return np.array([])
    t = np.atleast_1d(decimal_year(series["rotation_time"].values)).astype(np.float64)
    result = find_reversals(t, series["dipole_br_rotation_gauss"].values, dataclasses.replace(rs, n_bootstrap=0),
                            ss.smoother)
    return np.array([float(c.time) for c in result.crossings], dtype=np.float64)


def cycle_windows(series, cycles, phase: str, config=None) -> tuple:
    """The window of every cycle of ``cycles`` at ``phase``, from a whole polar series (module docstring).

    Parameters
    ----------
    series : xarray.Dataset
        The polar series (all the data).
    cycles : list of dict
        :func:`pipeline.cycles.cycle_landmarks` of the whole sunspot series.
    phase : str
        ``minimum`` or ``reversal+L``.
    config : pipeline.config.Config, optional

    Returns
    -------
    tuple of CycleWindow
        One per cycle, target_cycle = its 1-based ordinal.
    """
    from pipeline.precursor import phase_lag_years

    phase = parse_phase(phase)
    lag = phase_lag_years(phase)
    _, _, fs = _settings(config)
    w = fs.window_years
    span = _rotation_span(series)
    crossings = _all_crossings(series, config) if lag is not None else np.array([])
    out = []
    for j, c in enumerate(cycles):
        m = float(c["minimum_time"])
        truth = None if c.get("maximum_value") is None else float(c["maximum_value"])
        rev, reason = None, None
        if lag is None:
            center = m
        else:
            lo = -math.inf if j == 0 else float(cycles[j - 1]["minimum_time"])
            sel = crossings[(crossings > lo) & (crossings < m)]
            if sel.size:
                rev = float(sel.max())
                center = rev + lag
            else:
                center = None
                reason = (f"cycle {j + 1}: no dipole reversal in the polar series between the minima at "
                          f"{lo:.3f} and {m:.3f}")
        if center is not None and reason is None:
            if span is None:
                reason = f"cycle {j + 1}: the polar series has no measured rotation"
            elif center - w < span[0] or center + w > span[1]:
                reason = (f"cycle {j + 1}: the window {center - w:.3f} to {center + w:.3f} ({phase}) is not "
                          f"within the polar series ({span[0]:.3f} to {span[1]:.3f})")
        out.append(CycleWindow(j + 1, center, rev, m, truth, reason))
    return tuple(out)


def archive_calibration(source, sunspots, config=None, *, phase: str, scale: str | None = None) -> SelfCalibration:
    """Calibration rows at ``phase`` from the archive's own cycles (``polecast calibrate``).

    Parameters
    ----------
    source : iterable of pipeline.measure.FrameRecord or pipeline.asof.SeriesTable
        A store's records or a polar-series table.
    sunspots : pipeline.cycles.MonthlySeries or (times, values)
        Monthly sunspot numbers (the same series the forecast uses).
    config : pipeline.config.Config, optional
    phase : str
        ``minimum`` or ``reversal+L``.
    scale : str, optional
        The rows' scale; default the store's measurement definition
        (:func:`pipeline.asof.store_scale`), ``""`` for a series table.

    Returns
    -------
    SelfCalibration

    Notes
    -----
    Row k: precursor :math:`P_k = \\frac1n\\sum_{|t_i - t_c| \\le w} |D_i|` at the
    window centre :math:`t_c` of :func:`cycle_windows` (the forecast's
    definition, :func:`pipeline.precursor.precursor_at`), amplitude the 13-month
    smoothed maximum of cycle k (Waldmeier 1961 smoothing,
    :func:`pipeline.cycles.cycle_landmarks`).  Built from all the data (a
    retrospective table).
    """
    from pipeline.precursor import precursor_at

    phase = parse_phase(phase)
    inputs = forecast_inputs(source, sunspots, config, phase=phase)
    _, _, fs = _settings(config)
    scale_in = (inputs.scale or "") if scale is None else str(scale).strip()
    windows = cycle_windows(inputs.series, inputs.cycles, phase, config)
    cyc, x, y, ex, skipped = [], [], [], [], []
    for win in windows:
        if win.reason is not None:
            skipped.append(win.reason)
            continue
        if win.truth_amplitude is None:
            skipped.append(f"cycle {win.target_cycle}: its maximum is not known yet in the sunspot series")
            continue
        try:
            item = precursor_at(inputs.series, win.center_time, kind=fs.precursor_kind, window_years=fs.window_years)
        except ValueError as exc:
            skipped.append(f"cycle {win.target_cycle}: {exc}")
            continue
        cyc.append(str(win.target_cycle))
        x.append(item["precursor_gauss"])
        y.append(win.truth_amplitude)
        e = item["precursor_error_gauss"]
        ex.append(math.nan if e is None else float(e))
    table = CalibrationTable(tuple(cyc), np.array(x, dtype=np.float64), np.array(y, dtype=np.float64),
                             precursor_error=np.array(ex, dtype=np.float64), phase=(phase,) * len(cyc),
                             scale=(scale_in,) * len(cyc))
    return SelfCalibration(table, windows, tuple(skipped), scale_in)


def leave_cycle_out(table: CalibrationTable, target_cycle: int, cycle_offset: int = 0) -> CalibrationTable:
    """The table less the rows of one cycle (label ``str(target_cycle + cycle_offset)``, spaces ignored)."""
    label = str(int(target_cycle) + int(cycle_offset))
    return table._take([str(c).strip() != label for c in table.cycle])


# ---- as-of forecasts -----------------------------------------------------------------------------------

def month_starts(start, stop, step_months: int = 1) -> list:
    """ISO dates of the first day of every ``step_months``-th month from ``start``'s month to ``stop``.

    ``start`` itself is the first date when it is a month start; otherwise the
    next month start.  Dates after ``stop`` are left out.
    """
    if int(step_months) != step_months or step_months < 1:
        raise ValueError(f"step_months: got {step_months!r}; expected a whole number of months >= 1")
    a, b = as_of_instant(start), as_of_instant(stop)
    y, m, d = (int(v) for v in a.date.split("-"))
    if d != 1 or str(a.instant)[10:].strip("T0:.") != "":
        y, m = (y + 1, 1) if m == 12 else (y, m + 1)
    out = []
    while True:
        date = f"{y:04d}-{m:02d}-01"
        if np.datetime64(date, "ns") > b.instant:
            return out
        out.append(date)
        m += int(step_months)
        y, m = y + (m - 1) // 12, (m - 1) % 12 + 1


def _row(doc: dict, target: int, truth: float | None, as_of) -> dict:
    amp = float(doc["amplitude"])
    lo68, hi68 = (float(v) for v in doc["interval_68"])
    lo95, hi95 = (float(v) for v in doc["interval_95"])
    known = truth is not None
    return {"target_cycle": int(target), "as_of": as_of.decimal_year, "as_of_date": as_of.date,
            "phase": doc["phase"], "precursor": float(doc["precursor"]),
            "precursor_error": None if doc.get("precursor_error") is None else float(doc["precursor_error"]),
            "amplitude": amp, "interval_68": [lo68, hi68], "interval_95": [lo95, hi95],
            "truth_amplitude": truth, "error": amp - truth if known else None,
            "inside_68": bool(lo68 <= truth <= hi68) if known else None,
            "inside_95": bool(lo95 <= truth <= hi95) if known else None,
            "n_calibration_cycles": int(doc["n_cycles"])}


class _Calibrations:
    """The calibration in force for a phase: a given table, or the archive's (built once per phase)."""

    def __init__(self, source, sunspots, config, given, scale):
        self.source, self.sunspots, self.config, self.given, self.scale = source, sunspots, config, given, scale
        self.cache: dict = {}

    def __call__(self, phase: str) -> CalibrationTable:
        if self.given is not None:
            return self.given
        if phase not in self.cache:
            self.cache[phase] = archive_calibration(self.source, self.sunspots, self.config, phase=phase,
                                                    scale=self.scale).table
        return self.cache[phase]


def _forecast_row(inputs, table, target, truth, cycle_offset, config, scale, allow_scale_mismatch):
    """``(row, None)`` or ``(None, reason)``."""
    _, _, fs = _settings(config)
    less = leave_cycle_out(table, target, cycle_offset)
    try:
        doc = forecast_document(inputs, less, fs, scale=scale, allow_scale_mismatch=allow_scale_mismatch)
    except (NoForecastError, InsufficientCalibrationError) as exc:
        return None, str(exc)
    return _row(doc, target, truth, inputs.as_of), None


def hindcast(source, sunspots, config=None, *, phase: str, calibration: CalibrationTable | None = None,
             cycle_offset: int = 0, scale: str | None = None, allow_scale_mismatch: bool = False,
             max_search_months: int = 36) -> Hindcast:
    """The forecast of every past cycle with a known amplitude, as it would have been made.

    Parameters
    ----------
    source : iterable of pipeline.measure.FrameRecord or pipeline.asof.SeriesTable
        Read once by the caller (a store's records); nothing is measured here.
    sunspots : pipeline.cycles.MonthlySeries or (times, values)
    config : pipeline.config.Config, optional
    phase : str
        ``minimum`` or ``reversal+L`` (``auto`` is refused: a hindcast compares one phase).
    calibration : pipeline.regression.CalibrationTable, optional
        A given table (less the target cycle for each row); default the
        archive's own rows (:func:`archive_calibration`) less the target.
    cycle_offset : int
        Label of cycle k in ``calibration`` is ``k + cycle_offset``.
    scale : str, optional
        The scale in force (default the store's; a series table has none).
    allow_scale_mismatch : bool
    max_search_months : int
        How far past the window's end (as seen with all the data) to search
        for the first as-of date with a precursor (module docstring).

    Returns
    -------
    Hindcast

    Raises
    ------
    ValueError
        For ``auto`` or a bad phase.
    pipeline.regression.ScaleMismatchError
        The table's declared scale differs from the one in force (not allowed).
    """
    from pipeline.precursor import AUTO_PHASE

    if isinstance(phase, str) and phase.strip().lower() == AUTO_PHASE:
        raise ValueError("phase: got 'auto'; a hindcast of every cycle compares one phase: give minimum or "
                         "reversal+L (auto is accepted with a trajectory, --from/--to)")
    phase = parse_phase(phase)
    _, _, fs = _settings(config)
    full = forecast_inputs(source, sunspots, config, phase=phase)
    tables = _Calibrations(source, sunspots, config, calibration, scale)
    table = tables(phase)
    windows = cycle_windows(full.series, full.cycles, phase, config)
    rows, skipped = [], []
    for win in windows:
        if win.truth_amplitude is None:
            skipped.append(f"cycle {win.target_cycle}: its maximum is not known yet in the sunspot series")
            continue
        if win.reason is not None:
            skipped.append(win.reason)
            continue
        end = float(win.center_time) + fs.window_years
        dates = month_starts(from_decimal_year(end), from_decimal_year(end + max_search_months / 12.0))
        found, last = None, "no as-of date searched"
        for date in dates:
            inputs = forecast_inputs(source, sunspots, config, phase=phase, as_of=date)
            if inputs.precursor is None or inputs.target_cycle is None or inputs.target_cycle < win.target_cycle:
                last = inputs.unavailable or f"as of {date} the precursor is for cycle {inputs.target_cycle}"
                continue
            if inputs.target_cycle > win.target_cycle:
                last = f"as of {date} the precursor is already for cycle {inputs.target_cycle}"
                break
            found = inputs
            break
        if found is None:
            skipped.append(f"cycle {win.target_cycle}: no as-of date within {max_search_months} months of the "
                           f"window's end ({end:.3f}) gives a precursor at {phase}: {last}")
            continue
        row, reason = _forecast_row(found, table, win.target_cycle, win.truth_amplitude, cycle_offset, config,
                                    scale, allow_scale_mismatch)
        if row is None:
            skipped.append(f"cycle {win.target_cycle}: {reason}")
        else:
            rows.append(row)
    return Hindcast(phase, rows, skill(rows), tuple(skipped), tuple(full.notes))


def trajectory(source, sunspots, config=None, *, phase: str, start, stop, step_months: int = 1,
               target_cycle: int | None = None, calibration: CalibrationTable | None = None, cycle_offset: int = 0,
               scale: str | None = None, allow_scale_mismatch: bool = False) -> Hindcast:
    """The as-of forecasts of one target cycle on month starts from ``start`` to ``stop``.

    Parameters
    ----------
    phase : str
        ``auto`` (the forecast's own choice on each date), ``minimum`` or ``reversal+L``.
    start, stop : str or float
        ISO dates or decimal years; as-of dates are month starts in between (:func:`month_starts`).
    step_months : int
    target_cycle : int, optional
        The target; default the target of the first date that gives a precursor.
        Dates whose precursor is for another cycle are left out with a reason.
    calibration, cycle_offset, scale, allow_scale_mismatch
        As :func:`hindcast` (the archive's rows of each date's phase by default).

    Returns
    -------
    Hindcast
        One row per as-of date with a forecast; ``truth_amplitude`` None while
        the target's maximum is not in the sunspot series.
    """
    from pipeline.cycles import CycleSettings, cycle_landmarks
    from pipeline.precursor import check_phase_request
    from pipeline.asof import _sunspot_arrays

    requested = check_phase_request("phase", phase)
    dates = month_starts(start, stop, step_months)
    cs = config.cycles if config is not None else CycleSettings()
    cycles = cycle_landmarks(*_sunspot_arrays(sunspots), cs)
    tables = _Calibrations(source, sunspots, config, calibration, scale)
    rows, skipped, notes = [], [], []
    for date in dates:
        inputs = forecast_inputs(source, sunspots, config, phase=requested, as_of=date)
        for n in inputs.notes:
            if n not in notes:
                notes.append(n)
        if inputs.precursor is None:
            skipped.append(f"as of {date}: {inputs.unavailable}")
            continue
        if target_cycle is None:
            target_cycle = inputs.target_cycle
        if inputs.target_cycle != target_cycle:
            skipped.append(f"as of {date}: the precursor is for cycle {inputs.target_cycle}, not {target_cycle}")
            continue
        k = int(target_cycle) - 1
        truth = (float(cycles[k]["maximum_value"]) if 0 <= k < len(cycles)
                 and cycles[k]["maximum_value"] is not None else None)
        row, reason = _forecast_row(inputs, tables(inputs.choice.phase), target_cycle, truth, cycle_offset, config,
                                    scale, allow_scale_mismatch)
        if row is None:
            skipped.append(f"as of {date}: {reason}")
        else:
            rows.append(row)
    return Hindcast(requested, rows, skill(rows), tuple(skipped), tuple(notes))


def skill(rows) -> dict:
    """The skill of forecasts against truths over the rows that have a truth (module docstring).

    Returns
    -------
    dict
        :data:`SKILL_KEYS`; None where undefined (no rows; ``r`` with fewer
        than 3 rows or no spread).

    Notes
    -----
    :math:`r = \\frac{\\sum (F-\\bar F)(T-\\bar T)}{\\sqrt{\\sum (F-\\bar F)^2 \\sum (T-\\bar T)^2}}` (Pearson);
    RMSE :math:`\\sqrt{\\overline{(F-T)^2}}`; bias :math:`\\overline{F-T}`;
    median relative error :math:`\\mathrm{median}((F-T)/T)`.
    """
    done = [r for r in rows if r.get("truth_amplitude") is not None]
    n = len(done)
    out = {k: None for k in SKILL_KEYS}
    out["n"] = n
    if n == 0:
        return out
    f = np.array([r["amplitude"] for r in done], dtype=np.float64)
    t = np.array([r["truth_amplitude"] for r in done], dtype=np.float64)
    d = f - t
    out["rmse"] = float(np.sqrt(np.mean(d ** 2)))
    out["bias"] = float(np.mean(d))
    out["median_relative_error"] = float(np.median(d / t))
    out["coverage_68"] = float(np.mean([r["inside_68"] for r in done]))
    out["coverage_95"] = float(np.mean([r["inside_95"] for r in done]))
    if n >= 3 and np.ptp(f) > 0 and np.ptp(t) > 0:
        out["r"] = float(np.corrcoef(f, t)[0, 1])
    return out
