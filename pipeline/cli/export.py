"""``polecast export STORE --format csv|netcdf --out FILE``: the store's records as a table."""

from __future__ import annotations

import sys

from pipeline.cli import EXIT_OK, EXIT_USAGE

__all__ = ["add_parser", "run"]


def add_parser(sub) -> None:
    p = sub.add_parser(
        "export", help="write the measured frames of a store as CSV or netCDF",
        description="Write every measured frame (status ok) of a store, one row per file content, in time "
                    "order. CSV columns: the `polecast measure` keys first, then provenance (observer, "
                    "digest, size, polecast version, configuration id, when measured). netCDF: the same "
                    "values as variables on a `time` dimension with units and CF attributes, plus the "
                    "latitude profile. Skipped files are not included; --skipped writes them instead (CSV "
                    "only), with their reasons. Only records measured under the measure settings in force "
                    "(those of --config, else the store's own) are written; a store holding others is refused "
                    "(exit 2).")
    p.add_argument("store", metavar="STORE", help="store file written by `polecast ingest`")
    p.add_argument("--format", choices=("csv", "netcdf"), default="csv", help="output format (default csv)")
    p.add_argument("--out", metavar="FILE", default="-", help="output file; '-' for stdout (CSV only; default)")
    p.add_argument("--skipped", action="store_true", help="write the skipped files and their reasons instead")
    p.add_argument("--config", metavar="PATH",
                   help="TOML configuration file; its [measure] settings must be those the store's records were "
                        "measured under (without it, the store's own are used)")
    p.set_defaults(func=run)


def run(args) -> int:
    from pipeline.cli.series import given_measure
    from pipeline.config import load_config
    from pipeline.store import StoreError, check_measure_settings, export_csv, export_netcdf, open_store

    if args.format == "netcdf" and (args.skipped or args.out == "-"):
        why = "--skipped is CSV only" if args.skipped else "netCDF needs --out FILE"
        print(f"polecast export: {why}; use --format csv or give --out FILE", file=sys.stderr)
        return EXIT_USAGE
    status = "skipped" if args.skipped else "ok"
    measure = given_measure(args, load_config(args.config))
    try:
        with open_store(args.store, "r") as store:
            in_force = check_measure_settings(store, measure)
            if args.format == "netcdf":
                n = export_netcdf(store, args.out, measure=in_force)
            elif args.out == "-":
                n = export_csv(store, sys.stdout, status, in_force)
            else:
                with open(args.out, "w", encoding="utf-8", newline="") as fh:
                    n = export_csv(store, fh, status, in_force)
    except BrokenPipeError:  # the reader of stdout stopped early (e.g. `| head`): not an error
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())  # no second error at exit
        return EXIT_OK
    except (StoreError, OSError) as exc:
        print(f"polecast export: {exc}", file=sys.stderr)
        return EXIT_USAGE
    print(f"export: {n} {'skipped files' if args.skipped else 'frames'} -> {args.out}", file=sys.stderr)
    return EXIT_OK
