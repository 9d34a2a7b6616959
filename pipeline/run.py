"""The whole job in one call: ingest -> series -> reversals -> cycles -> precursor -> forecast -> report.

:func:`run_pipeline` is what ``polecast run CONFIG.toml`` and ``polecast demo``
call.  It is incremental because ingest is (files already in the store are not
measured again) and idempotent: a run with no new data rewrites the same
products and appends no forecast-history entry, because an entry is appended
only when the date of the newest data used differs from the last entry's.

Products (all in ``run.products_dir``):

``series.nc``            the PolarSeries (xarray, netCDF-4)
``latitude_time.nc``     longitude-averaged Br per latitude bin and rotation
``reversals.json``       the ``polecast reversals`` object (plus ``bands``)
``cycles.json``          the ``polecast cycles`` object
``forecast.json``        the ``polecast forecast`` object
``forecast_history.jsonl`` append-only history (unless ``run.history`` says elsewhere)
``calibration.csv``      a copy of the calibration table used
``config.json``          the configuration used
``summary.json``         reversals, forecast, truth (demo), ingest summary, cautions
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
import json
import shutil
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from pipeline.config import ConfigError
from pipeline.jsonio import atomic_output, finite_or_none, write_json
from pipeline.regression import CAUTIONS

__all__ = ["RunSettings", "RunResult", "RunLockedError", "RUN_LOCK_NAME", "run_lock", "run_pipeline",
           "find_demo_data", "find_demo_config"]

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
        for name in ("report", "remeasure"):
            if not isinstance(getattr(self, name), bool):
                raise ConfigError(f"run.{name}: got {getattr(self, name)!r}; expected true or false")

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
    return {"reversals": {"north": finals.get("north"), "south": finals.get("south")},
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


def _last_history_date(path: Path) -> str | None:
    from pipeline.history import read_history

    if not path.exists():
        return None
    entries, _problems = read_history(path)
    return entries[-1].get("data_date") if entries else None


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

    Raises
    ------
    ConfigError
        A missing input file or a bad setting (named).
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
    _require(rs.sunspots, "sunspots")      # configuration errors first: nothing is created for them
    _require(rs.calibration, "calibration")
    truth = _truth_summary(rs.truth)
    out = Path(rs.products_dir)
    out.mkdir(parents=True, exist_ok=True)
    with run_lock(out):
        return _run_locked(config, truth, progress=progress, on_skip=on_skip)


def _run_locked(config, truth: dict | None, *, progress: bool, on_skip) -> RunResult:
    """The stages of :func:`run_pipeline`, with the run lock held."""
    from pipeline.aggregator import band_cap_means, filled_diagram, latitude_time_diagram, polar_series
    from pipeline.batch import ingest
    from pipeline.cli.cycles import landmarks_document
    from pipeline.precursor import precursor_for_forecast
    from pipeline.cycles import read_monthly_csv
    from pipeline.history import append_history, history_entry
    from pipeline.ncio import write_netcdf
    from pipeline.regression import forecast_amplitude, read_calibration_csv
    from pipeline.reversal import band_reversals, series_reversals
    from pipeline.store import check_measure_settings, open_store

    rs: RunSettings = config.run
    sunspots, calibration = Path(rs.sunspots), Path(rs.calibration)
    out = Path(rs.products_dir)
    Path(rs.store).parent.mkdir(parents=True, exist_ok=True)
    messages: list[str] = []

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

    # 2. series and the latitude-time diagram
    series = polar_series(records, config.series)
    diagram = latitude_time_diagram(records, config.series)
    write_netcdf(series, out / "series.nc")
    write_netcdf(diagram, out / "latitude_time.nc")

    # 3. reversals (poles, dipole, latitude bands)
    smoother = config.series.smoother
    reversals = {k: v.to_dict() for k, v in series_reversals(series, config.reversals, smoother).items()}
    for_bands = (filled_diagram(diagram, config.series.fill_max_gap_years)
                 if config.series.b0_method == "fill" else diagram)
    bands = band_reversals(band_cap_means(for_bands), config.reversals, smoother)
    reversals["bands"] = {pole: {b: r.to_dict() for b, r in d.items()} for pole, d in bands.items()}
    write_json(out / "reversals.json", reversals)

    # 4. cycle landmarks
    cycles_doc = landmarks_document(read_monthly_csv(sunspots), config.cycles)
    cycles = cycles_doc["cycles"]
    write_json(out / "cycles.json", cycles_doc)

    # 5. precursor and forecast
    table = read_calibration_csv(calibration)
    messages += [f"calibration {calibration}: {p}" for p in table.problems]
    try:
        item = precursor_for_forecast(series, cycles, config.forecast, config.reversals, smoother)
    except ValueError as exc:
        raise ValueError(f"cannot take the precursor from the measured series: {exc}") from None
    result = forecast_amplitude(table, item["precursor_gauss"], config.forecast,
                                precursor_error=item["precursor_error_gauss"])
    forecast = result.to_dict()
    forecast["warnings"] = list(forecast.get("warnings", [])) + list(item.get("notes", []) or [])
    forecast.update(data_date=item["data_date"], precursor_source="store", precursor_detail=item,
                    skipped_rows=list(table.problems))
    forecast = finite_or_none(forecast)
    write_json(out / "forecast.json", forecast)
    _copy_file(calibration, out / "calibration.csv")

    # 6. history: one entry per new data date, never rewritten
    history = Path(rs.history) if rs.history else out / "forecast_history.jsonl"
    appended = False
    if _last_history_date(history) != item["data_date"]:
        append_history(history, history_entry(forecast, item["data_date"], calibration=str(calibration),
                                              precursor_source="store"))
        appended = True

    # 7. summary (+ truth for a synthetic archive) and the report
    write_json(out / "config.json", config.to_dict())
    summ = {
        "reversals": {k: reversals[k] for k in ("north", "south", "dipole")},
        "forecast": forecast,
        "cycles": cycles,
        "ingest": {"line": summary.line(), "new_ok": summary.new_ok, "new_skipped": summary.new_skipped,
                   "known": summary.known, "skip_reasons": dict(summary.skip_reasons)},
        "history": {"path": str(history), "appended": appended},
        "frames": len(records),
        "cautions": CAUTIONS,
    }
    if truth is not None:
        summ["truth"] = truth
    write_json(out / "summary.json", summ)
    report = None
    if rs.report:
        from pipeline.report import build_report

        report = build_report(rs.store, out / "report", products_dir=out, settings=config.report, config=config)
    return RunResult(summary.exit_code, summary.line(), finite_or_none(summ), out, report, messages)


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
