"""``polecast series STORE --out FILE [--format netcdf|csv]``: the PolarSeries of a store."""

from __future__ import annotations

import csv
import math
import sys

import numpy as np

from pipeline.cli import EXIT_OK, EXIT_SKIPPED, EXIT_USAGE
from pipeline.config import load_config
from pipeline.ncio import write_netcdf

__all__ = ["add_parser", "run", "write_rotation_csv", "ROTATION_CSV_COLUMNS", "series_overrides",
           "add_series_options", "load_records", "given_measure"]

#: Columns of ``--format csv``: one row per Carrington rotation (``time`` = ISO date of its mid-time);
#: the per-rotation means carry the plain names so the file feeds ``polecast reversals --series``.
ROTATION_CSV_COLUMNS = (
    ("rotation", "rotation"), ("time", "rotation_time"),
    ("north_br_gauss", "north_br_rotation_gauss"), ("south_br_gauss", "south_br_rotation_gauss"),
    ("dipole_br_gauss", "dipole_br_rotation_gauss"),
    ("north_br_error_gauss", "north_br_rotation_error_gauss"),
    ("south_br_error_gauss", "south_br_rotation_error_gauss"),
    ("dipole_br_error_gauss", "dipole_br_rotation_error_gauss"),
    ("north_coverage", "north_rotation_coverage"), ("south_coverage", "south_rotation_coverage"),
    ("frames", "frames_per_rotation"),
    ("north_br_smooth_gauss", "north_br_smooth_gauss"), ("south_br_smooth_gauss", "south_br_smooth_gauss"),
    ("dipole_br_smooth_gauss", "dipole_br_smooth_gauss"),
)


def add_series_options(p) -> None:
    """Options shared by ``series`` and ``reversals`` (the [series] section)."""
    p.add_argument("--b0-method", choices=("fill", "profile", "season", "visible"),
                   help="B0 handling of the cap means (default fill)")
    p.add_argument("--smoothing", choices=("gaussian", "running", "none"), help="smoother (default gaussian)")
    p.add_argument("--smoothing-width", type=float, metavar="N",
                   help="FWHM (gaussian) or window (running) in rotations (default 6)")
    p.add_argument("--config", metavar="PATH",
                   help="TOML configuration file; its [measure] settings must be those the store's records were "
                        "measured under (without it, the store's own are used)")


def series_overrides(args) -> dict:
    return {"b0_method": args.b0_method, "smoothing": args.smoothing, "smoothing_width": args.smoothing_width}


def add_parser(sub) -> None:
    p = sub.add_parser(
        "series", help="polar-field time series (per frame, per rotation, smoothed) of a store",
        description="Build the north, south and axial-dipole polar-field series of a store's measured "
                    "frames: per frame, per Carrington rotation (mean, error, coverage) and smoothed, with "
                    "the chosen B0 method. netCDF holds everything; CSV one row per rotation (readable "
                    "by `polecast reversals --series`). Only records measured under the measure settings in "
                    "force are used (those of --config, else the store's own); a store holding others is "
                    "refused. Exit 0 ok, 1 no usable frames, 2 usage error or settings mismatch.")
    p.add_argument("store", metavar="STORE", help="store file written by `polecast ingest`")
    p.add_argument("--out", metavar="FILE", required=True, help="output file ('-' for stdout, CSV only)")
    p.add_argument("--format", choices=("netcdf", "csv"), default="netcdf", help="output format (default netcdf)")
    add_series_options(p)
    p.set_defaults(func=run)


def _cell(v):
    if isinstance(v, np.datetime64):
        return str(np.datetime64(v, "D"))
    if isinstance(v, (float, np.floating)):
        return "" if not math.isfinite(float(v)) else f"{float(v):.6g}"
    return str(v)


def write_rotation_csv(ds, stream) -> int:
    """Write the per-rotation part of a PolarSeries as CSV; returns the number of rows."""
    w = csv.writer(stream, lineterminator="\n")
    w.writerow([c for c, _ in ROTATION_CSV_COLUMNS])
    cols = [ds[v].values for _, v in ROTATION_CSV_COLUMNS]
    for i in range(ds.sizes["rotation"]):
        w.writerow([_cell(c[i]) for c in cols])
    return int(ds.sizes["rotation"])


def given_measure(args, config):
    """The ``[measure]`` settings in force: the configuration's when ``--config`` was given, else None.

    None means "no configuration given": the store's own settings are in
    force (:func:`pipeline.store.check_measure_settings`).
    """
    return config.measure if getattr(args, "config", None) is not None else None


def load_records(store_path, measure=None):
    """``(records, None)``: the ``ok`` records measured under the settings in force; or ``(None, message)``.

    Parameters
    ----------
    store_path : str or path-like
    measure : MeasureSettings, optional
        The settings in force (:func:`given_measure`); None: the store's own.

    Returns
    -------
    records : list of FrameRecord or None
    message : str or None
        One line: why the store cannot be read, or why its records are
        refused (measured under other settings, naming both).
    """
    from pipeline.store import StoreError, check_measure_settings, open_store

    try:
        with open_store(store_path, "r") as store:
            in_force = check_measure_settings(store, measure)
            return list(store.iter_records(measure=in_force)), None
    except (StoreError, OSError) as exc:
        return None, str(exc)


def run(args) -> int:
    from pipeline.aggregator import polar_series

    config = load_config(args.config, series=series_overrides(args))
    if args.format == "netcdf" and args.out == "-":
        print("polecast series: netCDF needs --out FILE; use --format csv for stdout", file=sys.stderr)
        return EXIT_USAGE
    records, err = load_records(args.store, given_measure(args, config))
    if records is None:
        print(f"polecast series: {err}", file=sys.stderr)
        return EXIT_USAGE
    ds = polar_series(records, config.series)
    try:
        if args.format == "netcdf":
            write_netcdf(ds, args.out)
        elif args.out == "-":
            write_rotation_csv(ds, sys.stdout)
        else:
            with open(args.out, "w", encoding="utf-8", newline="") as fh:
                write_rotation_csv(ds, fh)
    except OSError as exc:
        print(f"polecast series: cannot write {args.out}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    n = ds.attrs["frames_used"]
    print(f"series: {n} frames, {ds.sizes['rotation']} rotations, B0 method {ds.attrs['b0_method']}, "
          f"smoothing {ds.attrs['smoothing_description']} -> {args.out}", file=sys.stderr)
    if n == 0:
        print("polecast series: the store has no measured frames", file=sys.stderr)
        return EXIT_SKIPPED
    return EXIT_OK
