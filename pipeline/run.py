"""The whole job in one call: ingest -> series -> reversals -> cycles -> precursor -> forecast -> report.

:func:`run_pipeline` is what ``polecast run CONFIG.toml`` and ``polecast demo``
call.  It is incremental because ingest is (files already in the store are not
measured again) and idempotent: a run with no new data rewrites the same
products and appends no forecast-history entry, because an entry is appended
only when the data date, the as-of date, the phase, the target cycle or the
calibration file's digest differs from the last entry's.

The forecast is the phase-matched one of :mod:`pipeline.asof` (the same
computation as ``polecast forecast --store``): the store's records and the
sunspot months as of ``[forecast] as_of`` (all of them by default), the phase
of ``[forecast] phase`` (``auto``: the minimum once known, else the largest
complete ``reversal+L``), and only the calibration rows of that phase.  The
series, reversal and cycle products describe the whole archive.

A run never aborts for want of a forecast.  When none can be made (no
reversal or minimum yet, no complete window, too few calibration rows of the
phase) every other product and the report are written, ``forecast.json``
holds the state with ``forecast_unavailable`` (the one-line reason),
``summary.json`` has ``"forecast": null`` and ``"forecast_unavailable"``, no
history entry is appended and the exit code is 3 (:data:`EXIT_NO_FORECAST`;
2 stays "usage or configuration error").

Products (all in ``run.products_dir``):

``series.nc``            the PolarSeries (xarray, netCDF-4)
``latitude_time.nc``     longitude-averaged Br per latitude bin and rotation
``reversals.json``       the ``polecast reversals`` object (plus ``bands``)
``cycles.json``          the ``polecast cycles`` object
``forecast.json``        the ``polecast forecast`` object (or the state and why there is no forecast)
``forecast_history.jsonl`` append-only history (unless ``run.history`` says elsewhere)
``calibration.csv``      a copy of the calibration table used
``config.json``          the configuration used
``trajectory.json``      the forecast as of every ``run.trajectory_step_months`` month starts (when set)
``summary.json``         reversals, forecast (or null and the reason), how the precursor was taken,
                         sunspot input (declared sunspot-number version), calibration digest and scale,
                         truth (demo), ingest summary, cautions
``report/index.html``    the self-contained report and its figures

One run at a time per products directory: the whole run holds an exclusive
``flock`` on ``products_dir/.polecast-run.lock`` (:func:`run_lock`); a second
run of the same configuration is refused at once with a one-line
:class:`RunLockedError` (``polecast run`` exits 2) and never waits.  A dead
process releases the lock by itself (the kernel drops ``flock`` locks when
their holder exits).  Every product is written to a temporary file in
``products_dir`` and renamed into place (:func:`pipeline.jsonio.atomic_output`),
so a reader sees a whole old product or a whole new one; the forecast history
is only ever appended to, under the same lock.

The records are read under the settings in force: those of the configuration's
``[measure]`` (:func:`pipeline.store.check_measure_settings`); a store holding
records measured otherwise is refused with a one-line
:class:`pipeline.store.StoreSettingsError`.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import shutil
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from pipeline.cli import EXIT_NO_FORECAST
from pipeline.config import ConfigError, check_number
from pipeline.jsonio import atomic_output, finite_or_none, write_json
from pipeline.regression import CAUTIONS

__all__ = ["RunSettings", "RunResult", "RunLockedError", "RUN_LOCK_NAME", "EXIT_NO_FORECAST",
           "TRAJECTORY_ROW_KEYS", "run_lock", "run_pipeline", "forecast_trajectory", "find_demo_data",
           "find_demo_config"]

#: the lock file of a run, inside the products directory
RUN_LOCK_NAME = ".polecast-run.lock"


class RunLockedError(RuntimeError):
    """Another ``polecast run`` holds the products directory; ``str(exc)`` names it and the fix."""

@dataclass(frozen=True)
class RunSettings:
    """Paths and switches of ``polecast run`` (section ``[run]``).

    Relative paths are taken relative to the configuration file's folder.

    Attributes
    ----------
    archive : tuple of str
        Directories, files or glob patterns of magnetograms to ingest.
    store : str
        The SQLite store of measured frames.
    products_dir : str
        Where the products and the report go.
    sunspots : str
        Monthly mean sunspot numbers (CSV; the ``polecast cycles`` format).
    calibration : str
        Calibration table (CSV: ``cycle,precursor,amplitude``).
    history : str
        Forecast-history file; empty means ``products_dir/forecast_history.jsonl``.
    scheduler : str
        ``tcp://HOST:PORT`` of a dask.distributed scheduler; empty runs local workers.
    truth : str
        Optional truth file of a synthetic archive (``truth.json``) to compare with.
    report : bool
        Build the HTML report.
    remeasure : bool
        Measure again files measured with another configuration.
    allow_scale_mismatch : bool
        Forecast although the calibration's declared scale differs from the
        store's measurement definition (the forecast records the override);
        otherwise that is a configuration error (exit 2, every other product
        written).
    trajectory_step_months : int
        Write ``trajectory.json``: the run's forecast as of every this-many
        month starts (:func:`forecast_trajectory`); 0 (default) writes none.
        Each date rebuilds the polar series from the records before it.
    trajectory_start : str
        First as-of date of the trajectory (ISO date); empty: the final
        dipole reversal of the whole archive (or its first frame when it has
        none).  The last is the month start after the newest frame.
    """

    archive: tuple = ()
    store: str = "polecast-store.sqlite"
    products_dir: str = "polecast-products"
    sunspots: str = ""
    calibration: str = ""
    history: str = ""
    scheduler: str = ""
    truth: str = ""
    report: bool = True
    remeasure: bool = False
    allow_scale_mismatch: bool = False
    trajectory_step_months: int = 0
    trajectory_start: str = ""

    def __post_init__(self):
        arch = (self.archive,) if isinstance(self.archive, str) else self.archive
        if not isinstance(arch, (list, tuple)) or not all(isinstance(a, str) and a for a in arch):
            raise ConfigError(f"run.archive: got {self.archive!r}; expected a list of paths or glob patterns")
        object.__setattr__(self, "archive", tuple(arch))
        for name in ("store", "products_dir", "sunspots", "calibration", "history", "scheduler", "truth"):
            if not isinstance(getattr(self, name), str):
                raise ConfigError(f"run.{name}: got {getattr(self, name)!r}; expected a string (a path)")
        if self.scheduler and not self.scheduler.startswith(("tcp://", "tls://", "inproc://")):
            raise ConfigError(f"run.scheduler: got {self.scheduler!r}; expected tcp://HOST:PORT or empty")
        for name in ("report", "remeasure", "allow_scale_mismatch"):
            if not isinstance(getattr(self, name), bool):
                raise ConfigError(f"run.{name}: got {getattr(self, name)!r}; expected true or false")
        check_number("run.trajectory_step_months", self.trajectory_step_months, lo=0, hi=120, integer=True)
        if isinstance(self.trajectory_start, (_dt.date, _dt.datetime)):  # TOML date
            object.__setattr__(self, "trajectory_start", self.trajectory_start.isoformat()[:10])
        if not isinstance(self.trajectory_start, str):
            raise ConfigError(f"run.trajectory_start: got {self.trajectory_start!r}; expected an ISO date "
                              f"YYYY-MM-DD or empty")
        if self.trajectory_start:
            from pipeline.asof import as_of_instant

            try:
                as_of_instant(self.trajectory_start)
            except ValueError:
                raise ConfigError(f"run.trajectory_start: got {self.trajectory_start!r}; expected an ISO date "
                                  f"YYYY-MM-DD or empty (the final dipole reversal)") from None

    def resolved(self, base: Path) -> "RunSettings":
        """Paths made absolute against ``base`` (the configuration file's folder)."""
        def fix(p):
            return "" if not p else str(p if Path(p).is_absolute() else (base / p))

        return dataclasses.replace(
            self, archive=tuple(fix(a) for a in self.archive), store=fix(self.store),
            products_dir=fix(self.products_dir), sunspots=fix(self.sunspots),
            calibration=fix(self.calibration), history=fix(self.history), truth=fix(self.truth))


@dataclass
class RunResult:
    """What one run produced (paths and the headline numbers)."""

    exit_code: int
    ingest_line: str
    summary: dict
    products_dir: Path
    report: Path | None
    messages: list


def _require(path: str, key: str) -> Path:
    if not path:
        raise ConfigError(f"run.{key}: not set; give the path of the file in the [run] section")
    p = Path(path)
    if not p.exists():
        raise ConfigError(f"run.{key}: {path} does not exist")
    return p


def _truth_summary(path: str) -> dict | None:
    """The truth of a synthetic archive (``run.truth``) for the summary; None when not configured."""
    if not path:
        return None
    p = _require(path, "truth")
    try:
        truth = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ConfigError(f"run.truth: {path} is not readable JSON ({exc}); give the truth.json of a "
                          f"synthetic archive or leave run.truth empty") from None
    if not isinstance(truth, dict) or not isinstance(truth.get("final_reversals"), dict):
        raise ConfigError(f"run.truth: {path} has no final_reversals object; give the truth.json that "
                          f"`polecast synth` wrote, or leave run.truth empty")
    finals = truth["final_reversals"]
    dipole = finals.get("dipole", truth.get("final_dipole_reversal"))
    return {"reversals": {"north": finals.get("north"), "south": finals.get("south"), "dipole": dipole},
            "next_amplitude": truth.get("next_amplitude"),
            "precursor_at_last_minimum": truth.get("precursor_at_last_minimum"),
            "precursor_at_last_minimum_error": truth.get("precursor_at_last_minimum_error"),
            "last_minimum_time": truth.get("last_minimum_time"),
            "source": str(path)}


@contextmanager
def run_lock(products_dir):
    """Hold the exclusive run lock of a products directory for the duration of a ``with`` block.

    Parameters
    ----------
    products_dir : path-like
        An existing directory; the lock file is ``products_dir/.polecast-run.lock``.

    Raises
    ------
    RunLockedError
        At once (never waits) when another process holds the lock; the
        message names the holder (pid, host, since when).

    Notes
    -----
    ``flock(2)`` locks belong to the open file and are released by the
    kernel when the holder exits, even on SIGKILL, so a dead run never
    leaves the directory locked.  The lock file itself is kept (removing it
    would let two runs lock two different files of the same name).
    """
    from pipeline.locking import LockHeldError, release_lock, take_lock

    path = Path(products_dir) / RUN_LOCK_NAME
    try:
        fd = take_lock(path)
    except LockHeldError as exc:
        raise RunLockedError(
            f"products directory {products_dir} is in use by another `polecast run` ({exc.holder}); wait for "
            f"it to finish or stop it, then run again (a dead process releases the lock by itself)") from None
    try:
        yield path
    finally:
        release_lock(fd)


def _copy_file(src: Path, dst: Path) -> None:
    with atomic_output(dst) as tmp:
        shutil.copyfile(src, tmp)


def _read_inputs(rs: RunSettings, cycle_settings):
    """The sunspot series and the calibration table, read before anything is created.

    Returns
    -------
    (pipeline.cycles.MonthlySeries, pipeline.regression.CalibrationTable, list of str)
        The last item: the fallbacks to say once (a detected sunspot layout).

    Raises
    ------
    ConfigError
        A file that cannot be read or parsed, naming the ``[run]`` key.
    """
    from pipeline.cycles import read_sunspot_file
    from pipeline.regression import read_calibration_csv

    sunspots = _require(rs.sunspots, "sunspots")      # configuration errors first: nothing is created for them
    calibration = _require(rs.calibration, "calibration")
    try:
        months = read_sunspot_file(sunspots, cycle_settings.sunspot_format)
    except ValueError as exc:
        raise ConfigError(f"run.sunspots: {exc}") from None
    try:
        table = read_calibration_csv(calibration)
    except ValueError as exc:
        raise ConfigError(f"run.calibration: {exc}") from None
    notes = []
    if months.format_source == "detected":
        notes.append(f"note: sunspot file {sunspots}: format not declared; read as {months.format} (declare it "
                     f"with [cycles] sunspot_format)")
    return months, table, notes


def run_pipeline(config, *, progress: bool = False, on_skip=None) -> RunResult:
    """Run every stage as the configuration says.

    Parameters
    ----------
    config : pipeline.config.Config
        With a ``[run]`` section whose paths are already absolute (see
        :meth:`RunSettings.resolved`).
    progress : bool
        Draw the ingest progress bar (a terminal).
    on_skip : callable, optional
        ``on_skip(path, reason)`` for each newly skipped file.

    Returns
    -------
    RunResult
        ``exit_code`` 0 ok, 1 new files were skipped, 2 the calibration's
        declared scale differs from the store's (every product but the
        forecast is written), 3 (:data:`EXIT_NO_FORECAST`) no forecast can be
        made from what is known: no reversal or minimum yet, no complete
        window, too few calibration rows of the phase.  With 2 or 3 the
        series, reversals, cycles, summary (``"forecast": null`` and
        ``"forecast_unavailable"``: the one-line reason) and report are
        written all the same; 3 wins over 1 (the ingest line says what was
        skipped).

    Raises
    ------
    ConfigError
        A missing or unreadable input file or a bad setting (named).
    RunLockedError
        Another run holds the products directory (:func:`run_lock`).
    pipeline.store.StoreSettingsError
        The store holds records measured under other settings than
        ``config.measure``.
    pipeline.store.StoreError, pipeline.batch.IngestError
        The store is unusable or locked, or the ingest failed.
    """
    rs: RunSettings = config.run
    if not rs.archive:
        raise ConfigError("run.archive: empty; list the folders, files or glob patterns of magnetograms")
    months, table, notes = _read_inputs(rs, config.cycles)
    truth = _truth_summary(rs.truth)
    out = Path(rs.products_dir)
    out.mkdir(parents=True, exist_ok=True)
    with run_lock(out):
        return _run_locked(config, truth, months, table, notes, progress=progress, on_skip=on_skip)


def _history_key(entry: dict) -> tuple:
    """What makes a history entry new: the data used, the as-of date, the phase, the target and the calibration."""
    return tuple(entry.get(k) for k in ("data_date", "as_of", "phase", "target_cycle", "calibration_digest"))


def _last_history_key(path: Path) -> tuple | None:
    from pipeline.history import read_history

    if not path.exists():
        return None
    entries, _problems = read_history(path)
    return _history_key(entries[-1]) if entries else None


def _forecast_products(inputs, table, config, calibration: Path) -> tuple[dict, dict | None, str | None, int]:
    """``(forecast.json object, forecast or None, reason or None, exit code)`` of an as-of state and a table.

    The exit code is 0 with a forecast, :data:`EXIT_NO_FORECAST` when none
    can be made (:class:`pipeline.asof.NoForecastError`: no precursor, too few
    calibration rows of the phase), 2 when the table's declared scale differs
    from the store's (:class:`pipeline.regression.ScaleMismatchError`, a
    configuration error unless ``run.allow_scale_mismatch``).
    """
    from pipeline.asof import NoForecastError, forecast_document
    from pipeline.history import declared_calibration_scale
    from pipeline.regression import ScaleMismatchError

    calib = {"calibration": str(calibration), "calibration_scale": declared_calibration_scale(
        table, inputs.choice.phase) if inputs.choice.phase else None}
    try:
        doc = forecast_document(inputs, table, config.forecast, allow_scale_mismatch=config.run.allow_scale_mismatch)
    except (NoForecastError, ScaleMismatchError) as exc:
        reason = " ".join(str(exc).split())
        state = inputs.to_dict()
        state.update(forecast_unavailable=reason, notes=list(inputs.choice.notes) + list(inputs.notes),
                     skipped_rows=list(table.problems), cautions=CAUTIONS, **calib)
        code = EXIT_NO_FORECAST if isinstance(exc, NoForecastError) else 2
        return finite_or_none(state), None, reason, code
    doc.update(calib)
    doc = finite_or_none(doc)
    return doc, doc, None, 0


def _truth_target(truth: dict, cycles: list) -> int | None:
    """The ordinal (as :mod:`pipeline.asof` numbers targets) of the cycle beginning at truth's last minimum."""
    m = truth.get("last_minimum_time")
    if m is None:
        return None
    minima = np.array([c["minimum_time"] for c in cycles], dtype=np.float64)
    return 1 + int(np.sum(minima < float(m) - 1.0 / 24.0))   # half a month: the numbering of pipeline.asof


#: keys of every row of ``trajectory.json`` (intervals as [low, high]; nulls where no forecast was made)
TRAJECTORY_ROW_KEYS = ("as_of", "as_of_decimal_year", "data_date", "phase", "target_cycle", "minimum_time",
                       "minimum_status", "precursor", "precursor_error", "amplitude", "interval_68", "interval_95",
                       "truth_amplitude", "truth_source", "forecast_unavailable")


def _truth_of_target(target, cycles: list, truth: dict | None) -> tuple[float | None, str | None]:
    """The amplitude a target cycle turned out to have: its smoothed maximum in the sunspot series, else the
    synthetic star's ``next_amplitude`` when the target is the cycle that begins at its ``last_minimum_time``."""
    if target is None:
        return None, None
    k = int(target) - 1
    if 0 <= k < len(cycles) and cycles[k].get("maximum_value") is not None:
        return float(cycles[k]["maximum_value"]), "sunspot maximum"
    if truth and truth.get("next_amplitude") is not None and truth.get("last_minimum_time") is not None:
        if truth.get("target_cycle") == target:
            return float(truth["next_amplitude"]), "truth.json"
    return None, None


def forecast_trajectory(records, months, table, config, dates, *, truth: dict | None = None) -> list[dict]:
    """The run's forecast as it would have been made as of each date (``trajectory.json``'s rows).

    Parameters
    ----------
    records : list of pipeline.measure.FrameRecord
        The store's records (all of them; each date uses those before it).
    months : pipeline.cycles.MonthlySeries
    table : pipeline.regression.CalibrationTable
        The run's calibration, used whole (a real-time forecast, not a
        hindcast: :func:`pipeline.hindcast.trajectory` leaves the target out).
    config : pipeline.config.Config
    dates : sequence of str
        As-of dates (ISO), e.g. :func:`pipeline.hindcast.month_starts`.
    truth : dict, optional
        :func:`_truth_summary` of a synthetic archive, with ``target_cycle``.

    Returns
    -------
    list of dict
        :data:`TRAJECTORY_ROW_KEYS` per date: the forecast of
        :func:`pipeline.asof.forecast_inputs` as of the date and the run's own
        phase rule (:func:`_forecast_products`), or the reason there was none;
        ``truth_amplitude`` from :func:`_truth_of_target`.

    Notes
    -----
    Causal by construction (:mod:`pipeline.asof`): nothing after a date
    changes its row.
    """
    from pipeline.asof import forecast_inputs
    from pipeline.cycles import cycle_landmarks

    cycles = cycle_landmarks(months.time_decimal_year, months.values, config.cycles)
    rows = []
    for date in dates:
        inputs = forecast_inputs(records, months, config, as_of=date)
        doc, forecast, reason, _code = _forecast_products(inputs, table, config, Path(config.run.calibration))
        f = forecast or {}
        amp, source = _truth_of_target(doc.get("target_cycle"), cycles, truth)
        rows.append({"as_of": date, "as_of_decimal_year": doc.get("as_of_decimal_year"),
                     "data_date": doc.get("data_date"), "phase": doc.get("phase"),
                     "target_cycle": doc.get("target_cycle"), "minimum_time": doc.get("minimum_time"),
                     "minimum_status": doc.get("minimum_status"), "precursor": f.get("precursor"),
                     "precursor_error": f.get("precursor_error"), "amplitude": f.get("amplitude"),
                     "interval_68": f.get("interval_68"), "interval_95": f.get("interval_95"),
                     "truth_amplitude": amp if forecast is not None else None,
                     "truth_source": source if forecast is not None else None, "forecast_unavailable": reason})
    return finite_or_none(rows)


def _trajectory_document(records, months, table, config, series, reversals, truth) -> dict:
    """``trajectory.json``: month starts from ``run.trajectory_start`` to just after the newest frame."""
    from pipeline.hindcast import month_starts
    from pipeline.timeutil import decimal_year, from_decimal_year

    rs: RunSettings = config.run
    t = np.atleast_1d(decimal_year(series["time"].values)) if series.sizes["time"] else np.array([])
    if t.size == 0:
        return {"rows": [], "dates": 0}
    final = (reversals.get("dipole") or {}).get("final") or {}
    start = rs.trajectory_start or from_decimal_year(float(final.get("time", t.min())))
    stop = from_decimal_year(float(t.max()) + 1.0 / 12.0)
    dates = month_starts(start, stop, rs.trajectory_step_months)
    rows = forecast_trajectory(records, months, table, config, dates, truth=truth)
    return {"step_months": rs.trajectory_step_months, "start": dates[0] if dates else None,
            "stop": dates[-1] if dates else None, "phase_requested": config.forecast.phase,
            "calibration": str(rs.calibration), "rows": rows,
            "truth": None if truth is None else {"target_cycle": truth.get("target_cycle"),
                                                 "next_amplitude": truth.get("next_amplitude")},
            "cautions": CAUTIONS}


def _run_locked(config, truth: dict | None, months, table, notes: list, *, progress: bool, on_skip) -> RunResult:
    """The stages of :func:`run_pipeline`, with the run lock held."""
    from pipeline.aggregator import latitude_time_diagram, polar_series
    from pipeline.asof import forecast_inputs
    from pipeline.batch import ingest
    from pipeline.cli.cycles import landmarks_document
    from pipeline.history import append_history, history_entry
    from pipeline.ncio import write_netcdf
    from pipeline.store import check_measure_settings, file_digest, open_store
    from pipeline.systematics import store_reversals

    rs: RunSettings = config.run
    calibration = Path(rs.calibration)
    out = Path(rs.products_dir)
    Path(rs.store).parent.mkdir(parents=True, exist_ok=True)
    messages: list[str] = list(notes)

    # 1. ingest (incremental)
    with open_store(rs.store, "a") as store:
        summary = ingest(list(rs.archive), store, config.measure, config.ingest,
                         scheduler=rs.scheduler or None, remeasure=rs.remeasure, progress=progress,
                         on_skip=on_skip)
    with open_store(rs.store, "r") as store:
        measure = check_measure_settings(store, config.measure)  # records of other settings: refused
        records = list(store.iter_records(measure=measure))
    if not records:
        raise ConfigError(f"run.archive: no file under {', '.join(rs.archive)} could be measured")

    # 2. series and the latitude-time diagram (all the data: the products describe the whole archive)
    series = polar_series(records, config.series)
    diagram = latitude_time_diagram(records, config.series)
    write_netcdf(series, out / "series.nc")
    write_netcdf(diagram, out / "latitude_time.nc")

    # 3. reversals (poles, dipole, latitude bands)
    reversals = store_reversals(records, series, config, diagram)   # noise bootstrap and the systematic ensemble
    write_json(out / "reversals.json", reversals)

    # 4. cycle landmarks (all the sunspot months)
    messages += [f"sunspot file {rs.sunspots}: {p}" for p in months.problems]
    cycles_doc = landmarks_document(months, config.cycles)
    cycles = cycles_doc["cycles"]
    write_json(out / "cycles.json", cycles_doc)

    # 5. the state as of [forecast] as_of, the precursor at its phase and the phase-matched forecast
    #    (pipeline.asof: the same computation as `polecast forecast --store`); no forecast is not an abort
    messages += [f"calibration {calibration}: {p}" for p in table.problems]
    inputs = forecast_inputs(records, months, config)
    messages += [f"note: {n}" for n in list(inputs.choice.notes) + list(inputs.notes)]
    doc, forecast, unavailable, forecast_code = _forecast_products(inputs, table, config, calibration)
    write_json(out / "forecast.json", doc)
    _copy_file(calibration, out / "calibration.csv")
    if truth is not None:
        truth = dict(truth, target_cycle=_truth_target(truth, cycles))
    if rs.trajectory_step_months:
        write_json(out / "trajectory.json", _trajectory_document(records, months, table, config, series,
                                                                 reversals, truth))
    elif (out / "trajectory.json").exists():
        (out / "trajectory.json").unlink()   # made under another configuration: the report must not show it

    # 6. history: one entry per new forecast (data date, as-of date, phase, target, calibration), never rewritten
    history = Path(rs.history) if rs.history else out / "forecast_history.jsonl"
    appended = False
    if forecast is not None:
        entry = history_entry(forecast, forecast["data_date"], calibration=str(calibration),
                              precursor_source=forecast["precursor_source"],
                              calibration_digest=file_digest(calibration),
                              calibration_scale=forecast["calibration_scale"])
        if _last_history_key(history) != _history_key(entry):
            append_history(history, entry)
            appended = True

    # 7. summary (+ truth for a synthetic archive) and the report
    write_json(out / "config.json", config.to_dict())
    state = inputs.to_dict()
    summ = {
        "reversals": {k: reversals[k] for k in ("north", "south", "dipole")},
        "forecast": forecast,
        "forecast_unavailable": unavailable,
        "precursor": {k: doc.get(k) for k in _STATE_KEYS},
        "sunspot_input": dict(state["sunspot_input"], file=str(rs.sunspots)),
        "calibration": {"path": str(calibration), "digest": file_digest(calibration),
                        "scale": doc.get("calibration_scale")},
        "cycles": cycles,
        "ingest": {"line": summary.line(), "new_ok": summary.new_ok, "new_skipped": summary.new_skipped,
                   "known": summary.known, "skip_reasons": dict(summary.skip_reasons)},
        "history": {"path": str(history), "appended": appended},
        "frames": len(records),
        "cautions": CAUTIONS,
    }
    if truth is not None:
        summ["truth"] = truth
    summ = finite_or_none(summ)
    write_json(out / "summary.json", summ)
    report = None
    if rs.report:
        from pipeline.report import build_report

        report = build_report(rs.store, out / "report", products_dir=out, settings=config.report, config=config)
    exit_code = forecast_code if forecast_code else summary.exit_code
    return RunResult(exit_code, summary.line(), summ, out, report, messages)


#: the keys of summary.json's ``precursor`` object: when and how the precursor was (or could not be) taken
_STATE_KEYS = ("phase", "lag_years", "phase_requested", "phase_notes", "minimum_time", "minimum_status",
               "reversal_time", "reversal_provisional", "target_cycle", "data_date", "as_of", "provisional",
               "provisional_reasons", "precursor_source", "precursor_detail", "current_minimum")


def find_demo_data(explicit: str | None = None) -> Path:
    """The embedded demo archive: ``--data``, ``$POLECAST_DEMO_DATA``, ./demo_fits or the clone's demo_fits."""
    import os

    candidates = [explicit, os.environ.get("POLECAST_DEMO_DATA"), Path.cwd() / "demo_fits",
                  Path(__file__).resolve().parent.parent / "demo_fits"]
    for c in candidates:
        if c and (Path(c) / "truth.json").exists():
            return Path(c).resolve()
    raise ConfigError("demo data not found: run from a clone of polecast (it holds demo_fits/), "
                      "or pass --data DIR / set POLECAST_DEMO_DATA")



def find_demo_config() -> Path:
    """``configs/demo.toml`` of the clone (the working folder first, then beside the package)."""
    for base in (Path.cwd(), Path(__file__).resolve().parent.parent):
        path = base / "configs" / "demo.toml"
        if path.exists():
            return path.resolve()
    raise ConfigError("configs/demo.toml not found: run `polecast demo` from a clone of polecast")
