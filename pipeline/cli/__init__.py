"""The ``polecast`` command: parse, call stage functions, print.  No physics here.

Each sub-command lives in its own module of this package with an
``add_parser(subparsers)`` function that registers it and sets ``func``, a
callable ``(args) -> int`` returning the exit code.

Exit codes shared by every sub-command: 0 success, 1 some input was skipped
or a check failed (the output still says which), 2 usage or configuration
error (one line on stderr), 3 no forecast (or no hindcast or calibration
row) can be made yet from what is known (one-line reason), 130 interrupted by SIGINT (Ctrl-C; 128 + the
signal number, the shells' convention): one line on stderr, no traceback,
and whatever a command had committed (the store's finished records) is kept.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from pipeline import __version__

__all__ = ["main", "build_parser", "EXIT_OK", "EXIT_SKIPPED", "EXIT_USAGE", "EXIT_NO_FORECAST",
           "EXIT_INTERRUPTED"]

EXIT_OK, EXIT_SKIPPED, EXIT_USAGE = 0, 1, 2
#: no forecast, hindcast row or calibration row can be made yet (no reversal, no complete window, too few rows)
EXIT_NO_FORECAST = 3
#: SIGINT: 128 + 2 (common practice of POSIX shells, no source)
EXIT_INTERRUPTED = 130

#: sub-command modules, in the order of the data flow
COMMANDS = ("measure", "synth", "ingest", "export", "series", "reversals", "cycles", "forecast", "calibrate",
            "hindcast", "run", "report")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="polecast",
        description="Polar magnetic field of the Sun from full-disk magnetograms: caps, reversals, forecast.")
    parser.add_argument("--version", action="version", version=f"polecast {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        importlib.import_module(f"pipeline.cli.{name}").add_parser(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``polecast`` console script."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    from pipeline.config import ConfigError

    try:
        return int(args.func(args))
    except ConfigError as exc:
        print(f"polecast {args.command}: configuration error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except KeyboardInterrupt:
        print(f"polecast {args.command}: interrupted; what was committed is kept, run again to carry on",
              file=sys.stderr)
        return EXIT_INTERRUPTED


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
