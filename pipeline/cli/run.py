"""``polecast run CONFIG.toml`` and ``polecast demo [--out DIR]``: the whole job in one command."""

from __future__ import annotations

import dataclasses
import sys
from pathlib import Path

from pipeline.cli import EXIT_USAGE

__all__ = ["add_parser", "run", "demo", "print_outcome"]

_MAX_SKIP_LINES = 20


def add_parser(sub) -> None:
    p = sub.add_parser("run", help="the whole job as a configuration says (incremental)",
                       description="Ingest (only new files) -> polar series -> reversals -> cycle landmarks -> "
                                   "precursor -> forecast (appending to the forecast history) -> report, as the "
                                   "TOML configuration says. One run at a time per products directory: a second "
                                   "run while one holds it is refused at once (exit 2). Exit 0 ok, 1 when new files "
                                   "were skipped, 2 for a configuration or usage error (one line on stderr: a "
                                   "missing input, a bad setting, a store measured under other settings, a store "
                                   "or products directory in use, a calibration scale other than the store's), 3 "
                                   "when no forecast can be made yet (no reversal or minimum, no complete window, "
                                   "too few calibration rows of the phase: every other product, the summary with "
                                   "the reason and the report are still written), 130 when interrupted (committed "
                                   "work is kept).")
    p.add_argument("config", metavar="CONFIG.toml", help="configuration file (see configs/example.toml)")
    p.set_defaults(func=run)
    d = sub.add_parser("demo", help="run the embedded demo (synthetic star, fictional magnetograph)",
                       description="Run the demo configuration (configs/demo.toml) on the synthetic archive in "
                                   "demo_fits/: no network, no server. Prints the forecast, the reversal epochs "
                                   "against the synthetic star's truth, and where the report is.")
    d.add_argument("--out", default="polecast-demo", metavar="DIR", help="output folder (default ./polecast-demo)")
    d.add_argument("--data", metavar="DIR", help="the demo archive (default: demo_fits/ of the clone)")
    d.add_argument("--workers", type=int, metavar="N", help="local worker processes (default: all cores)")
    d.set_defaults(func=demo)


def _on_skip_printer():
    shown = [0]

    def on_skip(path, reason):
        shown[0] += 1
        if shown[0] <= _MAX_SKIP_LINES:
            print(f"polecast: skipped {path}: {reason}", file=sys.stderr)
    return on_skip


def _fmt_crossing(c):
    level = f"{100 * float(c.get('level', 0.9)):g}%"
    text = f"{c['time_iso']} ({c['time']:.3f}, {level} interval {c['low']:.3f}-{c['high']:.3f}"
    return text + (")" if c.get("resolved", True) else f"; not resolved: {c.get('reason')})")


def _fmt_year(v) -> str:
    return "n/a" if v is None else f"{v:.3f}"


def _precursor_line(p: dict) -> str:
    """When and how the precursor was taken (or why it could not be)."""
    phase = p.get("phase") or "none"
    detail = p.get("precursor_detail") or {}
    window = ""
    if detail.get("time") is not None and detail.get("window_years") is not None:
        window = f", window {detail['time'] - detail['window_years']:.3f}-{detail['time'] + detail['window_years']:.3f}"
    as_of = f", as of {p['as_of']}" if p.get("as_of") else ""
    return (f"precursor phase {phase}{window}; final dipole reversal {_fmt_year(p.get('reversal_time'))}; minimum "
            f"{_fmt_year(p.get('minimum_time'))} ({p.get('minimum_status') or 'not known'}); target cycle "
            f"{p.get('target_cycle') if p.get('target_cycle') is not None else 'n/a'}; data to {p.get('data_date')}"
            f"{as_of}")


def print_outcome(result, stream=None) -> None:
    """Forecast (or why there is none), reversal epochs (and the truth when known) and where the products are."""
    s = result.summary
    f = s["forecast"]
    w = (stream or sys.stdout).write
    w(f"{result.ingest_line}\n")
    w(f"frames measured in the store: {s['frames']}\n")
    for pole in ("north", "south", "dipole"):
        r = s["reversals"][pole]
        fin = r.get("final")
        w(f"{pole:6s} reversals: {len(r['crossings'])}; final: {_fmt_crossing(fin) if fin else 'none'}\n")
    w(_precursor_line(s.get("precursor") or {}) + "\n")
    if f is None:
        w(f"no forecast: {s.get('forecast_unavailable')}\n")
    else:
        lo68, hi68 = f["interval_68"]
        lo95, hi95 = f["interval_95"]
        target = f.get("target_cycle")
        w(f"next-cycle amplitude: {f['amplitude']:.1f} "
          f"(68%: {lo68:.1f}-{hi68:.1f}; 95%: {lo95:.1f}-{hi95:.1f}); precursor {f['precursor']:.3g} G at phase "
          f"{f.get('phase')}, method {f['method']}, {f['n_cycles']} cycles, r = {f['r']:.2f}\n")
        for warning in f.get("warnings", []):
            w(f"warning: {warning}\n")
        for reason in f.get("provisional_reasons") or []:
            w(f"may be revised: {reason}\n")
    truth = s.get("truth")
    if truth:
        for pole in ("north", "south"):
            fin = s["reversals"][pole].get("final")
            t = truth["reversals"].get(pole)
            diff = "" if not (fin and t is not None) else f" (recovered - truth = {fin['time'] - t:+.3f} yr)"
            w(f"truth: {pole} final reversal {t if t is None else f'{t:.3f}'}{diff}\n")
        amp = truth.get("next_amplitude")
        if amp is not None and f is not None:
            inside = f["interval_95"][0] <= amp <= f["interval_95"][1]
            w(f"truth: next-cycle amplitude {amp:.1f} ({'inside' if inside else 'OUTSIDE'} the 95% interval)\n")
        elif amp is not None:
            w(f"truth: next-cycle amplitude {amp:.1f} (no forecast to compare)\n")
    w(f"products: {result.products_dir}\n")
    if result.report:
        w(f"report: {result.report}\n")
    w(f"caution: {s['cautions']}\n")


def _execute(config) -> int:
    from pipeline.config import ConfigError
    from pipeline.run import run_pipeline

    try:
        result = run_pipeline(config, progress=sys.stdout.isatty(), on_skip=_on_skip_printer())
    except ConfigError:
        raise
    # StoreError (StoreLockedError, StoreSettingsError), IngestError and RunLockedError are RuntimeErrors
    except (ValueError, RuntimeError, OSError) as exc:
        print(f"polecast: {exc}", file=sys.stderr)
        return EXIT_USAGE
    for m in result.messages:
        print(f"polecast: {m}", file=sys.stderr)
    if result.summary["forecast"] is None:
        # exit 3 (no forecast yet) or 2 (a calibration of another scale): the reason in one line
        print(f"polecast: no forecast: {result.summary['forecast_unavailable']}", file=sys.stderr)
    print_outcome(result)
    return result.exit_code


def _load(path: Path, **overrides):
    from pipeline.config import load_config

    config = load_config(path, **overrides)
    sections = dict(config.sections)
    sections["run"] = config.run.resolved(path.resolve().parent)
    return dataclasses.replace(config, sections=sections)


def run(args) -> int:
    path = Path(args.config)
    if not path.exists():
        print(f"polecast run: configuration file {path} not found", file=sys.stderr)
        return EXIT_USAGE
    return _execute(_load(path))


def demo(args) -> int:
    from pipeline.config import ConfigError
    from pipeline.run import find_demo_config, find_demo_data

    try:
        data = find_demo_data(args.data)
        conf = find_demo_config()
    except ConfigError as exc:
        print(f"polecast demo: {exc}", file=sys.stderr)
        return EXIT_USAGE
    config = _load(conf, ingest={"workers": args.workers})
    out = Path(args.out).resolve()
    run_settings = dataclasses.replace(
        config.run, archive=(str(data),), sunspots=str(data / "sunspots.csv"),
        calibration=str(data / "calibration.csv"), truth=str(data / "truth.json"),
        store=str(out / "store.sqlite"), products_dir=str(out), history=str(out / "forecast_history.jsonl"))
    sections = dict(config.sections)
    sections["run"] = run_settings
    return _execute(dataclasses.replace(config, sections=sections))
