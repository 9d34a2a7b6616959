"""``polecast measure FILE [FILE ...]``: one record per file, in input order."""

from __future__ import annotations

import csv
import json
import sys

from pipeline.cli import EXIT_OK, EXIT_SKIPPED
from pipeline.config import load_config
from pipeline.jsonio import finite_or_none
from pipeline.measure import JSON_KEYS, measure_file

__all__ = ["add_parser", "run", "write_records"]


def add_parser(sub) -> None:
    p = sub.add_parser("measure", help="measure the polar caps of FITS magnetograms",
                       description="Measure both polar caps of each FITS magnetogram and print one record per "
                                   "file, in input order. Exit 0 when every file was measured, 1 when any "
                                   "was skipped (its record still printed), 2 for a usage error.")
    p.add_argument("files", nargs="+", metavar="FILE", help="FITS magnetograms (plain or tile-compressed)")
    p.add_argument("--format", choices=("json", "csv"), default="json", help="output format (default json)")
    p.add_argument("--cap-latitude", type=float, metavar="DEG", help="cap boundary |latitude| (default 60)")
    p.add_argument("--mu-min", type=float, metavar="X", help="leave out pixels with mu below X (default 0.1)")
    p.add_argument("--config", metavar="PATH", help="TOML configuration file")
    p.set_defaults(func=run)


def write_records(records, fmt: str, stream=None) -> None:
    """Print records as one JSON array or as CSV with a header line (``stream`` default: the current stdout)."""
    stream = sys.stdout if stream is None else stream
    rows = [{k: finite_or_none(v) for k, v in r.to_json().items()} for r in records]
    if fmt == "json":
        json.dump(rows, stream, indent=1)
        stream.write("\n")
        return
    writer = csv.DictWriter(stream, fieldnames=list(JSON_KEYS), lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({k: ("" if v is None else v) for k, v in row.items()})


def run(args) -> int:
    config = load_config(args.config, measure={"cap_latitude_deg": args.cap_latitude, "mu_min": args.mu_min})
    records = [measure_file(path, config.measure) for path in args.files]
    write_records(records, args.format)
    for r in records:
        if r.status != "ok":
            print(f"polecast measure: {'skipped' if r.status == 'skipped' else 'failed'} {r.file}: {r.reason}",
                  file=sys.stderr)
    return EXIT_OK if all(r.status == "ok" for r in records) else EXIT_SKIPPED
