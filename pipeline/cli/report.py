"""``polecast report STORE --out DIR [--products DIR] [--config PATH]``: figures and the HTML report."""

from __future__ import annotations

import sys

from pipeline.cli import EXIT_OK, EXIT_USAGE
from pipeline.config import load_config

__all__ = ["add_parser", "run"]


def add_parser(sub) -> None:
    p = sub.add_parser(
        "report", help="figures and a self-contained HTML report of a store and its products",
        description="Draw the polar-field series, latitude-time diagram, calibration, forecast history and "
                    "diagnostics figures and write DIR/index.html (figures embedded, no external resources) "
                    "from a store and, when given, the products directory of `polecast run`. Products that "
                    "are missing are recomputed from the store (series, latitude-time diagram, reversals) or "
                    "left out with a note. The store is read under the measure settings in force: those of "
                    "the products' config.json, else of --config, else the store's own. Exit 0 ok, 2 usage "
                    "error (one line: missing store, bad configuration, an unreadable or invalid config.json "
                    "among the products, a store measured under other settings).")
    p.add_argument("store", metavar="STORE", help="store file written by `polecast ingest`")
    p.add_argument("--out", metavar="DIR", required=True, help="output directory (index.html, figures/)")
    p.add_argument("--products", metavar="DIR", help="products directory written by `polecast run`")
    p.add_argument("--config", metavar="PATH", help="TOML configuration file (settings of recomputed products "
                                                    "and the [report] section)")
    p.set_defaults(func=run)


def run(args) -> int:
    from pathlib import Path

    from pipeline.report import build_report
    from pipeline.store import StoreError

    prog = "polecast report"
    config = load_config(args.config) if args.config else None
    store = Path(args.store)
    if not store.is_file():
        print(f"{prog}: store {store}: no such file; create it with `polecast ingest PATH --store {store}`",
              file=sys.stderr)
        return EXIT_USAGE
    if args.products is not None and not Path(args.products).is_dir():
        print(f"{prog}: --products {args.products}: no such directory; give the directory `polecast run` "
              f"wrote, or leave the option out to recompute from the store", file=sys.stderr)
        return EXIT_USAGE
    try:
        index = build_report(store, args.out, args.products, config=config)
    except StoreError as exc:
        print(f"{prog}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except OSError as exc:
        print(f"{prog}: cannot write the report to {args.out}: {exc}", file=sys.stderr)
        return EXIT_USAGE
    print(f"report: {index}")
    return EXIT_OK
