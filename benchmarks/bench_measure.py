"""Per-frame cost of `pipeline.measure.measure_file` on one 4096 x 4096 RICE-compressed scaled-int32
frame, against (a) the straightforward sunpy route and (b) a bare full decompression with astropy,
measured in one run on this machine.  Each route runs in its own subprocess so that its peak
memory (ru_maxrss) is its own.

    python benchmarks/bench_measure.py [--size 4096] [--repeat 3]

Writes benchmarks/results/measure.json and prints a table.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
DATA = HERE / "data"


def make_frame(size: int) -> Path:
    import numpy as np

    from pipeline.projection import Observer
    from pipeline.synth.instrument import ObservingSetup, frame_header, geometry_for, render_los, write_magnetogram

    path = DATA / f"bench_{size}_rice.fits"
    if path.exists():
        return path
    DATA.mkdir(parents=True, exist_ok=True)
    obs = Observer(1.4960e11, 6.8, 0.0, 140.0, 6.96e8)
    geom = geometry_for(ObservingSetup(size=size, radius_fraction=0.94), obs)

    def br(lat, lon):
        return 8.0 * np.sign(lat) * np.abs(np.sin(np.deg2rad(lat))) ** 8 + 3.0 * np.cos(np.deg2rad(3 * lon))

    img = render_los(br, geom, obs)
    img += np.random.default_rng(1).normal(0.0, 8.0, img.shape)
    write_magnetogram(path, img, frame_header(geom, obs, "2034-05-06T07:08:09"), compression="RICE_1",
                      bscale=0.1)
    return path


ROUTES = {
    "polecast": """
from pipeline.measure import measure_file
r = measure_file(PATH)
assert r.status == "ok", r.reason
result = (r.north_br_gauss, r.south_br_gauss)
""",
    "astropy_full_decompress": """
from astropy.io import fits
with fits.open(PATH) as h:
    d = h[1].data
    result = float(d[0, 0])
""",
    "sunpy_route": """
import numpy as np, warnings, astropy.units as u
warnings.simplefilter("ignore")
import sunpy.map
from sunpy.map import all_coordinates_from_map
from sunpy.coordinates import HeliographicStonyhurst
m = sunpy.map.Map(PATH)
c = all_coordinates_from_map(m)
hgs = c.transform_to(HeliographicStonyhurst(obstime=m.reference_date))
obs = m.observer_coordinate.transform_to(HeliographicStonyhurst(obstime=m.reference_date))
p = hgs.cartesian.xyz.to_value(u.m)
o = obs.cartesian.xyz.to_value(u.m)[:, None, None]
mu = (p * (o - p)).sum(0) / np.linalg.norm(p, axis=0) / np.linalg.norm(o - p, axis=0)
lat = hgs.lat.deg
br = m.data / mu
ok = np.isfinite(br) & (mu >= 0.1)
result = (float(np.mean(br[ok & (lat >= 60)])), float(np.mean(br[ok & (lat <= -60)])))
""",
}

RUNNER = """
import resource, sys, time, json
PATH = sys.argv[1]
import numpy, astropy.io.fits, sunpy.map, pipeline.measure  # imports are not timed
code = sys.stdin.read()
times = []
for _ in range(int(sys.argv[2])):
    t0 = time.perf_counter()
    exec(code)
    times.append(time.perf_counter() - t0)
# VmHWM: this process's own resident high-water mark (ru_maxrss would carry the parent's over exec)
hwm = [l for l in open("/proc/self/status") if l.startswith("VmHWM")][0].split()[1]
print(json.dumps({"seconds": min(times), "all_seconds": times, "peak_rss_mb": int(hwm) / 1024.0}))
"""


def run_route(name: str, path: Path, repeat: int) -> dict:
    proc = subprocess.run([sys.executable, "-c", RUNNER, str(path), str(repeat)], input=ROUTES[name],
                          capture_output=True, text=True, check=True)
    return json.loads(proc.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--size", type=int, default=4096)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args(argv)
    path = make_frame(args.size)
    results = {"frame": str(path.name), "size": args.size, "file_mb": path.stat().st_size / 1e6}
    for name in ("polecast", "astropy_full_decompress", "sunpy_route"):
        results[name] = run_route(name, path, 1 if name == "sunpy_route" else args.repeat)
    results["timing"] = "best of --repeat runs for polecast and the decompression, one run for sunpy"
    ours = results["polecast"]["seconds"]
    results["speedup_vs_sunpy_route"] = results["sunpy_route"]["seconds"] / ours
    results["speedup_vs_full_decompress"] = results["astropy_full_decompress"]["seconds"] / ours
    (HERE / "results").mkdir(exist_ok=True)
    (HERE / "results" / "measure.json").write_text(json.dumps(results, indent=2) + "\n")
    print(f"frame {path.name}: {args.size}x{args.size} RICE scaled int32, {results['file_mb']:.1f} MB")
    print(f"{'route':28s} {'seconds':>9s} {'peak RSS MB':>12s}")
    for name in ("polecast", "astropy_full_decompress", "sunpy_route"):
        r = results[name]
        print(f"{name:28s} {r['seconds']:9.3f} {r['peak_rss_mb']:12.0f}")
    print(f"speed-up vs sunpy route: {results['speedup_vs_sunpy_route']:.1f}x (target >= 30x)")
    print(f"speed-up vs full decompression: {results['speedup_vs_full_decompress']:.2f}x (target >= 1x)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
