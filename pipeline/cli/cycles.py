"""``polecast cycles FILE``: 13-month smoothed cycle minima and maxima of monthly sunspot numbers."""

from __future__ import annotations

import json
import sys

from pipeline.cli import EXIT_OK, EXIT_SKIPPED, EXIT_USAGE
from pipeline.config import load_config

__all__ = ["add_parser", "run", "landmarks_document", "write_text"]


def add_parser(sub) -> None:
    p = sub.add_parser("cycles", help="cycle minima and maxima of a monthly sunspot-number series",
                       description="Smooth monthly mean sunspot numbers with the 13-month running mean (half "
                                   "weights on the end months), list every cycle minimum and maximum and the "
                                   "current cycle's minimum (confirmed, pending or pinned). The last cycle's "
                                   "maximum is null while it may still be rising. The file is a date,value CSV "
                                   "or the semicolon monthly layout (year;month;decimal year;mean;standard "
                                   "deviation;observations;definitive), detected unless [cycles] sunspot_format "
                                   "declares it. Exit 0 ok, 1 when some rows were skipped (reasons on stderr), "
                                   "2 for a usage or configuration error or an unreadable file.")
    p.add_argument("csv", metavar="FILE", help="monthly sunspot numbers: date,value CSV (date a decimal year or "
                                               "YYYY-MM[-DD]) or the semicolon monthly layout")
    p.add_argument("--format", choices=("json", "text"), default="json", help="output format (default json)")
    p.add_argument("--prominence", type=float, metavar="SN",
                   help="hysteresis threshold in sunspot-number units (default 0.1 x range)")
    p.add_argument("--min-cycle-years", type=float, metavar="YR", help="minimum minimum-to-minimum time (default 7)")
    p.add_argument("--max-missing-months", type=int, metavar="N",
                   help="allow N missing months in a 13-month window (default 0)")
    p.add_argument("--sunspot-number-version", type=int, metavar="V",
                   help="sunspot-number scale of the file, 1 or 2 (default 2)")
    p.add_argument("--sunspot-format", metavar="NAME",
                   help="auto (default), plain-csv or semicolon-monthly")
    p.add_argument("--pinned-minimum", type=float, metavar="YEAR",
                   help="fix the current cycle's minimum (decimal year)")
    p.add_argument("--as-of", metavar="DATE",
                   help="use only months that ended before DATE (decimal year or ISO date)")
    p.add_argument("--config", metavar="PATH", help="TOML configuration file")
    p.set_defaults(func=run)


def landmarks_document(series, settings, as_of=None) -> dict:
    """The ``polecast cycles`` JSON object for a :class:`pipeline.cycles.MonthlySeries`.

    Parameters
    ----------
    series : pipeline.cycles.MonthlySeries
    settings : pipeline.cycles.CycleSettings
    as_of : float, numpy.datetime64 or str, optional
        Use only the months that ended before this date
        (:func:`pipeline.cycles.cycle_landmarks`).

    Returns
    -------
    dict
        ``cycles`` (list of minimum/maximum dicts), ``current_minimum``
        (:func:`pipeline.cycles.current_minimum`), ``sunspot_number_version``,
        ``sunspot_input`` (``format``, ``format_source``,
        ``provisional_months``), ``as_of`` (decimal year or None),
        ``months`` (read), ``months_used`` (before the as-of date),
        ``newest_month_time``, ``smoothing``, ``extrema_rule`` and
        ``skipped_rows``.  Times are decimal years.
    """
    import numpy as np

    from pipeline.cycles import (as_of_decimal_year, current_minimum, cycle_landmarks, find_extrema,
                                 months_ended_before, smoothed_series)

    t, v = series.time_decimal_year, series.values
    keep = np.ones(t.size, dtype=bool)
    if as_of is not None:
        as_of = as_of_decimal_year(as_of)
        keep = months_ended_before(t, as_of)
    cycles = cycle_landmarks(t, v, settings, as_of=as_of)
    found = find_extrema(t[keep], smoothed_series(v[keep], settings), settings)
    minimum = current_minimum(t, v, settings, as_of=as_of)
    method = {"13_month": "13-month running mean, half weights on the two end months",
              "none": "none (input already smoothed)"}[settings.smoothing]
    provisional = None
    if series.definitive is not None:
        provisional = int(np.sum(keep & np.isfinite(v) & ~series.definitive))
    return {
        "cycles": cycles,
        "current_minimum": minimum,
        "sunspot_number_version": settings.sunspot_number_version,
        "sunspot_input": {"format": series.format, "format_source": series.format_source,
                          "provisional_months": provisional},
        "as_of": as_of,
        "smoothing": {"method": settings.smoothing, "description": method, "window_months": 13
                      if settings.smoothing == "13_month" else 1,
                      "max_missing_months": settings.max_missing_months},
        "extrema_rule": {"prominence": found["prominence"], "min_phase_years": settings.min_phase_years,
                         "min_cycle_years": settings.min_cycle_years,
                         "confirm_fraction": settings.confirm_fraction},
        "months": int(v.size),
        "months_used": int(keep.sum()),
        "newest_month_time": minimum["newest_month_time"],
        "skipped_rows": list(series.problems),
    }


def _fmt(v, spec):
    return "-" if v is None else format(v, spec)


def write_text(doc: dict, stream=None) -> None:
    """The ``--format text`` table of a :func:`landmarks_document` (any field may be null or absent)."""
    stream = sys.stdout if stream is None else stream
    s = doc.get("smoothing") or {}
    inp = doc.get("sunspot_input") or {}
    rule = doc.get("extrema_rule") or {}
    as_of = doc.get("as_of")
    stream.write(f"sunspot number version {_fmt(doc.get('sunspot_number_version'), 'd')}; "
                 f"input {_fmt(inp.get('format'), 's')} ({_fmt(inp.get('format_source'), 's')}); "
                 f"{_fmt(doc.get('months_used'), 'd')} of {_fmt(doc.get('months'), 'd')} months used"
                 + ("" if as_of is None else f", as of {as_of:.3f}") + "\n")
    stream.write(f"smoothing: {_fmt(s.get('description'), 's')}; extrema prominence "
                 f"{_fmt(rule.get('prominence'), '.3g')}\n")
    cycles = doc.get("cycles") or []
    if cycles:
        stream.write(f"{'minimum':>10} {'value':>8} {'maximum':>10} {'value':>8}\n")
    else:
        stream.write("no cycle minimum found (series too short or too flat)\n")
    for c in cycles:
        stream.write(f"{_fmt(c.get('minimum_time'), '10.3f'):>10} {_fmt(c.get('minimum_value'), '8.1f'):>8} "
                     f"{_fmt(c.get('maximum_time'), '10.3f'):>10} {_fmt(c.get('maximum_value'), '8.1f'):>8}\n")
    m = doc.get("current_minimum") or {}
    stream.write(f"current cycle minimum: {_fmt(m.get('time'), '.3f')} ({_fmt(m.get('status'), 's')}); "
                 f"{_fmt(m.get('note'), 's')}\n")


def run(args) -> int:
    from pipeline.cycles import as_of_decimal_year, read_sunspot_file

    config = load_config(args.config, cycles={"prominence": args.prominence, "min_cycle_years": args.min_cycle_years,
                                              "max_missing_months": args.max_missing_months,
                                              "sunspot_number_version": args.sunspot_number_version,
                                              "sunspot_format": args.sunspot_format,
                                              "pinned_minimum": args.pinned_minimum})
    settings = config.cycles
    try:
        as_of = None if args.as_of is None else as_of_decimal_year(args.as_of)
    except ValueError as exc:
        print(f"polecast cycles: --as-of: {exc}", file=sys.stderr)
        return EXIT_USAGE
    try:
        series = read_sunspot_file(args.csv, settings.sunspot_format)
    except ValueError as exc:
        print(f"polecast cycles: {exc}", file=sys.stderr)
        return EXIT_USAGE
    if series.format_source == "detected":
        print(f"polecast cycles: {args.csv}: sunspot format not declared; read as {series.format} "
              f"(declare it with [cycles] sunspot_format or --sunspot-format)", file=sys.stderr)
    # a pinned_minimum outside the data raises ConfigError: main reports it (exit 2)
    doc = landmarks_document(series, settings, as_of=as_of)
    if args.format == "json":
        json.dump(doc, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        write_text(doc)
    for reason in series.problems:
        print(f"polecast cycles: skipped {args.csv} {reason}", file=sys.stderr)
    return EXIT_SKIPPED if series.problems else EXIT_OK
