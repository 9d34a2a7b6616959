"""``polecast reversals STORE | --series CSV [--format json|text]``: polarity-reversal epochs."""

from __future__ import annotations

import csv
import json
import sys


from pipeline.cli import EXIT_OK, EXIT_SKIPPED, EXIT_USAGE
from pipeline.cli.series import add_series_options, given_measure, load_records, series_overrides
from pipeline.config import load_config

__all__ = ["add_parser", "run", "read_series_csv", "format_text", "SERIES_CSV_COLUMNS"]

#: Required columns of ``--series CSV``.
SERIES_CSV_COLUMNS = ("time", "north_br_gauss", "south_br_gauss")


def add_parser(sub) -> None:
    p = sub.add_parser(
        "reversals", help="polarity-reversal epochs of the polar fields, with intervals",
        description="Every persistent sign change of the smoothed north, south and axial-dipole polar "
                    "fields, the final one, and a bootstrap interval for each; from a store (with "
                    "per-latitude-band epochs for cap boundaries 55..85 deg) or from a CSV table with "
                    "columns time (ISO date or decimal year), north_br_gauss, south_br_gauss. A store's "
                    "records must have been measured under the measure settings in force (those of --config, "
                    "else the store's own). Exit 0 ok, 1 some rows were unreadable (each named on stderr), 2 "
                    "usage error or settings mismatch.")
    p.add_argument("store", metavar="STORE", nargs="?", help="store file written by `polecast ingest`")
    p.add_argument("--series", metavar="CSV", help="read a series table instead of a store")
    p.add_argument("--format", choices=("json", "text"), default="json", help="output format (default json)")
    p.add_argument("--persistence-years", type=float, metavar="Y",
                   help="a new sign must hold this long to count (default 0.4)")
    p.add_argument("--confidence", type=float, metavar="P", help="interval coverage (default 0.9)")
    p.add_argument("--n-bootstrap", type=int, metavar="N", help="bootstrap replicates (default 300)")
    p.add_argument("--no-systematics", action="store_true",
                   help="leave out the ensemble of analysis choices (noise interval only)")
    add_series_options(p)
    p.set_defaults(func=run)


def read_series_csv(path):
    """Read ``time, north_br_gauss, south_br_gauss`` rows (:func:`pipeline.asof.read_series_table`).

    Returns
    -------
    time_years, north_gauss, south_gauss : ndarray
        Decimal years and gauss (NaN for empty cells), sorted by time.
    problems : list of str
        One line per unreadable row (the row is left out, the rest carry on).

    Raises
    ------
    ValueError
        When a required column is missing (names the columns).
    """
    from pipeline.asof import read_series_table

    table = read_series_table(path)
    return table.time_decimal_year, table.north_br_gauss, table.south_br_gauss, list(table.problems)


def _pct(level) -> str:
    return f"{100 * float(level):g}%"


def _text_block(name, res: dict, indent="") -> list[str]:
    lines = [f"{indent}{name}: {len(res['crossings'])} reversal(s)"]
    for c in res["crossings"]:
        line = (f"{indent}  {c['time_iso']}  {c['time']:.3f}  {_pct(c['level'])} [{c['low']:.3f}, {c['high']:.3f}]  "
                f"sign after {c['sign_after']:+d}")
        if c["resolved"]:
            n, s = c["noise_interval"], c["systematic_interval"]
            line += (f"  (noise [{n['low']:.3f}, {n['high']:.3f}], systematic [{s['low']:.3f}, {s['high']:.3f}], "
                     f"support {c['support']:.2f})")
        else:
            line += f"  (not resolved: {c['reason']})"
        lines.append(line)
    fin = res["final"]
    lines.append(f"{indent}  final: {fin['time_iso'] if fin else 'none'}")
    return lines


def format_text(out: dict) -> str:
    """Human-readable summary of the reversal JSON object (every interval with its level)."""
    level = out.get("north", {}).get("level", 0.9)
    lines = [f"intervals: {_pct(level)} (total = noise and systematic ensemble combined in quadrature)"]
    for name in ("north", "south", "dipole"):
        lines += _text_block(name, out[name])
    for pole, bands in out.get("bands", {}).items():
        lines.append(f"{pole} by cap boundary:")
        for boundary, res in bands.items():
            lines += _text_block(f"|lat| >= {boundary} deg", res, indent="  ")
    return "\n".join(lines) + "\n"


def run(args) -> int:
    from pipeline.reversal import polar_reversals

    prog = "polecast reversals"
    if (args.store is None) == (args.series is None):
        print(f"{prog}: give a STORE or --series CSV (one of them)", file=sys.stderr)
        return EXIT_USAGE
    config = load_config(args.config, series=series_overrides(args),
                         reversals={"min_persistence_years": args.persistence_years,
                                    "confidence": args.confidence, "n_bootstrap": args.n_bootstrap,
                                    "systematics": False if args.no_systematics else None})
    smoother = config.series.smoother
    problems: list[str] = []
    if args.series is not None:
        try:
            t, north, south, problems = read_series_csv(args.series)
        except (OSError, UnicodeDecodeError, ValueError, csv.Error) as exc:
            print(f"{prog}: {exc}", file=sys.stderr)
            return EXIT_USAGE
        res = polar_reversals(t, north, south, config.reversals, smoother)
        out = {k: v.to_dict() for k, v in res.items()}
    else:
        from pipeline.aggregator import polar_series
        from pipeline.systematics import store_reversals

        records, err = load_records(args.store, given_measure(args, config))
        if records is None:
            print(f"{prog}: {err}", file=sys.stderr)
            return EXIT_USAGE
        out = store_reversals(records, polar_series(records, config.series), config)
        if not records:
            problems.append(f"{args.store}: the store has no measured frames")
    if args.format == "json":
        json.dump(out, sys.stdout, indent=1)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(format_text(out))
    for p in problems:
        print(f"{prog}: {p}", file=sys.stderr)
    return EXIT_SKIPPED if problems else EXIT_OK
