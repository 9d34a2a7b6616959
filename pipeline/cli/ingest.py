"""``polecast ingest PATH [PATH ...] --store STORE``: measure an archive into a store, incrementally."""

from __future__ import annotations

import sys

from pipeline.cli import EXIT_USAGE

__all__ = ["add_parser", "run"]

_MAX_SKIP_LINES = 20


def add_parser(sub) -> None:
    from pipeline.batch import DEFAULT_PATTERNS

    p = sub.add_parser(
        "ingest", help="measure every new file of an archive into a store (incremental, parallel)",
        description="Scan directories (recursively), files and glob patterns; measure every file whose content "
                    "is not in the store yet (files are identified by their bytes, so a renamed file is not "
                    "measured twice and a changed one is measured again) and record each result, measured or "
                    "skipped with its reason (bad input, permanent). A file that cannot be read, changes while "
                    "it is read, or whose measurement fails for a reason outside the file (an error: a bug, "
                    "out of memory, a worker that died) is reported and not stored, and is tried again on the "
                    "next run. Safe to interrupt: run it again to resume. Exit 0 when every file was measured "
                    "or known, 1 when any was skipped, not stored or an error (see `polecast export STORE "
                    "--skipped`), 2 for a usage, configuration, store-in-use or scheduler error.")
    p.add_argument("paths", nargs="+", metavar="PATH", help="directories, FITS files or glob patterns")
    p.add_argument("--store", required=True, metavar="STORE", help="the store file (SQLite; created if missing)")
    p.add_argument("--pattern", action="append", metavar="GLOB",
                   help="file-name pattern for files found in directories; repeat for several (default: "
                        f"{' '.join(DEFAULT_PATTERNS)}, or [ingest] patterns of the configuration); files named "
                        "directly are always taken")
    p.add_argument("--workers", type=int, metavar="N", help="local worker processes (default: one per core)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on a dask.distributed cluster instead, e.g. tcp://HOST:8786 (started with "
                        "`dask scheduler` and `dask worker`); an unreachable scheduler is an error")
    p.add_argument("--remeasure", action="store_true",
                   help="measure again files recorded under other settings (another measure configuration "
                        "or measurement-code version)")
    p.add_argument("--config", metavar="PATH", help="TOML configuration file ([measure] and [ingest])")
    p.set_defaults(func=run)


def run(args) -> int:
    from pipeline.batch import IngestError, ingest
    from pipeline.config import load_config
    from pipeline.store import StoreError, open_store

    overrides = {"workers": args.workers}
    if args.pattern:
        overrides["patterns"] = tuple(args.pattern)
    config = load_config(args.config, ingest=overrides)
    shown = [0]

    def tell(what):
        def report(path, reason):
            shown[0] += 1
            if shown[0] <= _MAX_SKIP_LINES:
                print(f"polecast ingest: {what} {path}: {reason}", file=sys.stderr)
        return report

    try:
        with open_store(args.store, "a") as store:
            summary = ingest(args.paths, store, config.measure, config.ingest, scheduler=args.scheduler,
                             remeasure=args.remeasure, progress=sys.stdout.isatty(), on_skip=tell("skipped"),
                             on_error=tell("not stored"))
    except (IngestError, StoreError) as exc:
        print(f"polecast ingest: {exc}", file=sys.stderr)
        return EXIT_USAGE
    if shown[0] > _MAX_SKIP_LINES:
        print(f"polecast ingest: ... and {shown[0] - _MAX_SKIP_LINES} more skipped or not stored; "
              f"`polecast export {args.store} --skipped --out FILE` lists the skipped ones", file=sys.stderr)
    if summary.stale_config:
        print(f"polecast ingest: {summary.stale_config} records of other settings were not found under "
              f"the given paths and were kept as they are", file=sys.stderr)
    print(summary.line())
    return summary.exit_code
