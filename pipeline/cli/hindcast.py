"""``polecast hindcast``: the forecasts of past cycles as they would have been made.

``polecast hindcast (--store STORE | --series CSV) --sunspots CSV [--calibration CSV] --phase PHASE
[--format json|csv]``: one row per past cycle with a known amplitude
(:func:`pipeline.hindcast.hindcast`), as of the first month start on which
the phase's window was complete, with a calibration that leaves the target
cycle out (the archive's other cycles, or the given table less that cycle:
its label ``k + --cycle-offset``).

``--from DATE --to DATE [--step-months N] [--target-cycle K]`` gives instead
the as-of trajectory of one target (:func:`pipeline.hindcast.trajectory`;
``--phase auto`` is accepted there).

JSON on stdout: ``phase``, ``rows`` (:data:`pipeline.hindcast.HINDCAST_ROW_KEYS`),
``skill`` (:data:`pipeline.hindcast.SKILL_KEYS`), ``skipped``, ``notes``.
CSV: one line per row, intervals as ``interval_68_low,interval_68_high,...``;
the skill on stderr.  The store's records are read once and never re-measured.

Exit codes: 0 ok, 1 some series, sunspot or calibration rows were skipped,
2 usage or configuration error (including a calibration scale other than
the store's, unless ``--allow-scale-mismatch``), 3 no hindcast row can be
made (a one-line reason for each target on stderr).
"""

from __future__ import annotations

import csv
import json
import sys

from pipeline.cli import EXIT_NO_FORECAST, EXIT_OK, EXIT_SKIPPED, EXIT_USAGE
from pipeline.cli.calibrate import add_source_arguments, load_source

__all__ = ["add_parser", "run", "EXIT_NO_FORECAST", "csv_columns"]



def add_parser(sub) -> None:
    p = sub.add_parser("hindcast", help="forecasts of past cycles as they would have been made",
                       description="For every past cycle with a known amplitude: the forecast as of the first "
                                   "date its phase's window was complete, from data before then only, with a "
                                   "calibration that leaves that cycle out; and the skill (r, RMSE, bias, median "
                                   "relative error, interval coverage). With --from/--to: the month-by-month "
                                   "as-of forecasts of one target. Never re-measures a frame. Exit 0 ok, 1 rows "
                                   "skipped, 2 usage or configuration error, 3 no hindcast row can be made.")
    add_source_arguments(p)
    p.add_argument("--phase", required=True, metavar="PHASE",
                   help="minimum or reversal+L (auto too with --from/--to)")
    p.add_argument("--calibration", metavar="CSV", help="a calibration table (less the target cycle for each "
                                                        "row); default the archive's own cycles")
    p.add_argument("--cycle-offset", type=int, default=0, metavar="K",
                   help="the --calibration table labels cycle k (ordinal in the sunspot series) as k + K")
    p.add_argument("--allow-scale-mismatch", action="store_true",
                   help="forecast although the table's scale differs from the one in force (recorded)")
    p.add_argument("--method", metavar="NAME", help="ols (default), odr or loglinear")
    p.add_argument("--from", dest="start", metavar="DATE", help="first as-of date of a trajectory (YYYY-MM-DD)")
    p.add_argument("--to", dest="stop", metavar="DATE", help="last as-of date of a trajectory (YYYY-MM-DD)")
    p.add_argument("--step-months", type=int, default=1, metavar="N", help="months between as-of dates (1)")
    p.add_argument("--target-cycle", type=int, metavar="K", help="the trajectory's target (default: the first "
                                                                 "date's)")
    p.add_argument("--format", choices=("json", "csv"), default="json", help="output format (default json)")
    p.set_defaults(func=run)


def csv_columns() -> list:
    """The CSV header: the row keys with each interval as two columns."""
    from pipeline.hindcast import HINDCAST_ROW_KEYS

    out = []
    for k in HINDCAST_ROW_KEYS:
        out += [f"{k}_low", f"{k}_high"] if k.startswith("interval_") else [k]
    return out


def _csv_cells(row: dict) -> list:
    from pipeline.hindcast import HINDCAST_ROW_KEYS

    def cell(v):
        if v is None:
            return ""
        if isinstance(v, float):
            return repr(v)
        return str(v).lower() if isinstance(v, bool) else str(v)

    cells = []
    for k in HINDCAST_ROW_KEYS:
        cells += [cell(v) for v in row[k]] if k.startswith("interval_") else [cell(row[k])]
    return cells


def _usage(args, prog):
    """One line when the options do not fit together, else None."""
    trajectory = args.start is not None or args.stop is not None
    if trajectory and (args.start is None or args.stop is None):
        return f"{prog}: a trajectory needs both --from DATE and --to DATE"
    if not trajectory and args.target_cycle is not None:
        return f"{prog}: --target-cycle applies to a trajectory (--from/--to)"
    if args.step_months < 1:
        return f"{prog}: --step-months: got {args.step_months}; expected a whole number of months >= 1"
    if args.cycle_offset and args.calibration is None:
        return f"{prog}: --cycle-offset applies to a --calibration table"
    return None


def run(args) -> int:
    from pipeline.config import ConfigError
    from pipeline.hindcast import hindcast, trajectory
    from pipeline.jsonio import finite_or_none
    from pipeline.regression import read_calibration_csv

    prog = "polecast hindcast"
    line = _usage(args, prog)
    if line:
        print(line, file=sys.stderr)
        return EXIT_USAGE
    config, source, months, problems, notes, failure = load_source(args, prog)
    if failure is not None:
        print(failure[1], file=sys.stderr)
        return failure[0]
    table = None
    if args.calibration is not None:
        try:
            table = read_calibration_csv(args.calibration)
        except ValueError as exc:
            print(f"{prog}: {exc}", file=sys.stderr)
            return EXIT_USAGE
        problems += [f"{args.calibration} {p}" for p in table.problems]
    common = dict(calibration=table, cycle_offset=args.cycle_offset, scale=args.scale,
                  allow_scale_mismatch=args.allow_scale_mismatch)
    try:
        if args.start is not None:
            result = trajectory(source, months, config, phase=args.phase, start=args.start, stop=args.stop,
                                step_months=args.step_months, target_cycle=args.target_cycle, **common)
        else:
            result = hindcast(source, months, config, phase=args.phase, **common)
    except ConfigError as exc:
        print(f"{prog}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except ValueError as exc:  # a bad phase or date, ScaleMismatchError, FitError, MixedRecordsError
        print(f"{prog}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    for reason in problems:
        print(f"{prog}: skipped {reason}", file=sys.stderr)
    for note in notes + list(result.notes):
        print(f"{prog}: note: {note}", file=sys.stderr)
    for reason in result.skipped:
        print(f"{prog}: no row: {reason}", file=sys.stderr)
    if not result.rows:
        print(f"{prog}: no hindcast row can be made at {result.phase} "
              f"({len(result.skipped)} targets or dates tried; reasons above)", file=sys.stderr)
        return EXIT_NO_FORECAST
    doc = finite_or_none(result.to_dict())
    if args.format == "json":
        json.dump(doc, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        writer = csv.writer(sys.stdout, lineterminator="\n")
        writer.writerow(csv_columns())
        for row in doc["rows"]:
            writer.writerow(_csv_cells(row))
        s = doc["skill"]
        print(f"{prog}: skill: " + ", ".join(f"{k} {s[k]:.4g}" if isinstance(s[k], float) else f"{k} {s[k]}"
                                            for k in s), file=sys.stderr)
    return EXIT_SKIPPED if problems else EXIT_OK
