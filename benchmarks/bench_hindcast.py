"""``polecast hindcast --store`` on the demo store: wall time and peak memory, measured in one run.

The demo archive (demo_fits/) is measured once into a temporary store (``polecast ingest``, outside the
timed part).  Then, each as its own ``python -m pipeline`` subprocess on that store:

* ``polecast forecast --store`` (one as-of state: the straightforward route, the unit of cost),
* ``polecast hindcast --store`` at the phase ``--phase`` (default reversal+4) with the demo's calibration table
  (its scale is the synthetic truth's, hence ``--allow-scale-mismatch``); the demo archive holds one final
  reversal whose target's maximum is not yet in its sunspot file, so this exits 3 with its reasons (the
  cost is then the full-data state plus the search),
* ``polecast hindcast --store --phase auto --from 2053-01-01 --to 2057-06-01``: the monthly as-of trajectory
  (54 as-of states),

with wall time and peak resident memory (RSS high-water, sampled every 0.05 s with psutil).  The hindcast must
not re-measure a frame: the store's row count and newest ``measured_utc`` are checked unchanged afterwards.

    python benchmarks/bench_hindcast.py [--phase reversal+4]

Writes benchmarks/results/bench_hindcast.json and prints a table.
"""

from __future__ import annotations

import argparse
import json
import os
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
DEMO = ROOT / "demo_fits"
RESULTS = HERE / "results"


def _store_state(store: Path) -> tuple:
    with sqlite3.connect(store) as db:
        return db.execute("SELECT COUNT(*), MAX(measured_utc) FROM files").fetchone()


def _timed(args: list) -> dict:
    import psutil

    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-m", "pipeline"] + args, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, cwd=ROOT)
    ps, peak = psutil.Process(proc.pid), 0
    while proc.poll() is None:
        try:
            peak = max(peak, ps.memory_info().rss)
        except psutil.NoSuchProcess:
            break
        time.sleep(0.05)
    out, err = proc.communicate()
    wall = time.perf_counter() - t0
    return {"command": "pipeline " + " ".join(args), "exit_code": proc.returncode, "wall_s": wall,
            "peak_rss_mb": peak / 2 ** 20, "stdout": out.decode(), "stderr_tail": err.decode().splitlines()[-3:]}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--phase", default="reversal+4")
    opts = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        store = Path(tmp) / "demo.sqlite"
        t0 = time.perf_counter()
        ing = subprocess.run([sys.executable, "-m", "pipeline", "ingest", str(DEMO), "--store", str(store),
                              "--workers", str(min(2, os.cpu_count() or 1))], cwd=ROOT, capture_output=True)
        if ing.returncode not in (0, 1):
            print(ing.stderr.decode(), file=sys.stderr)
            return 1
        ingest_s = time.perf_counter() - t0
        before = _store_state(store)
        common = ["--store", str(store), "--sunspots", str(DEMO / "sunspots.csv")]
        forecast = _timed(["forecast"] + common + ["--calibration", str(DEMO / "calibration.csv"), "--phase",
                                                   opts.phase, "--allow-scale-mismatch"])
        hind = _timed(["hindcast"] + common + ["--calibration", str(DEMO / "calibration.csv"), "--phase",
                                               opts.phase, "--allow-scale-mismatch"])
        traj = _timed(["hindcast"] + common + ["--calibration", str(DEMO / "calibration.csv"), "--phase", "auto",
                                               "--allow-scale-mismatch", "--from", "2053-01-01", "--to", "2057-06-01"])
        after = _store_state(store)
    assert after == before, f"the store changed: rows/measured_utc {before} -> {after}"
    doc = json.loads(hind["stdout"]) if hind["exit_code"] in (0, 1) else None
    result = {
        "machine": {"cpus": os.cpu_count(), "python": sys.version.split()[0]},
        "archive": {"frames_in_store": before[0], "newest_measured_utc": before[1], "ingest_s": ingest_s},
        "phase": opts.phase,
        "forecast": {k: v for k, v in forecast.items() if k != "stdout"},
        "hindcast": {k: v for k, v in hind.items() if k != "stdout"},
        "trajectory": {k: v for k, v in traj.items() if k != "stdout"},
        "trajectory_rows": len(json.loads(traj["stdout"])["rows"]) if traj["exit_code"] in (0, 1) else None,
        "hindcast_rows": None if doc is None else len(doc["rows"]),
        "hindcast_skill": None if doc is None else doc["skill"],
        "hindcast_over_forecast_time": hind["wall_s"] / forecast["wall_s"],
        "store_unchanged": after == before,
    }
    RESULTS.mkdir(exist_ok=True)
    (RESULTS / "bench_hindcast.json").write_text(json.dumps(result, indent=1) + "\n")
    print(f"{'command':<10} {'exit':>4} {'wall s':>8} {'peak RSS MB':>12}")
    for name, r in (("forecast", forecast), ("hindcast", hind), ("trajectory", traj)):
        print(f"{name:<10} {r['exit_code']:>4} {r['wall_s']:>8.2f} {r['peak_rss_mb']:>12.1f}")
    print(f"hindcast / forecast time: {result['hindcast_over_forecast_time']:.2f}; rows {result['hindcast_rows']}; "
          f"store unchanged ({before[0]} rows, newest measured_utc {before[1]})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
