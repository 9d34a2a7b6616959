"""Figures and the self-contained HTML report of a store and its products.

:func:`build_report` reads what ``polecast run`` wrote into a products
directory (any file may be missing) and the store, draws the five figures
(:mod:`pipeline.report.figures`) and writes ``index.html``
(:mod:`pipeline.report.html`) with the figures embedded.  On a bare store it
recomputes the series, the latitude-time diagram and the reversals with the
given configuration's settings (the defaults without one), so
``polecast report STORE --out DIR`` works without products.

Settings are never guessed: the products' ``config.json`` (the configuration
they were made with) must be readable and valid, or the report stops with a
:class:`pipeline.config.ConfigError` naming the section and the reason.  The
store is read under the measure settings in force: ``config.json``'s
``[measure]``, else the given configuration's, else the store's own
(:func:`pipeline.store.check_measure_settings`); a store holding records
measured otherwise is refused (:class:`pipeline.store.StoreSettingsError`).
Every file is written atomically (:func:`pipeline.jsonio.atomic_output`).

Products read from ``products_dir`` (see :data:`PRODUCT_FILES`):

- ``series.nc``            PolarSeries Dataset (:func:`pipeline.aggregator.polar_series`)
- ``latitude_time.nc``     latitude-time DataArray (:func:`pipeline.aggregator.latitude_time_diagram`)
- ``reversals.json``       the ``polecast reversals`` object (north/south/dipole, optional bands)
- ``cycles.json``          the ``polecast cycles`` object
- ``forecast.json``        the ``polecast forecast`` object
- ``forecast_history.jsonl`` the append-only history (:mod:`pipeline.history`)
- ``trajectory.json``      the as-of forecast trajectory (:func:`pipeline.run.forecast_trajectory`)
- ``calibration.csv``      the calibration table used (``cycle,precursor,amplitude``, optional errors,
                           ``phase`` and ``scale``; the rows of the forecast's phase are shown)
- ``config.json``          the configuration used (``Config.to_dict()``)
- ``summary.json``         the run summary; for the demo with ``truth``
- ``hindcasts/*.json``     hindcast products (:data:`HINDCAST_DIR`), saved from ``polecast hindcast
  --format json``: one per phase, drawn as skill against phase
"""

from __future__ import annotations

import datetime as _dt
import json
from dataclasses import dataclass, field
from pathlib import Path

from pipeline import __version__
from pipeline.config import ConfigError, check_number

__all__ = ["ReportSettings", "Products", "RenderedReport", "PRODUCT_FILES", "FIGURE_FILES", "HINDCAST_DIR",
           "VERSION_PACKAGES", "load_hindcasts",
           "build_report", "render_report", "draw_figures", "load_products", "package_versions"]

#: product key -> file name inside the products directory
PRODUCT_FILES = {
    "series": "series.nc",
    "diagram": "latitude_time.nc",
    "reversals": "reversals.json",
    "cycles": "cycles.json",
    "forecast": "forecast.json",
    "history": "forecast_history.jsonl",
    "trajectory": "trajectory.json",
    "calibration": "calibration.csv",
    "config": "config.json",
    "summary": "summary.json",
}

#: folder of hindcast products inside the products directory: ``polecast hindcast --format json`` objects,
#: one ``*.json`` per phase (e.g. ``hindcasts/reversal+4.json``), drawn as skill against phase
HINDCAST_DIR = "hindcasts"

#: figure key -> PNG file name inside ``OUT/figures``
FIGURE_FILES = {
    "series": "polar_series.png",
    "latitude_time": "latitude_time.png",
    "calibration": "calibration.png",
    "history": "forecast_history.png",
    "trajectory": "forecast_trajectory.png",
    "skill": "skill_phase.png",
    "diagnostics": "diagnostics.png",
}

#: packages whose versions the report records
VERSION_PACKAGES = ("polecast", "numpy", "scipy", "astropy", "sunpy", "xarray", "matplotlib")


@dataclass(frozen=True)
class ReportSettings:
    """How the report looks (configuration section ``[report]``).

    Attributes
    ----------
    title : str
        Title of the page.
    dpi : int
        Resolution of the figures (dots per inch).
    figure_width_in : float
        Width of every figure (inches).
    max_table_rows : int
        Longest table of skipped files shown (the count is always given).
    """

    title: str = "polecast report: polar fields, reversals and next-cycle forecast"
    dpi: int = 110
    figure_width_in: float = 9.0
    max_table_rows: int = 500

    def __post_init__(self):
        if not isinstance(self.title, str) or not self.title.strip():
            raise ConfigError(f"report.title: got {self.title!r}; expected a non-empty text")
        check_number("report.dpi", self.dpi, lo=30, hi=600, integer=True)
        check_number("report.figure_width_in", self.figure_width_in, lo=3.0, hi=30.0)
        check_number("report.max_table_rows", self.max_table_rows, lo=1, hi=1_000_000, integer=True)


@dataclass
class Products:
    """What a products directory held; None for each product that was missing or unreadable."""

    series: object = None
    diagram: object = None
    reversals: dict | None = None
    cycles: dict | None = None
    forecast: dict | None = None
    history: list | None = None
    trajectory: dict | None = None
    hindcasts: list | None = None
    calibration: object = None
    config: dict | None = None
    summary: dict | None = None
    notes: list = field(default_factory=list)


def _read_json(path: Path):
    return json.loads(path.read_text(encoding="utf-8"))


#: what reading a bad product raises: unreadable or undecodable file (OSError, UnicodeDecodeError), bad JSON
#: (json.JSONDecodeError), a file that netCDF/HDF5 or xarray cannot open or decode (OSError, ValueError,
#: KeyError for a missing variable), a calibration table with bad rows or columns (ValueError)
_PRODUCT_ERRORS = (OSError, ValueError, KeyError)


def _load_one(key: str, path: Path, notes: list):
    import xarray as xr

    from pipeline.history import read_history
    from pipeline.regression import read_calibration_csv

    if key == "series":
        with xr.open_dataset(path) as ds:
            return ds.load()
    if key == "diagram":
        with xr.open_dataarray(path) as da:
            return da.load()
    if key == "history":
        entries, problems = read_history(path)
        notes.extend(f"{path.name} {p}" for p in problems)
        return entries
    if key == "calibration":
        table = read_calibration_csv(path)
        notes.extend(f"{path.name} {p}" for p in table.problems)
        return table
    obj = _read_json(path)
    if not isinstance(obj, dict):
        raise ValueError("not a JSON object")
    return obj


def _read_config_json(path: Path) -> dict:
    """``config.json`` of a products directory; ConfigError (with the reason) when it cannot be used."""
    try:
        obj = _read_json(path)
    except (OSError, ValueError) as exc:  # ValueError: UnicodeDecodeError, json.JSONDecodeError
        raise ConfigError(f"{path}: unreadable ({' '.join(str(exc).split())[:200]}); the report needs the "
                          f"settings the products were made with: fix the file or write the products again "
                          f"with `polecast run`") from None
    if not isinstance(obj, dict):
        raise ConfigError(f"{path}: got a JSON {type(obj).__name__}; expected the object of Config.to_dict() "
                          f"(sections such as measure, series, run)")
    return obj


def _history_elsewhere(root: Path, config: dict) -> Path | None:
    """The history file named by ``run.history`` of the products' ``config.json``, when it is elsewhere."""
    run = config.get("run")
    name = run.get("history") if isinstance(run, dict) else None
    if not name:
        return None
    path = Path(str(name))
    return path if path.is_absolute() else root / path


def load_hindcasts(folder, notes: list) -> list | None:
    """The hindcast products of a folder (``*.json``, :data:`HINDCAST_DIR`), one per phase; None when there is none.

    Parameters
    ----------
    folder : path-like
    notes : list
        Gets a one-line note per file left out: unreadable, not a hindcast
        object (``phase``, ``rows``, ``skill``), a trajectory (phase
        ``auto``), or a phase already given by another file.

    Returns
    -------
    list of dict or None
        The objects with ``source`` (the file name) added, in file-name order.
    """
    from pipeline.regression import parse_phase

    folder = Path(folder)
    if not folder.is_dir():
        return None
    found, phases = [], {}
    for path in sorted(folder.glob("*.json")):
        label = f"{HINDCAST_DIR}/{path.name}"
        try:
            obj = _read_json(path)
        except (OSError, ValueError) as exc:  # ValueError: UnicodeDecodeError, json.JSONDecodeError
            notes.append(f"{label}: unreadable ({type(exc).__name__}: {' '.join(str(exc).split())[:200]}); left out")
            continue
        if not (isinstance(obj, dict) and isinstance(obj.get("skill"), dict) and isinstance(obj.get("rows"), list)):
            notes.append(f"{label}: not a `polecast hindcast --format json` object (phase, rows, skill); left out")
            continue
        try:
            phase = parse_phase(obj.get("phase"))
        except ValueError:
            notes.append(f"{label}: phase {obj.get('phase')!r} is not one phase (a trajectory?); left out of the "
                         f"skill figure")
            continue
        if phase in phases:
            notes.append(f"{label}: phase {phase} already given by {phases[phase]}; left out")
            continue
        phases[phase] = label
        found.append(dict(obj, phase=phase, source=label))
    return found or None


def _calibration_of_forecast_phase(table, forecast, notes: list):
    """The calibration rows of the forecast's phase: the figure and the table show what was regressed.

    A table without a forecast phase (no forecast product, or one from before
    phases) is shown whole, with a note when it holds several phases.
    """
    if table is None:
        return None
    from pipeline.regression import select_phase

    phases = sorted(set(table.phase)) if getattr(table, "phase", None) else []
    phase = (forecast or {}).get("phase")
    if phase:
        chosen = select_phase(table, phase)
        if len(phases) > 1 or chosen.n_cycles != table.n_cycles:
            notes.append(f"calibration.csv: the {chosen.n_cycles} rows of the forecast's phase {phase!r} are shown "
                         f"(of {table.n_cycles} rows, phases {', '.join(phases)})")
        return chosen
    if len(phases) > 1:
        notes.append(f"calibration.csv holds the phases {', '.join(phases)} and no forecast names one: every row "
                     f"is shown, although a forecast regresses only one phase")
    return table


def load_products(products_dir) -> Products:
    """Read every product of :data:`PRODUCT_FILES` that exists; a one-line note for each missing or bad one.

    Parameters
    ----------
    products_dir : path-like or None
        The directory ``polecast run`` wrote; None reads nothing.

    Returns
    -------
    Products

    Raises
    ------
    pipeline.config.ConfigError
        ``config.json`` exists but is not a readable JSON object: the
        settings of the products are unknown, so nothing is guessed.

    Notes
    -----
    A product that cannot be read (:data:`_PRODUCT_ERRORS`) is left out with
    its reason; any other exception is a bug and propagates, with the
    product's file named in the exception's notes.
    """
    out = Products()
    if products_dir is None:
        out.notes.append("no products directory given: the series, the latitude-time diagram and the "
                         "reversals are recomputed from the store; no cycles, calibration or forecast")
        return out
    root = Path(products_dir)
    if not root.is_dir():
        out.notes.append(f"products directory {root} does not exist: products recomputed from the store")
        return out
    config_path = root / PRODUCT_FILES["config"]
    if config_path.is_file():
        out.config = _read_config_json(config_path)
    else:
        out.notes.append(f"{PRODUCT_FILES['config']}: not in the products directory")
    for key, name in PRODUCT_FILES.items():
        if key == "config":
            continue
        path = root / name
        if key == "history" and not path.is_file() and out.config is not None:
            path = _history_elsewhere(root, out.config) or path
        if not path.is_file():
            out.notes.append(f"{name}: not in the products directory")
            continue
        try:
            setattr(out, key, _load_one(key, path, out.notes))
        except _PRODUCT_ERRORS as exc:  # a bad product is left out with a reason; the report carries on
            out.notes.append(f"{name}: unreadable ({type(exc).__name__}: {' '.join(str(exc).split())[:200]}); "
                             f"left out")
        except Exception as exc:  # not a bad file: a bug; say which product, then let it propagate
            exc.add_note(f"while reading the product {path}")
            raise
    out.hindcasts = load_hindcasts(root / HINDCAST_DIR, out.notes)
    out.calibration = _calibration_of_forecast_phase(out.calibration, out.forecast, out.notes)
    return out


def package_versions() -> dict:
    """Installed versions of :data:`VERSION_PACKAGES` (``"not installed"`` when absent)."""
    from importlib.metadata import PackageNotFoundError, version

    out = {}
    for name in VERSION_PACKAGES:
        if name == "polecast":
            out[name] = __version__
            continue
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            out[name] = "not installed"
    return out


def _config_from_dict(d: dict, source: str = "config.json"):
    """A :class:`pipeline.config.Config` from ``config.json``; ConfigError naming the section when one is invalid.

    A section missing from ``d`` takes its defaults (the products were made
    before it existed); a section present but invalid is an error, never
    replaced by defaults.
    """
    from pipeline.config import Config, _section_classes, settings_from_mapping

    sections = {}
    for name, cls in _section_classes().items():
        table = d.get(name)
        if table is None:
            sections[name] = cls()
            continue
        if not isinstance(table, dict):
            raise ConfigError(f"{source} [{name}]: got a JSON {type(table).__name__}; expected an object of "
                              f"settings")
        try:
            sections[name] = settings_from_mapping(cls, name, dict(table))
        except (ConfigError, TypeError, ValueError) as exc:
            raise ConfigError(f"{source} [{name}]: {exc}; the products were made with settings this polecast "
                              f"cannot use: fix the file or write the products again with `polecast run`") from None
    return Config(sections=sections)


def _store_contents(store_path, need_records: bool, measure):
    """Summary, skipped files and (when needed) ok records of the store under the settings in force."""
    from pipeline.store import check_measure_settings, open_store

    with open_store(store_path, "r") as store:
        in_force = check_measure_settings(store, measure)  # StoreSettingsError: records of other settings
        summary = store.summary()
        skipped = [(r.file, r.reason) for r in store.iter_records(status="skipped", measure=in_force)]
        records = list(store.iter_records(measure=in_force)) if need_records else None
    return summary, skipped, records, in_force


@dataclass
class RenderedReport:
    """What :func:`render_report` made: the page, the figures (matplotlib objects) and where they went.

    Attributes
    ----------
    index : pathlib.Path
        ``out_dir / "index.html"``.
    figures : dict
        Figure key (:data:`FIGURE_FILES`) -> :class:`matplotlib.figure.Figure` drawn.
    figure_paths : dict
        Figure key -> PNG path.
    products : Products
        The products used (recomputed ones included) and the notes on them.
    measure : pipeline.config.MeasureSettings
        The measure settings in force for reading the store.
    """

    index: Path
    figures: dict
    figure_paths: dict
    products: Products
    measure: object


def draw_figures(products: Products, skip_reasons: dict, settings: ReportSettings, *,
                 cap_latitude_deg: float, method: str) -> dict:
    """Every figure the products allow, as matplotlib Figures (nothing written).

    Parameters
    ----------
    products : Products
        With ``series`` and ``diagram`` set (recomputed when missing).
    skip_reasons : dict
        Reason group -> number of skipped files (``Store.summary()["skip_reasons"]``).
    settings : ReportSettings
    cap_latitude_deg : float
        Polar-cap boundary of the measure settings in force (degrees).
    method : str
        Regression method when the forecast does not name one.

    Returns
    -------
    dict
        Figure key (:data:`FIGURE_FILES`) -> :class:`matplotlib.figure.Figure`;
        ``calibration`` only for a table of three or more usable cycles,
        ``history`` only for a non-empty history, ``trajectory`` only for a
        ``trajectory.json`` with rows, ``skill`` only with hindcast products.
    """
    from pipeline.report import figures

    drawn = {
        "series": figures.polar_series_figure(products.series, settings, reversals=products.reversals,
                                              cycles=products.cycles, precursor=products.forecast),
        "latitude_time": figures.latitude_time_figure(products.diagram, settings, cap_latitude_deg=cap_latitude_deg),
    }
    if products.calibration is not None and products.calibration.n_cycles >= 3:
        drawn["calibration"] = figures.calibration_figure(
            products.calibration, settings, forecast=products.forecast,
            method=(products.forecast or {}).get("method") or method)
    if products.history:
        drawn["history"] = figures.forecast_history_figure(products.history, settings)
    if products.trajectory and products.trajectory.get("rows"):
        drawn["trajectory"] = figures.forecast_trajectory_figure(products.trajectory, settings)
    if products.hindcasts:
        drawn["skill"] = figures.skill_phase_figure(products.hindcasts, settings)
    drawn["diagnostics"] = figures.diagnostics_figure(products.series, skip_reasons, settings)
    return drawn


def build_report(store_path, out_dir, products_dir=None, settings: ReportSettings | None = None, *,
                 config=None) -> Path:
    """Draw the figures and write the self-contained ``index.html`` of a store and its products.

    Parameters
    ----------
    store_path : path-like
        The SQLite store (``polecast ingest``); read only.
    out_dir : path-like
        Where ``index.html`` and ``figures/*.png`` go (created if needed).
    products_dir : path-like, optional
        The products directory of ``polecast run`` (:data:`PRODUCT_FILES`);
        any product may be missing: the series, diagram and reversals are then
        recomputed from the store, other figures and tables are left out with
        a note on the page.
    settings : ReportSettings, optional
        Defaults to the configuration's ``report`` section.
    config : pipeline.config.Config, optional
        Settings for recomputed products; defaults to the products'
        ``config.json``, else the defaults.

    Returns
    -------
    pathlib.Path
        ``out_dir / "index.html"``.

    Raises
    ------
    pipeline.config.ConfigError
        The products' ``config.json`` is unreadable or has an invalid section.
    pipeline.store.StoreError
        When the store is missing or not a polecast store;
        :class:`~pipeline.store.StoreSettingsError` when its records were
        measured under other settings than those in force.
    """
    return render_report(store_path, out_dir, products_dir, settings, config=config).index


def render_report(store_path, out_dir, products_dir=None, settings: ReportSettings | None = None, *,
                  config=None) -> RenderedReport:
    """:func:`build_report`, returning the figures drawn and the settings used as well as the page."""
    from pipeline.jsonio import write_text
    from pipeline.report import figures
    from pipeline.report.page import assemble_page

    products = load_products(products_dir)
    notes = products.notes
    made_with = _config_from_dict(products.config) if products.config is not None else None
    given = config is not None
    if config is None:
        if made_with is None:
            from pipeline.config import load_config

            config = load_config(None)
        else:
            config = made_with
    settings = settings or config.report
    # the settings in force: those the products were made with, else the given ones, else the store's own
    measure = made_with.measure if made_with is not None else (config.measure if given else None)
    need_records = products.series is None or products.diagram is None
    store_summary, skipped, records, measure = _store_contents(store_path, need_records, measure)
    recomputed = []
    if products.series is None:
        from pipeline.aggregator import polar_series

        products.series = polar_series(records, config.series)
        recomputed.append("series")
    if products.diagram is None:
        from pipeline.aggregator import latitude_time_diagram

        products.diagram = latitude_time_diagram(records, config.series)
        recomputed.append("latitude-time diagram")
    if products.reversals is None and isinstance(products.summary, dict) and \
            isinstance(products.summary.get("reversals"), dict):
        products.reversals = products.summary["reversals"]
        notes.append("reversals taken from summary.json")
    if products.reversals is None:
        from pipeline.systematics import store_reversals

        products.reversals = store_reversals(records, products.series, config)
        recomputed.append("reversals")
    if products.forecast is None and isinstance(products.summary, dict) and \
            isinstance(products.summary.get("forecast"), dict):
        products.forecast = products.summary["forecast"]
        notes.append("forecast taken from summary.json")
    if recomputed:
        origin = ("settings of the products' config.json" if made_with is not None and not given else
                  "given settings" if given or config.source_path else "default settings")
        notes.append(f"recomputed from the store ({', '.join(recomputed)}) with the {origin}")
    if products.calibration is not None and products.calibration.n_cycles < 3:
        notes.append(f"calibration.csv has {products.calibration.n_cycles} usable cycles: calibration figure "
                     f"left out")

    out_dir = Path(out_dir)
    fig_dir = out_dir / "figures"
    fig_dir.mkdir(parents=True, exist_ok=True)
    drawn = draw_figures(products, store_summary.get("skip_reasons", {}), settings,
                         cap_latitude_deg=float(measure.cap_latitude_deg), method=config.forecast.method)
    paths = {key: figures.save_figure(fig, fig_dir / FIGURE_FILES[key], settings) for key, fig in drawn.items()}
    for key, name in FIGURE_FILES.items():
        stale = fig_dir / name
        if key not in drawn and stale.exists():
            stale.unlink()  # a figure of an earlier report whose product is gone now

    config_dict = products.config if products.config is not None else config.to_dict()
    page = assemble_page(
        settings=settings, store_path=str(store_path), products_dir=None if products_dir is None else str(products_dir),
        products=products, store_summary=store_summary, skipped=skipped, figures=paths,
        config_dict=config_dict, versions=package_versions(),
        generated_utc=_dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"))
    index = out_dir / "index.html"
    write_text(index, page)
    return RenderedReport(index=index, figures=drawn, figure_paths=paths, products=products, measure=measure)
