"""``polecast forecast``: next-cycle amplitude from the polar-field precursor.

Two routes: ``--calibration CSV --precursor X`` (a precursor you give), or
``--calibration CSV --store STORE --sunspots CSV`` (the precursor taken from
the measured polar series at the last cycle minimum, or after the final
reversal when the minimum is still ahead).
"""

from __future__ import annotations

import datetime as _dt
import json
import sys

from pipeline.cli import EXIT_OK, EXIT_SKIPPED, EXIT_USAGE
from pipeline.config import load_config
from pipeline.jsonio import finite_or_none

__all__ = ["add_parser", "run", "precursor_from_store", "write_text"]


def add_parser(sub) -> None:
    p = sub.add_parser("forecast", help="forecast the next cycle's amplitude from the polar precursor",
                       description="Calibrate the polar-field precursor against past cycles and forecast the next "
                                   "cycle's amplitude (maximum of the 13-month smoothed sunspot number) with 68% "
                                   "and 95% prediction intervals and leave-one-out cross-validation. A statistical "
                                   "forecast from few cycles: official space-weather forecasts and mission rules "
                                   "govern operational decisions. Exit 0 ok, 1 when calibration rows were skipped, "
                                   "2 for a usage error (including fewer than 4 calibration cycles).")
    p.add_argument("--calibration", required=True, metavar="CSV",
                   help="columns cycle,precursor,amplitude (optional precursor_error,amplitude_error)")
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--precursor", type=float, metavar="G", help="the precursor of the coming cycle (gauss)")
    src.add_argument("--store", metavar="STORE", help="take the precursor from this store of measured frames")
    p.add_argument("--sunspots", metavar="CSV", help="monthly sunspot numbers (with --store): cycle minima")
    p.add_argument("--precursor-error", type=float, metavar="G", help="one-sigma error of --precursor (gauss)")
    p.add_argument("--method", metavar="NAME", help="ols (default), odr or loglinear")
    p.add_argument("--kind", metavar="NAME", help="with --store: dipole (default) or hemispheres")
    p.add_argument("--window-years", type=float, metavar="YR", help="with --store: half-width of the window (0.5)")
    p.add_argument("--lag-years", type=float, metavar="YR",
                   help="with --store before the minimum: lag after the final reversal (default: newest window)")
    p.add_argument("--as-of", metavar="DATE", help="date of the newest data used (with --precursor; default today)")
    p.add_argument("--history", metavar="FILE", help="append this forecast to an append-only JSON Lines history")
    p.add_argument("--format", choices=("json", "text"), default="json", help="output format (default json)")
    p.add_argument("--config", metavar="PATH", help="TOML configuration file")
    p.set_defaults(func=run)


def precursor_from_store(store_path, sunspots_path, settings, config=None, measure=None) -> dict:
    """The precursor of the coming cycle from a store of measured frames and a sunspot file.

    Reads the store and the monthly sunspot CSV, builds the polar series and
    the cycle landmarks, and hands them to
    :func:`pipeline.precursor.precursor_for_forecast` (see there for the choice
    between the value at the last minimum and the value after the final
    reversal).

    Only records measured under the measure settings in force are used:
    ``measure`` (the ``[measure]`` section of a configuration given), or the
    store's own when None (:func:`pipeline.store.check_measure_settings`).

    Raises
    ------
    ValueError
        When the store, the sunspot file or the coverage cannot give a precursor.
    pipeline.store.StoreSettingsError
        The store holds records measured under other settings (one line naming both).
    """
    from pipeline.aggregator import polar_series
    from pipeline.cycles import cycle_landmarks, read_monthly_csv
    from pipeline.precursor import precursor_for_forecast
    from pipeline.store import check_measure_settings, open_store

    sections = getattr(config, "sections", {}) if config is not None else {}
    with open_store(store_path) as store:
        records = list(store.iter_records(measure=check_measure_settings(store, measure)))
    if not records:
        raise ValueError(f"store {store_path}: no measured frame; ingest magnetograms first")
    series = polar_series(records, sections.get("series"))
    months = read_monthly_csv(sunspots_path)
    cycles = cycle_landmarks(months.time_decimal_year, months.values, sections.get("cycles"))
    if not cycles:
        raise ValueError(f"sunspot file {sunspots_path}: no cycle minimum found; give a longer monthly series")
    series_settings = sections.get("series")
    return precursor_for_forecast(series, cycles, settings, sections.get("reversals"),
                                  series_settings.smoother if series_settings is not None else None)


def write_text(doc: dict, stream=None) -> None:
    stream = sys.stdout if stream is None else stream
    lo68, hi68 = doc["interval_68"]
    lo95, hi95 = doc["interval_95"]
    stream.write(f"next-cycle amplitude: {doc['amplitude']:.1f} (68%: {lo68:.1f} - {hi68:.1f}; "
                 f"95%: {lo95:.1f} - {hi95:.1f})\n")
    stream.write(f"precursor {doc['precursor']:.4g} G; method {doc['method']}; {doc['n_cycles']} calibration "
                 f"cycles; r = {doc['r']:.3f}; leave-one-out RMSE {doc['loo_rmse']:.1f}\n")
    for w in doc.get("warnings", []):
        stream.write(f"warning: {w}\n")
    stream.write(f"caution: {doc['cautions']}\n")


def run(args) -> int:
    from pipeline.history import append_history, history_entry
    from pipeline.regression import forecast_amplitude, read_calibration_csv

    config = load_config(args.config, forecast={"method": args.method, "precursor_kind": args.kind,
                                                "window_years": args.window_years, "lag_years": args.lag_years})
    settings = config.forecast
    prog = "polecast forecast"
    try:
        table = read_calibration_csv(args.calibration)
    except ValueError as exc:
        print(f"{prog}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    for reason in table.problems:
        print(f"{prog}: skipped {args.calibration} {reason}", file=sys.stderr)
    extra: dict = {}
    if args.store is not None:
        if args.sunspots is None:
            print(f"{prog}: --store needs --sunspots CSV (monthly sunspot numbers) to find the cycle minimum",
                  file=sys.stderr)
            return EXIT_USAGE
        try:
            from pipeline.cli.series import given_measure

            item = precursor_from_store(args.store, args.sunspots, settings, config, given_measure(args, config))
        except (ValueError, OSError, ImportError, RuntimeError) as exc:  # StoreError is a RuntimeError
            print(f"{prog}: cannot take the precursor from {args.store}: {exc}", file=sys.stderr)
            return EXIT_USAGE
        precursor, precursor_error = item["precursor_gauss"], item["precursor_error_gauss"]
        data_date, source = item["data_date"], "store"
        extra["precursor_detail"] = item
    else:
        precursor, precursor_error, source = args.precursor, args.precursor_error, "given"
        if args.as_of is not None:
            try:
                data_date = _dt.date.fromisoformat(args.as_of[:10]).isoformat()
            except ValueError:
                print(f"{prog}: --as-of: got {args.as_of!r}; expected an ISO date YYYY-MM-DD", file=sys.stderr)
                return EXIT_USAGE
        else:
            data_date = _dt.datetime.now(_dt.timezone.utc).date().isoformat()
    try:
        result = forecast_amplitude(table, precursor, settings, precursor_error=precursor_error)
    except ValueError as exc:
        print(f"{prog}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    doc = result.to_dict()
    notes = list(extra.get("precursor_detail", {}).get("notes", []) or [])
    doc["warnings"] = doc["warnings"] + notes
    doc["data_date"] = data_date
    doc["precursor_source"] = source
    doc["skipped_rows"] = list(table.problems)
    doc.update(extra)
    doc = finite_or_none(doc)
    for w in doc["warnings"]:
        print(f"{prog}: warning: {w}", file=sys.stderr)
    if args.history is not None:
        try:
            append_history(args.history, history_entry(doc, data_date, calibration=str(args.calibration),
                                                       precursor_source=source))
        except ValueError as exc:
            print(f"{prog}: {exc}", file=sys.stderr)
            return EXIT_USAGE
    if args.format == "json":
        json.dump(doc, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        write_text(doc)
    return EXIT_SKIPPED if table.problems else EXIT_OK
