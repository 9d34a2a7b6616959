"""``polecast calibrate``: calibration rows from the archive's own past cycles.

``polecast calibrate (--store STORE | --series CSV) --sunspots CSV --phase PHASE --out CSV
[--merge CSV]`` writes the rows of :func:`pipeline.hindcast.archive_calibration`
(columns ``cycle,precursor,amplitude,precursor_error,phase,scale``; ``cycle``
is the cycle's ordinal in the sunspot series).  ``--merge`` joins an external
table where phase and scale match (:func:`pipeline.regression.merge_tables`;
the archive's rows first, every row of the other table left out gets a
one-line reason).  The store's records are read once and never re-measured.

Exit codes: 0 ok, 1 some series, sunspot or merged rows were skipped, 2 usage
or configuration error, 3 no row can be made (no cycle of the sunspot series
is covered by the polar series at the phase); each a one-line reason on stderr.
"""

from __future__ import annotations

import sys

from pipeline.cli import EXIT_NO_FORECAST, EXIT_OK, EXIT_SKIPPED, EXIT_USAGE
from pipeline.config import load_config

__all__ = ["add_parser", "run", "load_source", "EXIT_NO_FORECAST"]



def add_parser(sub) -> None:
    p = sub.add_parser("calibrate", help="calibration rows from the archive's own past cycles",
                       description="For each past cycle the polar series covers: the precursor at the phase (the "
                                   "forecast's definition) and the amplitude of that cycle (13-month smoothed "
                                   "maximum of the same sunspot series). Writes cycle,precursor,amplitude,"
                                   "precursor_error,phase,scale. Never re-measures a frame. Exit 0 ok, 1 rows "
                                   "skipped, 2 usage or configuration error, 3 no row can be made.")
    add_source_arguments(p)
    p.add_argument("--phase", required=True, metavar="PHASE", help="minimum or reversal+L (L years after the "
                                                                    "cycle's final dipole reversal)")
    p.add_argument("--out", required=True, metavar="CSV", help="the calibration table to write ('-': stdout)")
    p.add_argument("--merge", metavar="CSV", help="join this calibration table where phase and scale match")
    p.set_defaults(func=run)


def add_source_arguments(p) -> None:
    """``--store | --series``, ``--sunspots``, ``--scale``, ``--kind``, ``--window-years``, ``--config``."""
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--store", metavar="STORE", help="a store of measured frames (read, never re-measured)")
    src.add_argument("--series", metavar="CSV", help="a polar-series table: time (decimal year),north_br_gauss,"
                                                     "south_br_gauss, optional north_br_error_gauss,"
                                                     "south_br_error_gauss")
    p.add_argument("--sunspots", required=True, metavar="CSV", help="monthly sunspot numbers")
    p.add_argument("--scale", metavar="TEXT", help="with --series: what the table measures (the rows' scale)")
    p.add_argument("--kind", metavar="NAME", help="dipole (default) or hemispheres")
    p.add_argument("--window-years", type=float, metavar="YR", help="half-width of the precursor window (0.5)")
    p.add_argument("--config", metavar="PATH", help="TOML configuration file")


def load_source(args, prog: str):
    """``(config, source, months, problems, notes, None)`` or ``(..., (code, line))`` on failure.

    The store's ``ok`` records are read once (:func:`pipeline.cli.series.load_records`:
    ``check_measure_settings`` and ``iter_records(measure=...)``); a series
    table through :func:`pipeline.asof.read_series_table`.
    """
    from pipeline.asof import read_series_table
    from pipeline.cli.forecast import read_sunspots
    from pipeline.cli.series import given_measure, load_records

    config = load_config(args.config, forecast={"precursor_kind": args.kind, "window_years": args.window_years,
                                                "method": getattr(args, "method", None)})
    fail = (None,) * 5
    if args.store is not None and args.scale is not None:
        return fail + ((EXIT_USAGE, f"{prog}: --scale applies to --series; with --store the store's measurement "
                                    f"definition is the scale"),)
    problems: list[str] = []
    if args.store is not None:
        source, err = load_records(args.store, given_measure(args, config))
        if source is None:
            return fail + ((EXIT_USAGE, f"{prog}: cannot read {args.store}: {err}"),)
        if not source:
            return fail + ((EXIT_USAGE, f"{prog}: {args.store}: no measured frame; ingest magnetograms first"),)
    else:
        try:
            source = read_series_table(args.series)
        except ValueError as exc:
            return fail + ((EXIT_USAGE, f"{prog}: {exc}"),)
        problems += source.problems
    try:
        months, note = read_sunspots(args.sunspots, config.cycles)
    except ValueError as exc:
        return fail + ((EXIT_USAGE, f"{prog}: {exc}"),)
    problems += [f"{args.sunspots} {p}" for p in months.problems]
    return config, source, months, problems, [note] if note else [], None


def run(args) -> int:
    from pipeline.config import ConfigError
    from pipeline.hindcast import archive_calibration
    from pipeline.jsonio import atomic_output
    from pipeline.precursor import check_phase_request
    from pipeline.regression import format_calibration_csv, merge_tables, parse_phase, read_calibration_csv

    prog = "polecast calibrate"
    try:
        phase = parse_phase(check_phase_request("--phase", args.phase))
    except (ConfigError, ValueError) as exc:
        print(f"{prog}: {exc}" if "auto" not in str(args.phase).lower() else
              f"{prog}: --phase: got {args.phase!r}; calibration rows need one phase: minimum or reversal+L",
              file=sys.stderr)
        return EXIT_USAGE
    config, source, months, problems, notes, failure = load_source(args, prog)
    if failure is not None:
        print(failure[1], file=sys.stderr)
        return failure[0]
    other = None
    if args.merge is not None:
        try:
            other = read_calibration_csv(args.merge)
        except ValueError as exc:
            print(f"{prog}: {exc}", file=sys.stderr)
            return EXIT_USAGE
    try:
        result = archive_calibration(source, months, config, phase=phase, scale=args.scale)
    except ValueError as exc:  # e.g. pipeline.b0.MixedRecordsError: records of two definitions
        print(f"{prog}: cannot calibrate from {args.store or args.series}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    for reason in problems:
        print(f"{prog}: skipped {reason}", file=sys.stderr)
    for note in notes:
        print(f"{prog}: note: {note}", file=sys.stderr)
    for reason in result.skipped:
        print(f"{prog}: no row: {reason}", file=sys.stderr)
    table = result.table
    if table.n_cycles == 0:
        print(f"{prog}: no calibration row at {phase}: no cycle with a known amplitude is covered by the polar "
              f"series at that phase", file=sys.stderr)
        return EXIT_NO_FORECAST
    if other is not None:
        table = merge_tables(table, other, names=("archive", str(args.merge)))
        for reason in table.problems:
            print(f"{prog}: skipped {reason}", file=sys.stderr)
        problems += table.problems
    text = format_calibration_csv(table)
    if args.out == "-":
        sys.stdout.write(text)
    else:
        try:
            with atomic_output(args.out) as tmp:
                tmp.write_text(text, encoding="utf-8")
        except OSError as exc:
            print(f"{prog}: cannot write {args.out}: {exc}", file=sys.stderr)
            return EXIT_USAGE
        print(f"{prog}: {table.n_cycles} rows at {phase} written to {args.out}", file=sys.stderr)
    return EXIT_SKIPPED if problems else EXIT_OK
