"""``polecast forecast``: next-cycle amplitude from the polar-field precursor.

Three sources of the precursor: ``--precursor X`` (a value you give, at the
phase ``--phase``), ``--store STORE --sunspots CSV`` (the measured polar series
of a store) or ``--series CSV --sunspots CSV`` (a polar-series table).  From a
store or a table the precursor is taken as of ``--as-of`` (default: all the
data) at the phase ``--phase`` (default ``[forecast] phase``, ``auto``), by
:func:`pipeline.asof.forecast_inputs`; only calibration rows of that phase
are fitted.

Exit codes: 0 ok, 1 some calibration or series rows were skipped, 2 usage or
configuration error (including a calibration scale that differs from the
store's measurement definition, unless ``--allow-scale-mismatch``), 3 no
forecast can be made from what is known (:data:`EXIT_NO_FORECAST`: no
reversal yet, no complete window, fewer calibration rows of the phase than
``[forecast] min_cycles``); each a one-line reason on stderr.
"""

from __future__ import annotations

import datetime as _dt
import json
import sys

from pipeline.cli import EXIT_NO_FORECAST, EXIT_OK, EXIT_SKIPPED, EXIT_USAGE
from pipeline.config import load_config
from pipeline.jsonio import finite_or_none

__all__ = ["add_parser", "run", "write_text", "read_sunspots", "EXIT_NO_FORECAST"]



def add_parser(sub) -> None:
    p = sub.add_parser("forecast", help="forecast the next cycle's amplitude from the polar precursor",
                       description="Calibrate the polar-field precursor against past cycles of the same phase and "
                                   "forecast the next cycle's amplitude (maximum of the 13-month smoothed sunspot "
                                   "number) with 68% and 95% prediction intervals and leave-one-out "
                                   "cross-validation, as of a date if asked (only what was known then is used). A "
                                   "statistical forecast from few cycles: official space-weather forecasts and "
                                   "mission rules govern operational decisions. Exit 0 ok, 1 when calibration or "
                                   "series rows were skipped, 2 for a usage or configuration error (including a "
                                   "calibration scale other than the store's), 3 when no forecast can be made yet "
                                   "(no reversal, no complete window, or fewer than 4 calibration cycles of the "
                                   "phase).")
    p.add_argument("--calibration", required=True, metavar="CSV",
                   help="columns cycle,precursor,amplitude (optional precursor_error,amplitude_error,phase,scale)")
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--precursor", type=float, metavar="G", help="the precursor of the coming cycle (gauss)")
    src.add_argument("--store", metavar="STORE", help="take the precursor from this store of measured frames")
    src.add_argument("--series", metavar="CSV",
                     help="take the precursor from a polar-series table: time (decimal year),north_br_gauss,"
                          "south_br_gauss, optional north_br_error_gauss,south_br_error_gauss")
    p.add_argument("--sunspots", metavar="CSV", help="monthly sunspot numbers (with --store or --series)")
    p.add_argument("--precursor-error", type=float, metavar="G", help="one-sigma error of --precursor (gauss)")
    p.add_argument("--phase", metavar="PHASE",
                   help="auto (default: the minimum once known, else reversal+L with the largest complete lag), "
                        "minimum, or reversal+L (L years after the final dipole reversal)")
    p.add_argument("--lag-years", type=float, metavar="YR", help="the same as --phase reversal+YR")
    p.add_argument("--as-of", metavar="DATE",
                   help="use only data from before this date YYYY-MM-DD (with --store/--series); with --precursor "
                        "it only labels the forecast (default today)")
    p.add_argument("--scale", metavar="TEXT",
                   help="what --precursor or --series measures, compared with the table's scale column")
    p.add_argument("--allow-scale-mismatch", action="store_true",
                   help="forecast although the table's scale differs from the one in force (recorded)")
    p.add_argument("--method", metavar="NAME", help="ols (default), odr or loglinear")
    p.add_argument("--kind", metavar="NAME", help="with --store/--series: dipole (default) or hemispheres")
    p.add_argument("--window-years", type=float, metavar="YR", help="half-width of the precursor window (0.5)")
    p.add_argument("--history", metavar="FILE", help="append this forecast to an append-only JSON Lines history")
    p.add_argument("--format", choices=("json", "text"), default="json", help="output format (default json)")
    p.add_argument("--config", metavar="PATH", help="TOML configuration file")
    p.set_defaults(func=run)


def read_sunspots(path, cycle_settings):
    """The monthly sunspot series of ``path`` in the declared (or detected) layout, and a note on a fallback.

    Returns
    -------
    (pipeline.cycles.MonthlySeries, str or None)
        The note is one line when the layout was detected rather than declared.

    Raises
    ------
    ValueError
        The file cannot be read or matches no layout (the reason).
    """
    from pipeline.cycles import read_sunspot_file

    months = read_sunspot_file(path, cycle_settings.sunspot_format)
    note = None
    if months.format_source == "detected":
        note = (f"{path}: sunspot format not declared; read as {months.format} (declare it with "
                f"[cycles] sunspot_format)")
    return months, note


def _fmt(value, spec: str, none: str = "n/a") -> str:
    return none if value is None else format(value, spec)


def write_text(doc: dict, stream=None) -> None:
    """The forecast object as a few human-readable lines."""
    stream = sys.stdout if stream is None else stream
    lo68, hi68 = doc["interval_68"]
    lo95, hi95 = doc["interval_95"]
    target = doc.get("target_cycle")
    stream.write(f"{'next-cycle' if target is None else f'cycle {target}'} amplitude: {doc['amplitude']:.1f} "
                 f"(68%: {lo68:.1f} - {hi68:.1f}; 95%: {lo95:.1f} - {hi95:.1f})\n")
    stream.write(f"precursor {doc['precursor']:.4g} G at phase {doc.get('phase')}; method {doc['method']}; "
                 f"{doc['n_cycles']} calibration cycles; r = {doc['r']:.3f}; leave-one-out RMSE {doc['loo_rmse']:.1f}\n")
    if doc.get("precursor_source") in ("store", "series"):
        stream.write(f"final reversal {_fmt(doc.get('reversal_time'), '.3f')}; minimum "
                     f"{_fmt(doc.get('minimum_time'), '.3f')} ({doc.get('minimum_status') or 'not known'}); data to "
                     f"{doc.get('data_date')}" + (f" (as of {doc['as_of']})" if doc.get("as_of") else "") + "\n")
    for reason in doc.get("provisional_reasons", []) or []:
        stream.write(f"may be revised: {reason}\n")
    for w in doc.get("warnings", []):
        stream.write(f"warning: {w}\n")
    stream.write(f"caution: {doc['cautions']}\n")


def _check_as_of_option(text, prog):
    """None, or the one-line usage error of a bad ``--as-of``."""
    from pipeline.asof import as_of_instant

    try:
        as_of_instant(text)
    except ValueError:
        return f"{prog}: --as-of: got {text!r}; expected an ISO date YYYY-MM-DD"
    return None


def _given_state(args, settings, phase, prog):
    """The state keys of a given precursor, or an error line."""
    from pipeline.asof import as_of_instant
    from pipeline.precursor import AUTO_PHASE, phase_lag_years

    notes = []
    if phase == AUTO_PHASE:
        phase = "minimum"
        notes.append("a given precursor is taken to be at the phase 'minimum' (give --phase otherwise)")
    given = args.as_of if args.as_of is not None else settings.as_of
    if given is not None:
        try:
            cut = as_of_instant(given)
        except ValueError:
            return None, f"{prog}: --as-of: got {given!r}; expected an ISO date YYYY-MM-DD"
        data_date, as_of = cut.date, cut.date
    else:
        data_date, as_of = _dt.datetime.now(_dt.timezone.utc).date().isoformat(), None
    state = {"phase": phase, "lag_years": phase_lag_years(phase), "minimum_time": None, "minimum_status": None,
             "reversal_time": None, "target_cycle": None, "data_date": data_date, "as_of": as_of,
             "phase_requested": phase, "phase_notes": notes, "provisional": False, "provisional_reasons": [],
             "forecast_unavailable": None, "precursor_source": "given"}
    return state, None


def _requested_phase(args, config, prog):
    from pipeline.config import ConfigError
    from pipeline.precursor import check_phase_request

    if args.lag_years is not None and args.phase is not None:
        return None, f"{prog}: give --phase or --lag-years, not both"
    try:
        if args.lag_years is not None:
            from pipeline.regression import reversal_phase

            return reversal_phase(args.lag_years), None
        if args.phase is not None:
            return check_phase_request("--phase", args.phase), None
        return config.forecast.phase, None
    except (ConfigError, ValueError) as exc:
        return None, f"{prog}: {exc}"


def _measured_state(args, config, phase, prog):
    """``(inputs, problems, notes, None)`` from --store/--series, or ``(None, [], [], (code, line))``."""
    from pipeline.asof import forecast_inputs, read_series_table
    from pipeline.cli.series import given_measure, load_records
    from pipeline.config import ConfigError

    what = "--store" if args.store is not None else "--series"
    if args.sunspots is None:
        return None, [], [], (EXIT_USAGE, f"{prog}: {what} needs --sunspots CSV (monthly sunspot numbers) to find "
                                          f"the cycle minima")
    if args.store is not None and args.scale is not None:
        return None, [], [], (EXIT_USAGE, f"{prog}: --scale applies to --precursor and --series; with --store the "
                                          f"store's measurement definition is the scale in force")
    problems: list[str] = []
    if args.store is not None:
        source, err = load_records(args.store, given_measure(args, config))
        if source is None:
            return None, [], [], (EXIT_USAGE, f"{prog}: cannot take the precursor from {args.store}: {err}")
        if not source:
            return None, [], [], (EXIT_USAGE, f"{prog}: cannot take the precursor from {args.store}: no measured "
                                              f"frame; ingest magnetograms first")
    else:
        try:
            source = read_series_table(args.series)
        except ValueError as exc:
            return None, [], [], (EXIT_USAGE, f"{prog}: {exc}")
        problems += source.problems
    try:
        months, note = read_sunspots(args.sunspots, config.cycles)
    except ValueError as exc:
        return None, [], [], (EXIT_USAGE, f"{prog}: {exc}")
    problems += [f"{args.sunspots} {p}" for p in months.problems]
    try:
        inputs = forecast_inputs(source, months, config, phase=phase, as_of=args.as_of)
    except ConfigError as exc:
        return None, [], [], (EXIT_USAGE, f"{prog}: {exc}")
    except ValueError as exc:  # e.g. pipeline.b0.MixedRecordsError: records of two definitions
        return None, [], [], (EXIT_USAGE, f"{prog}: cannot take the precursor from {args.store or args.series}: {exc}")
    return inputs, problems, [note] if note else [], None


def _say_notes(prog: str, notes) -> None:
    for note in notes:
        print(f"{prog}: note: {note}", file=sys.stderr)


def run(args) -> int:
    from pipeline.asof import NoForecastError, forecast_document
    from pipeline.history import append_history, history_entry
    from pipeline.regression import InsufficientCalibrationError, forecast_amplitude, read_calibration_csv

    config = load_config(args.config, forecast={"method": args.method, "precursor_kind": args.kind,
                                                "window_years": args.window_years})
    settings = config.forecast
    prog = "polecast forecast"
    phase, err = _requested_phase(args, config, prog)
    if err is None and args.as_of is not None:
        err = _check_as_of_option(args.as_of, prog)
    if err:
        print(err, file=sys.stderr)
        return EXIT_USAGE
    try:
        table = read_calibration_csv(args.calibration)
    except ValueError as exc:
        print(f"{prog}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    for reason in table.problems:
        print(f"{prog}: skipped {args.calibration} {reason}", file=sys.stderr)
    problems: list[str] = []
    try:
        if args.precursor is not None:
            state, err = _given_state(args, settings, phase, prog)
            if err:
                print(err, file=sys.stderr)
                return EXIT_USAGE
            _say_notes(prog, state["phase_notes"])
            result = forecast_amplitude(table, args.precursor, settings, precursor_error=args.precursor_error,
                                        phase=state["phase"], scale=args.scale,
                                        allow_scale_mismatch=args.allow_scale_mismatch)
            doc = result.to_dict()
            doc.update(state)
            doc["notes"] = list(state["phase_notes"])
            doc["skipped_rows"] = list(table.problems)
        else:
            inputs, problems, notes, failure = _measured_state(args, config, phase, prog)
            if failure is not None:
                print(failure[1], file=sys.stderr)
                return failure[0]
            for reason in problems:
                print(f"{prog}: skipped {reason}", file=sys.stderr)
            _say_notes(prog, notes + list(inputs.choice.notes) + list(inputs.notes))
            doc = forecast_document(inputs, table, settings, scale=args.scale,
                                    allow_scale_mismatch=args.allow_scale_mismatch)
            doc["notes"] = notes + doc["notes"]
    except (NoForecastError, InsufficientCalibrationError) as exc:
        print(f"{prog}: no forecast: {exc}", file=sys.stderr)
        return EXIT_NO_FORECAST
    except ValueError as exc:  # ScaleMismatchError, FitError, a method the table cannot support
        print(f"{prog}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    doc = finite_or_none(doc)
    for w in doc["warnings"]:
        print(f"{prog}: warning: {w}", file=sys.stderr)
    for reason in doc.get("provisional_reasons") or []:
        print(f"{prog}: may be revised by later data: {reason}", file=sys.stderr)
    if args.history is not None:
        try:
            append_history(args.history, history_entry(doc, doc["data_date"], calibration=str(args.calibration),
                                                       precursor_source=doc["precursor_source"]))
        except ValueError as exc:
            print(f"{prog}: {exc}", file=sys.stderr)
            return EXIT_USAGE
    if args.format == "json":
        json.dump(doc, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        write_text(doc)
    return EXIT_SKIPPED if (table.problems or problems) else EXIT_OK
