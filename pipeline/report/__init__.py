"""Figures and the self-contained HTML report of a store and its products.

:func:`build_report` reads what ``polecast run`` wrote into a products
directory (any file may be missing) and the store, draws the five figures
(:mod:`pipeline.report.figures`) and writes ``index.html``
(:mod:`pipeline.report.html`) with the figures embedded.  On a bare store it
recomputes the series, the latitude-time diagram and the reversals with the
configuration's (default) settings, so ``polecast report STORE --out DIR``
works without products.

Products read from ``products_dir`` (see :data:`PRODUCT_FILES`):

- ``series.nc``            PolarSeries Dataset (:func:`pipeline.aggregator.polar_series`)
- ``latitude_time.nc``     latitude-time DataArray (:func:`pipeline.aggregator.latitude_time_diagram`)
- ``reversals.json``       the ``polecast reversals`` object (north/south/dipole, optional bands)
- ``cycles.json``          the ``polecast cycles`` object
- ``forecast.json``        the ``polecast forecast`` object
- ``forecast_history.jsonl`` the append-only history (:mod:`pipeline.history`)
- ``calibration.csv``      the calibration table used (``cycle,precursor,amplitude``)
- ``config.json``          the configuration used (``Config.to_dict()``)
- ``summary.json``         the run summary; for the demo with ``truth``
"""

from __future__ import annotations

import datetime as _dt
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

from pipeline import __version__
from pipeline.config import ConfigError, check_number

__all__ = ["ReportSettings", "Products", "PRODUCT_FILES", "FIGURE_FILES", "VERSION_PACKAGES", "build_report",
           "load_products", "package_versions"]

#: product key -> file name inside the products directory
PRODUCT_FILES = {
    "series": "series.nc",
    "diagram": "latitude_time.nc",
    "reversals": "reversals.json",
    "cycles": "cycles.json",
    "forecast": "forecast.json",
    "history": "forecast_history.jsonl",
    "calibration": "calibration.csv",
    "config": "config.json",
    "summary": "summary.json",
}

#: figure key -> PNG file name inside ``OUT/figures``
FIGURE_FILES = {
    "series": "polar_series.png",
    "latitude_time": "latitude_time.png",
    "calibration": "calibration.png",
    "history": "forecast_history.png",
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
    calibration: object = None
    config: dict | None = None
    summary: dict | None = None
    notes: list = field(default_factory=list)


def _read_json(path: Path):
    return json.loads(path.read_text(encoding="utf-8"))


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


def _history_elsewhere(root: Path) -> Path | None:
    """The history file named by ``run.history`` of the products' ``config.json``, when it is elsewhere."""
    try:
        name = (_read_json(root / PRODUCT_FILES["config"]).get("run") or {}).get("history")
    except (OSError, ValueError, AttributeError):
        return None
    if not name:
        return None
    path = Path(name)
    return path if path.is_absolute() else root / path


def load_products(products_dir) -> Products:
    """Read every product of :data:`PRODUCT_FILES` that exists; a one-line note for each missing or bad one.

    Parameters
    ----------
    products_dir : path-like or None
        The directory ``polecast run`` wrote; None reads nothing.

    Returns
    -------
    Products
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
    for key, name in PRODUCT_FILES.items():
        path = root / name
        if key == "history" and not path.is_file():
            path = _history_elsewhere(root) or path
        if not path.is_file():
            out.notes.append(f"{name}: not in the products directory")
            continue
        try:
            setattr(out, key, _load_one(key, path, out.notes))
        except Exception as exc:  # a bad product is left out with a reason; the report carries on
            out.notes.append(f"{name}: unreadable ({type(exc).__name__}: {' '.join(str(exc).split())[:200]}); "
                             f"left out")
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


def _config_from_dict(d: dict | None, notes: list):
    """A :class:`pipeline.config.Config` from ``config.json``; defaults (with a note) when it does not validate."""
    from pipeline.config import Config, _section_classes, settings_from_mapping

    classes = _section_classes()
    sections = {}
    for name, cls in classes.items():
        table = (d or {}).get(name) or {}
        try:
            sections[name] = settings_from_mapping(cls, name, dict(table))
        except (ConfigError, TypeError, ValueError) as exc:
            notes.append(f"config.json [{name}]: {exc}; defaults used for this section")
            sections[name] = cls()
    return Config(sections=sections)


def _store_contents(store_path, need_records: bool):
    from pipeline.store import open_store

    with open_store(store_path, "r") as store:
        summary = store.summary()
        skipped = [(r.file, r.reason) for r in store.iter_records(status="skipped")]
        records = list(store.iter_records()) if need_records else None
    return summary, skipped, records


def _cap_latitude(config_dict: dict | None, config) -> float:
    try:
        v = float(((config_dict or {}).get("measure") or {}).get("cap_latitude_deg"))
        if math.isfinite(v):
            return v
    except (TypeError, ValueError):
        pass
    return float(config.measure.cap_latitude_deg)


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
        Defaults to ``config.report``.
    config : pipeline.config.Config, optional
        Settings for recomputed products; defaults to the products'
        ``config.json``, else the defaults.

    Returns
    -------
    pathlib.Path
        ``out_dir / "index.html"``.

    Raises
    ------
    pipeline.store.StoreError
        When the store is missing or not a polecast store.
    """
    from pipeline.report import figures
    from pipeline.report.page import assemble_page

    products = load_products(products_dir)
    notes = products.notes
    if config is None:
        config = _config_from_dict(products.config, notes) if products.config is not None else None
    if config is None:
        from pipeline.config import load_config

        config = load_config(None)
    settings = settings or config.report
    need_records = products.series is None or products.diagram is None
    store_summary, skipped, records = _store_contents(store_path, need_records)
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
        from pipeline.reversal import series_reversals

        res = series_reversals(products.series, config.reversals, config.series.smoother)
        products.reversals = {k: v.to_dict() for k, v in res.items()}
        recomputed.append("reversals")
    if products.forecast is None and isinstance(products.summary, dict) and \
            isinstance(products.summary.get("forecast"), dict):
        products.forecast = products.summary["forecast"]
        notes.append("forecast taken from summary.json")
    if recomputed:
        notes.append(f"recomputed from the store ({', '.join(recomputed)}) with the "
                     f"{'given' if config.source_path else 'configured or default'} settings")

    out_dir = Path(out_dir)
    fig_dir = out_dir / "figures"
    fig_dir.mkdir(parents=True, exist_ok=True)
    cap = _cap_latitude(products.config, config)
    drawn = {}
    drawn["series"] = figures.polar_series_figure(products.series, fig_dir / FIGURE_FILES["series"], settings,
                                                  reversals=products.reversals, cycles=products.cycles)
    drawn["latitude_time"] = figures.latitude_time_figure(products.diagram, fig_dir / FIGURE_FILES["latitude_time"],
                                                          settings, cap_latitude_deg=cap)
    if products.calibration is not None and products.calibration.n_cycles >= 3:
        method = (products.forecast or {}).get("method") or config.forecast.method
        drawn["calibration"] = figures.calibration_figure(products.calibration, fig_dir / FIGURE_FILES["calibration"],
                                                          settings, forecast=products.forecast, method=method)
    elif products.calibration is not None:
        notes.append(f"calibration.csv has {products.calibration.n_cycles} usable cycles: calibration figure "
                     f"left out")
    if products.history:
        drawn["history"] = figures.forecast_history_figure(products.history, fig_dir / FIGURE_FILES["history"],
                                                           settings)
    drawn["diagnostics"] = figures.diagnostics_figure(products.series, store_summary.get("skip_reasons", {}),
                                                      fig_dir / FIGURE_FILES["diagnostics"], settings)
    for key, name in FIGURE_FILES.items():
        stale = fig_dir / name
        if key not in drawn and stale.exists():
            stale.unlink()  # a figure of an earlier report whose product is gone now

    config_dict = products.config if products.config is not None else config.to_dict()
    page = assemble_page(
        settings=settings, store_path=str(store_path), products_dir=None if products_dir is None else str(products_dir),
        products=products, store_summary=store_summary, skipped=skipped, figures=drawn,
        config_dict=config_dict, versions=package_versions(),
        generated_utc=_dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"))
    index = out_dir / "index.html"
    tmp = index.with_name(index.name + ".tmp")
    tmp.write_text(page, encoding="utf-8")
    tmp.replace(index)
    return index
