"""``polecast cycles CSV``: 13-month smoothed cycle minima and maxima of monthly sunspot numbers."""

from __future__ import annotations

import json
import sys

from pipeline.cli import EXIT_OK, EXIT_SKIPPED, EXIT_USAGE
from pipeline.config import load_config

__all__ = ["add_parser", "run", "landmarks_document"]


def add_parser(sub) -> None:
    p = sub.add_parser("cycles", help="cycle minima and maxima of a monthly sunspot-number series",
                       description="Smooth monthly mean sunspot numbers with the 13-month running mean (half "
                                   "weights on the end months) and list every cycle minimum and maximum. The "
                                   "last cycle's maximum is null while it may still be rising. Exit 0 ok, 1 when "
                                   "some rows were skipped (reasons on stderr), 2 for a usage error.")
    p.add_argument("csv", metavar="CSV", help="two columns: date (decimal year or YYYY-MM[-DD]), value")
    p.add_argument("--format", choices=("json", "text"), default="json", help="output format (default json)")
    p.add_argument("--prominence", type=float, metavar="SN",
                   help="hysteresis threshold in sunspot-number units (default 0.1 x range)")
    p.add_argument("--min-cycle-years", type=float, metavar="YR", help="minimum minimum-to-minimum time (default 7)")
    p.add_argument("--max-missing-months", type=int, metavar="N",
                   help="allow N missing months in a 13-month window (default 0)")
    p.add_argument("--config", metavar="PATH", help="TOML configuration file")
    p.set_defaults(func=run)


def landmarks_document(series, settings) -> dict:
    """The ``polecast cycles`` JSON object for a :class:`pipeline.cycles.MonthlySeries`."""
    from pipeline.cycles import cycle_landmarks, find_extrema, smoothed_series

    smoothed = smoothed_series(series.values, settings)
    cycles = cycle_landmarks(series.time_decimal_year, series.values, settings, smoothed=smoothed)
    found = find_extrema(series.time_decimal_year, smoothed, settings)
    method = {"13_month": "13-month running mean, half weights on the two end months",
              "none": "none (input already smoothed)"}[settings.smoothing]
    return {
        "cycles": cycles,
        "smoothing": {"method": settings.smoothing, "description": method, "window_months": 13
                      if settings.smoothing == "13_month" else 1,
                      "max_missing_months": settings.max_missing_months},
        "extrema_rule": {"prominence": found["prominence"], "min_phase_years": settings.min_phase_years,
                         "min_cycle_years": settings.min_cycle_years,
                         "confirm_fraction": settings.confirm_fraction},
        "months": int(series.values.size),
        "skipped_rows": list(series.problems),
    }


def _fmt(v, spec):
    return "-" if v is None else format(v, spec)


def write_text(doc: dict, stream=None) -> None:
    stream = sys.stdout if stream is None else stream
    s = doc["smoothing"]
    stream.write(f"smoothing: {s['description']}; extrema prominence {doc['extrema_rule']['prominence']:.3g}\n")
    stream.write(f"{'minimum':>10} {'value':>8} {'maximum':>10} {'value':>8}\n")
    for c in doc["cycles"]:
        stream.write(f"{c['minimum_time']:10.3f} {c['minimum_value']:8.1f} "
                     f"{_fmt(c['maximum_time'], '10.3f'):>10} {_fmt(c['maximum_value'], '8.1f'):>8}\n")


def run(args) -> int:
    from pipeline.cycles import read_monthly_csv

    config = load_config(args.config, cycles={"prominence": args.prominence, "min_cycle_years": args.min_cycle_years,
                                              "max_missing_months": args.max_missing_months})
    try:
        series = read_monthly_csv(args.csv)
    except ValueError as exc:
        print(f"polecast cycles: {exc}", file=sys.stderr)
        return EXIT_USAGE
    doc = landmarks_document(series, config.cycles)
    if args.format == "json":
        json.dump(doc, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        write_text(doc)
    for reason in series.problems:
        print(f"polecast cycles: skipped {args.csv} {reason}", file=sys.stderr)
    return EXIT_SKIPPED if series.problems else EXIT_OK
