"""Archive ingest throughput and memory, measured in one run on this machine.

On a synthetic archive of small KVM frames (Tessaly, 2030s dates) this measures

* frames per second of ``polecast ingest`` with 1 and 2 local worker processes (their ratio is the
  parallel speed-up; target >= 1.8 with 2 workers),
* the same through a local dask.distributed cluster (``dask scheduler`` and two ``dask worker
  --nworkers 1 --nthreads 1`` processes on 127.0.0.1),
* a re-run with nothing new, as a fraction of the first run,
* peak resident memory (RSS high-water, sampled every 0.1 s with psutil) of the driver and of the
  largest worker at 1,000 and at 10,000 frames (2 local workers; target: flat in archive size).

Every ingest runs as its own ``python -m pipeline ingest`` subprocess with a fresh store.  Two rates
are given: end to end (wall time of the command, including interpreter and worker start-up) and
steady (frames measured after the first commit divided by the time between the first and last
commit; commits every 50 results).  The 10,000-frame archive reuses the 1,000 frames plus 9,000
copies that differ only in their OBJECT card, so every file has its own digest.

    python benchmarks/bench_ingest.py [--frames 1000] [--big 10000] [--size 128]

Frames are cached under benchmarks/data/ (git-ignored).  Writes benchmarks/results/ingest.json and
prints a table.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
DATA = HERE / "data"
RESULTS = HERE / "results"


def _frame(path: Path, k: int, size: int) -> None:
    import numpy as np

    from pipeline.projection import Observer
    from pipeline.synth.instrument import ObservingSetup, frame_header, geometry_for, render_los, write_magnetogram

    obs = Observer(1.4960e11, 7.2 * np.sin(2 * np.pi * k / 365.25), 0.0, (13.2 * k) % 360.0, 6.96e8)
    geom = geometry_for(ObservingSetup(size=size, radius_fraction=0.92), obs)
    north = 6.0 * np.cos(2 * np.pi * k / 4000.0)

    def br(lat, lon):
        return north * np.sign(lat) * np.abs(np.sin(np.deg2rad(lat))) ** 8 + 2.0 * np.cos(np.deg2rad(3 * lon))

    img = render_los(br, geom, obs) + np.random.default_rng(k).normal(0.0, 3.0, (size, size))
    t = dt.datetime(2033, 1, 1) + dt.timedelta(hours=6 * k)
    write_magnetogram(path, img, frame_header(geom, obs, t.strftime("%Y-%m-%dT%H:%M:%S")), bscale=0.1)


def make_archive(n: int, size: int) -> Path:
    """n frames in 10 sub-directories, cached."""
    root = DATA / f"ingest_{size}px_{n}"
    done = root / ".complete"
    if done.exists():
        return root
    for k in range(n):
        sub = root / f"d{k % 10}"
        sub.mkdir(parents=True, exist_ok=True)
        p = sub / f"kvm_{k:05d}.fits"
        if not p.exists():
            _frame(p, k, size)
    done.write_text("ok")
    return root


def _retitle(raw: bytes, k: int) -> bytes:
    """The same FITS bytes with another OBJECT value (one 80-byte card rewritten in place)."""
    from astropy.io.fits import Card

    i = raw.index(b"OBJECT  = ")
    card = Card("OBJECT", f"Tessaly {k:05d}", "synthetic star").image.encode()
    assert len(card) == 80
    return raw[:i] + card + raw[i + 80:]


def make_big_archive(base: Path, n: int) -> Path:
    """The base frames plus byte-distinct copies up to n files, cached."""
    root = DATA / f"{base.name}_x{n}"
    done = root / ".complete"
    if done.exists():
        return root
    originals = sorted(base.rglob("*.fits"))
    for k in range(n):
        src = originals[k % len(originals)]
        sub = root / f"c{k // len(originals):02d}" / src.parent.name
        sub.mkdir(parents=True, exist_ok=True)
        dst = sub / src.name
        if dst.exists():
            continue
        if k < len(originals):
            shutil.copyfile(src, dst)
        else:
            dst.write_bytes(_retitle(src.read_bytes(), k))
    done.write_text("ok")
    return root


def _sample_tree(proc, stop_when, interval=0.1):
    """Peak RSS (bytes) of the driver and of its largest descendant, until ``stop_when()``."""
    import psutil

    drv = psutil.Process(proc.pid)
    peak_driver = peak_worker = 0
    workers = {}
    while not stop_when():
        try:
            peak_driver = max(peak_driver, drv.memory_info().rss)
            for c in drv.children(recursive=True):
                workers[c.pid] = c
        except psutil.Error:
            pass
        for pid, c in list(workers.items()):
            try:
                peak_worker = max(peak_worker, c.memory_info().rss)
            except psutil.Error:
                workers.pop(pid)
        time.sleep(interval)
    return peak_driver, peak_worker


def _peak_of(pids):
    import psutil

    out = 0
    for pid in pids:
        try:
            p = psutil.Process(pid)
            out = max(out, p.memory_info().rss, *(c.memory_info().rss for c in p.children(recursive=True)))
        except psutil.Error:
            pass
    return out


def _steady_rate(store: Path) -> float | None:
    con = sqlite3.connect(store)
    stamps = [r[0] for r in con.execute("SELECT measured_utc FROM files ORDER BY measured_utc")]
    con.close()
    if len(stamps) < 2:
        return None
    ts = [dt.datetime.strptime(s, "%Y-%m-%dT%H:%M:%S.%fZ") for s in stamps]
    first = ts[0]
    after = [t for t in ts if t > first]
    span = (ts[-1] - first).total_seconds()
    return len(after) / span if span > 0 else None


def run_ingest(archive: Path, store: Path, workers: int | None = None, scheduler: str | None = None,
               extra_pids=()) -> dict:
    for suffix in ("", "-wal", "-shm", ".lock"):
        Path(f"{store}{suffix}").unlink(missing_ok=True)
    cfg = store.with_suffix(".toml")
    cfg.write_text("[ingest]\ncommit_every_files = 50\n")
    cmd = [sys.executable, "-m", "pipeline", "ingest", str(archive), "--store", str(store), "--config", str(cfg)]
    cmd += ["--scheduler", scheduler] if scheduler else ["--workers", str(workers)]
    return _timed(cmd, store, extra_pids)


def _timed(cmd, store, extra_pids=()):
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    extra_peak = [0]

    def finished():
        if extra_pids:
            extra_peak[0] = max(extra_peak[0], _peak_of(extra_pids))
        return proc.poll() is not None

    peak_driver, peak_worker = _sample_tree(proc, finished)
    out, err = proc.communicate()
    wall = time.perf_counter() - t0
    con = sqlite3.connect(store)
    n = con.execute("SELECT COUNT(*) FROM files").fetchone()[0]
    con.close()
    return {"command": " ".join(cmd[2:]), "exit_code": proc.returncode, "summary": out.strip(), "frames": n,
            "wall_s": wall, "end_to_end_frames_per_s": n / wall, "steady_frames_per_s": _steady_rate(store),
            "driver_peak_rss_mb": peak_driver / 2**20,
            "worker_peak_rss_mb": max(peak_worker, extra_peak[0]) / 2**20, "stderr_tail": err.strip()[-300:]}


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _warm_worker():
    from pipeline.batch import _warm_up

    _warm_up()


def run_dask(archive: Path, store: Path) -> dict:
    dask_cmd = os.path.join(os.path.dirname(sys.executable), "dask")
    port = _free_port()
    addr = f"tcp://127.0.0.1:{port}"
    kw = dict(stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True, cwd=str(DATA))
    procs = [subprocess.Popen([dask_cmd, "scheduler", "--host", "127.0.0.1", "--port", str(port),
                               "--no-dashboard"], **kw)]
    try:
        procs += [subprocess.Popen([dask_cmd, "worker", addr, "--nworkers", "1", "--nthreads", "1",
                                    "--no-dashboard"], **kw) for _ in range(2)]
        from distributed import Client

        with Client(addr, timeout="60s") as c:
            c.wait_for_workers(2, timeout=120)
            # warm the workers (imports) so the rate compares with warm local workers
            c.run(_warm_worker)
        return run_ingest(archive, store, scheduler=addr, extra_pids=[p.pid for p in procs[1:]])
    finally:
        for p in procs:
            if p.poll() is None:
                os.killpg(p.pid, signal.SIGTERM)
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(p.pid, signal.SIGKILL)
                p.wait()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--frames", type=int, default=1000)
    ap.add_argument("--big", type=int, default=10000)
    ap.add_argument("--size", type=int, default=128)
    ap.add_argument("--repeat", type=int, default=3,
                    help="1- and 2-worker runs alternate this many times; the best steady rate of each is kept "
                         "(single runs on a shared 2-core VM vary by tens of per cent)")
    args = ap.parse_args(argv)
    RESULTS.mkdir(parents=True, exist_ok=True)
    work = DATA / "ingest_stores"
    work.mkdir(parents=True, exist_ok=True)

    t0 = time.perf_counter()
    archive = make_archive(args.frames, args.size)
    big = make_big_archive(archive, args.big) if args.big else None
    print(f"archives ready in {time.perf_counter() - t0:.0f} s", file=sys.stderr)

    runs = {}
    trials = {"local_1_worker": [], "local_2_workers": []}
    for k in range(max(1, args.repeat)):  # alternate so slow spells of the machine hit both alike
        trials["local_1_worker"].append(run_ingest(archive, work / f"w1_{k}.db", workers=1))
        trials["local_2_workers"].append(run_ingest(archive, work / f"w2_{k}.db", workers=2))
    best = {}
    for name, rs in trials.items():
        k = max(range(len(rs)), key=lambda i: rs[i]["steady_frames_per_s"] or 0.0)
        runs[name] = dict(rs[k], all_steady_frames_per_s=[r["steady_frames_per_s"] for r in rs])
        best[name] = k
    shutil.copyfile(work / f"w2_{best['local_2_workers']}.db", work / "w2.db")
    runs["rerun_nothing_new"] = _timed([sys.executable, "-m", "pipeline", "ingest", str(archive), "--store",
                                        str(work / "w2.db"), "--workers", "2"], work / "w2.db")
    runs["dask_2_workers"] = run_dask(archive, work / "dask.db")
    if big:
        runs[f"local_2_workers_{args.big}"] = run_ingest(big, work / "big.db", workers=2)

    def ratio(a, b, key):
        x, y = runs[a].get(key), runs[b].get(key)
        return None if not x or not y else x / y

    result = {
        "machine": {"cpus": os.cpu_count(), "python": sys.version.split()[0]},
        "archive": {"frames": args.frames, "size_px": args.size, "compression": "RICE_1",
                    "big_frames": args.big},
        "runs": runs,
        "speedup_2_vs_1_steady": ratio("local_2_workers", "local_1_worker", "steady_frames_per_s"),
        "speedup_2_vs_1_end_to_end": ratio("local_2_workers", "local_1_worker", "end_to_end_frames_per_s"),
        "dask_vs_local_2_steady": ratio("dask_2_workers", "local_2_workers", "steady_frames_per_s"),
        "rerun_fraction_of_first": runs["rerun_nothing_new"]["wall_s"] / runs["local_2_workers"]["wall_s"],
    }
    if big:
        b = runs[f"local_2_workers_{args.big}"]
        s = runs["local_2_workers"]
        result["driver_rss_ratio_big_vs_small"] = b["driver_peak_rss_mb"] / s["driver_peak_rss_mb"]
        result["worker_rss_ratio_big_vs_small"] = b["worker_peak_rss_mb"] / s["worker_peak_rss_mb"]
    (RESULTS / "ingest.json").write_text(json.dumps(result, indent=1) + "\n")

    print(f"{'run':28s} {'frames':>7s} {'wall s':>8s} {'e2e f/s':>8s} {'steady f/s':>10s} "
          f"{'driver MB':>9s} {'worker MB':>9s}")
    for name, r in runs.items():
        steady = r["steady_frames_per_s"]
        print(f"{name:28s} {r['frames']:7d} {r['wall_s']:8.1f} {r['end_to_end_frames_per_s']:8.1f} "
              f"{'-' if steady is None else f'{steady:.1f}':>10s} {r['driver_peak_rss_mb']:9.0f} "
              f"{r['worker_peak_rss_mb']:9.0f}")
    for k, v in result.items():
        if isinstance(v, float):
            print(f"{k}: {v:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
