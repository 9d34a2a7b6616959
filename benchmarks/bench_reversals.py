"""``polecast reversals STORE`` on the demo store: the systematic ensemble against the single run, in one run.

The demo archive (demo_fits/) is measured once into a temporary store (``polecast ingest`` with the demo's
configuration, outside the timed part).  Then, each as its own ``python -m pipeline`` subprocess on that store,
with the same bootstrap (300 replicates):

* ``polecast reversals STORE --no-systematics``: the single analysis (noise interval only),
* ``polecast reversals STORE``: the same plus the ensemble of analysis choices (other B0 methods, cap boundary
  +-5 deg, the other zero-offset treatment, smoothing width x0.5 and x2), poles, dipole and latitude bands,

with wall time and peak resident memory (RSS high-water, sampled every 0.05 s with psutil).  The ensemble reuses
the measured records: the store's row count and newest ``measured_utc`` are checked unchanged afterwards.

    python benchmarks/bench_reversals.py

Writes benchmarks/results/bench_reversals.json and prints a table.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from bench_hindcast import DEMO, RESULTS, ROOT, _store_state, _timed  # noqa: E402

CONFIG = ROOT / "configs" / "demo.toml"


def main(argv=None) -> int:
    with tempfile.TemporaryDirectory() as tmp:
        store = Path(tmp) / "demo.sqlite"
        t0 = time.perf_counter()
        ing = subprocess.run([sys.executable, "-m", "pipeline", "ingest", str(DEMO), "--store", str(store),
                              "--config", str(CONFIG), "--workers", str(min(2, os.cpu_count() or 1))],
                             cwd=ROOT, capture_output=True)
        if ing.returncode not in (0, 1):
            print(ing.stderr.decode(), file=sys.stderr)
            return 1
        ingest_s = time.perf_counter() - t0
        before = _store_state(store)
        common = ["reversals", str(store), "--config", str(CONFIG)]
        single = _timed(common + ["--no-systematics"])
        ensemble = _timed(common)
        after = _store_state(store)
    assert after == before, f"the store changed: rows/measured_utc {before} -> {after}"
    doc = json.loads(ensemble["stdout"]) if ensemble["exit_code"] == 0 else None
    members = sorted(doc["north"]["final"]["ensemble"]) if doc and doc["north"]["final"] else []
    result = {
        "machine": {"cpus": os.cpu_count(), "python": sys.version.split()[0]},
        "archive": {"frames_in_store": before[0], "newest_measured_utc": before[1], "ingest_s": ingest_s},
        "single": {k: v for k, v in single.items() if k != "stdout"},
        "ensemble": {k: v for k, v in ensemble.items() if k != "stdout"},
        "ensemble_members": members,
        "ensemble_over_single_time": ensemble["wall_s"] / single["wall_s"],
        "store_unchanged": after == before,
    }
    RESULTS.mkdir(exist_ok=True)
    (RESULTS / "bench_reversals.json").write_text(json.dumps(result, indent=1) + "\n")
    print(f"{'run':<10} {'exit':>4} {'wall s':>8} {'peak RSS MB':>12}")
    for name, r in (("single", single), ("ensemble", ensemble)):
        print(f"{name:<10} {r['exit_code']:>4} {r['wall_s']:>8.2f} {r['peak_rss_mb']:>12.1f}")
    print(f"ensemble / single time: {result['ensemble_over_single_time']:.2f}; members {', '.join(members)}; "
          f"store unchanged ({before[0]} rows, newest measured_utc {before[1]})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
