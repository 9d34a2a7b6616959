"""``polecast synth OUT_DIR``: a synthetic KVM archive of the star Tessaly with its truth."""

from __future__ import annotations

import sys

from pipeline.cli import EXIT_OK, EXIT_SKIPPED, EXIT_USAGE

__all__ = ["add_parser", "run", "settings_from_args"]


def add_parser(sub) -> None:
    p = sub.add_parser(
        "synth", help="write a synthetic magnetogram archive with known truth",
        description="Write one FITS magnetogram per observation of the synthetic star Tessaly, as seen by the "
                    "fictional Kestrel Vector Magnetograph (KVM) from the Earth's position, plus the truth "
                    "products (truth.json, truth_caps.csv, truth_frames.csv, truth_br.nc, sunspots.csv, "
                    "calibration.csv). Deterministic for a seed. Synthetic data: for demos and tests only.")
    p.add_argument("out_dir", metavar="OUT_DIR", help="output directory (created if missing)")
    p.add_argument("--start", default="2031-01-01", metavar="YYYY-MM-DD", help="first observation (default 2031-01-01)")
    p.add_argument("--end", default="2032-01-01", metavar="YYYY-MM-DD", help="last possible observation (default 2032-01-01)")
    p.add_argument("--cadence", type=float, default=27.0, metavar="DAYS", help="days between observations (default 27)")
    p.add_argument("--size", type=int, default=256, metavar="PIXELS", help="image side in pixels (default 256)")
    p.add_argument("--seed", type=int, default=1, metavar="N", help="seed of the star and the noise (default 1)")
    p.add_argument("--rotation", type=float, default=0.0, metavar="DEG", help="image rotation CROTA2 (default 0)")
    p.add_argument("--offset", type=float, nargs=2, default=(0.0, 0.0), metavar=("DX", "DY"),
                   help="disk-centre offset from the image centre, pixels (default 0 0)")
    p.add_argument("--noise", type=float, default=2.0, metavar="GAUSS", help="instrument noise per pixel (default 2)")
    p.add_argument("--network", type=float, default=3.0, metavar="GAUSS", help="network field RMS (default 3)")
    p.add_argument("--no-regions", action="store_true", help="leave out the active regions")
    p.add_argument("--zero-offset", type=float, default=0.0, metavar="GAUSS",
                   help="zero-point offset added to every on-disk line-of-sight pixel before noise (default 0)")
    p.add_argument("--zero-offset-drift", type=float, default=0.0, metavar="GAUSS_PER_YEAR",
                   help="linear drift of the zero-point offset from --start, gauss per year (default 0)")
    p.add_argument("--quiet", action="store_true", help="no progress messages")
    p.set_defaults(func=run)


def settings_from_args(args):
    """The :class:`pipeline.synth.archive.ArchiveSettings` of parsed ``polecast synth`` arguments."""
    from pipeline.synth.archive import ArchiveSettings

    return ArchiveSettings(start=args.start, end=args.end, cadence_days=args.cadence, size=args.size,
                           seed=args.seed, rotation_deg=args.rotation, offset_pixels=tuple(args.offset),
                           noise_gauss=args.noise, network_gauss=args.network, regions=not args.no_regions,
                           zero_offset_gauss=args.zero_offset,
                           zero_offset_drift_gauss_per_year=args.zero_offset_drift)


def run(args) -> int:
    from pipeline.synth.archive import write_archive

    try:
        settings = settings_from_args(args)
    except ValueError as exc:
        print(f"polecast synth: {exc}", file=sys.stderr)
        return EXIT_USAGE

    def progress(i, n, name):
        if not args.quiet and (i == n or i % 25 == 0):
            print(f"polecast synth: {i}/{n} frames ({name})", file=sys.stderr)

    result = write_archive(args.out_dir, settings, progress=progress)
    for name, reason in result.failed:
        print(f"polecast synth: skipped {name}: {reason}", file=sys.stderr)
    t = result.truth
    print(f"polecast synth: wrote {len(result.files)} frames and the truth products to {result.out_dir}")
    if t:
        print(f"  final reversals: north {t['final_reversals']['north']}, south {t['final_reversals']['south']}; "
              f"last minimum {t['last_minimum_time']}; precursor {t['precursor_at_last_minimum']}; "
              f"next amplitude {t['next_amplitude']}")
    return EXIT_SKIPPED if result.failed else EXIT_OK
