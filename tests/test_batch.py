"""Archive ingest: scanning, content identity, hostile files, configuration changes, dask, kill-and-resume."""

from __future__ import annotations

import os
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import time

import pytest

from pipeline.batch import DEFAULT_PATTERNS, IngestError, IngestSettings, ingest, scan_paths
from pipeline.config import ConfigError, MeasureSettings
from pipeline.measure import JSON_KEYS, measure_file
from pipeline.store import open_store
from tests._ingest_archive import HOSTILE_REASONS, good_archive, hostile_files, write_good

TWO = IngestSettings(workers=2, measure_chunk_files=2, hash_chunk_files=8)


def _ingest(paths, store_path, measure=None, settings=TWO, **kw):
    with open_store(store_path, "a") as st:
        return ingest([str(p) for p in paths], st, measure, settings, **kw)


def _rows(store_path, status="ok"):
    """Export rows without the bookkeeping that differs between runs (when measured)."""
    with open_store(store_path) as st:
        return [{k: v for k, v in r.items() if k != "measured_utc"} for r in st.rows(status)]


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    root = tmp_path_factory.mktemp("archive")
    good = good_archive(root, 12)
    bad = hostile_files(root / "bad")
    return root, good, bad


# --- settings and scanning -------------------------------------------------------------------------

@pytest.mark.parametrize("kw, match", [
    ({"workers": -1}, r"ingest.workers: got -1; allowed range is \[0, 4096\]"),
    ({"commit_every_s": 0}, r"ingest.commit_every_s: got 0"),
    ({"patterns": []}, r"ingest.patterns: got \[\]; expected a non-empty list"),
    ({"measure_chunk_files": 1.5}, r"ingest.measure_chunk_files: got 1.5; expected a whole number"),
])
def test_settings_validated(kw, match):
    with pytest.raises(ConfigError, match=match):
        IngestSettings(**kw)


def test_settings_defaults_and_config_section(tmp_path):
    from pipeline.config import load_config

    assert IngestSettings().worker_count == os.cpu_count()
    cfg = tmp_path / "c.toml"
    cfg.write_text('[ingest]\nworkers = 3\npatterns = ["*.fz"]\n')
    got = load_config(cfg).ingest
    assert (got.workers, got.patterns) == (3, ("*.fz",))


def test_scan_recurses_filters_and_expands_globs(tmp_path):
    (tmp_path / "a" / "b").mkdir(parents=True)
    names = ["a/x.fits", "a/b/y.fits.gz", "a/b/z.fts", "a/w.fit", "a/notes.txt", "a/b/q.fits.fz", "top.dat"]
    for n in names:
        (tmp_path / n).write_bytes(b"")
    got = list(scan_paths([tmp_path / "a"]))
    want = sorted(str(tmp_path / n) for n in names if n.startswith("a/") and not n.endswith(".txt"))
    assert sorted(got) == want and len(got) == 5
    assert DEFAULT_PATTERNS == ("*.fits*", "*.fts", "*.fit")
    # files named directly are taken whatever their name; a glob is expanded (recursive **)
    assert list(scan_paths([tmp_path / "top.dat"])) == [str(tmp_path / "top.dat")]
    assert sorted(scan_paths([str(tmp_path / "**" / "*.fts")])) == [str(tmp_path / "a/b/z.fts")]
    assert list(scan_paths([tmp_path / "a"], ["*.fz"])) == [str(tmp_path / "a/b/q.fits.fz")]
    with pytest.raises(IngestError, match="no such file or directory"):
        scan_paths([tmp_path / "missing"])


# --- ingest --------------------------------------------------------------------------------------

def test_mixed_archive_good_measured_bad_recorded(archive, tmp_path):
    """Good files are measured exactly as measure_file does (another route); each bad one is kept with its reason."""
    root, good, bad = archive
    s = _ingest([root], tmp_path / "s")
    assert (s.new_ok, s.new_skipped, s.known, s.exit_code) == (12, 7, 0, 1)
    assert sum(s.skip_reasons.values()) == 7
    rows = _rows(tmp_path / "s")
    assert len(rows) == 12
    by_file = {r["file"]: r for r in rows}
    for p in good:
        direct = measure_file(p).to_json()
        assert {k: by_file[str(p)][k] for k in JSON_KEYS} == direct
    skipped = {os.path.basename(r["file"]): r["reason"] for r in _rows(tmp_path / "s", "skipped")}
    assert set(skipped) == set(HOSTILE_REASONS)
    for name, pattern in HOSTILE_REASONS.items():
        assert pattern in skipped[name] and "\n" not in skipped[name], (name, skipped[name])
    assert "ingest: 19 new (12 ok, 7 skipped: " in s.line() and s.line().endswith(", 0 already known")


def test_rerun_hashes_nothing_and_renamed_file_is_not_measured_again(archive, tmp_path):
    root, good, _ = archive
    arch = tmp_path / "arch"
    shutil.copytree(root, arch, copy_function=shutil.copy2)
    store = tmp_path / "s"
    _ingest([arch], store)
    before = {r["digest"]: r for r in _rows(store)}
    again = _ingest([arch], store)
    assert (again.new, again.hashed, again.known) == (0, 0, 19)  # stat cache: no file read at all
    src = arch / "kvm_0000.fits"
    dst = arch / "deep" / "renamed.fits"
    src.rename(dst)
    os.utime(arch / "kvm_0002.fits")  # touched: same bytes, new mtime
    s = _ingest([arch], store)
    assert (s.new, s.hashed, s.known, s.exit_code) == (0, 2, 19, 0)
    after = {r["digest"]: r for r in _rows(store)}
    assert after.keys() == before.keys()
    moved = [d for d in after if after[d]["file"] != before[d]["file"]]
    assert len(moved) == 1 and after[moved[0]]["file"] == str(dst)
    with open_store(store) as st:  # measured once: the measurement time did not change
        times = {r["digest"]: r["measured_utc"] for r in st.rows()}
    first = sqlite3.connect(store).execute("SELECT measured_utc FROM files WHERE digest=?", (moved[0],)).fetchone()
    assert times[moved[0]] == first[0]


def test_changed_file_is_measured_again(archive, tmp_path):
    root, good, _ = archive
    arch = tmp_path / "arch"
    arch.mkdir()
    paths = [shutil.copy2(p, arch / p.name) for p in good[:4]]
    store = tmp_path / "s"
    _ingest([arch], store)
    write_good(arch / good[0].name, 40)  # new content at the same path
    s = _ingest([arch], store)
    assert (s.new_ok, s.known) == (1, 3)
    rows = {r["file"]: r for r in _rows(store)}
    assert len(rows) == 4
    assert {k: rows[str(paths[0])][k] for k in JSON_KEYS} == measure_file(paths[0]).to_json()
    with open_store(store) as st:
        assert st.summary()["superseded"] == 1


def test_identical_copies_are_one_content(archive, tmp_path):
    root, good, _ = archive
    arch = tmp_path / "arch"
    arch.mkdir()
    for name in ("a.fits", "b.fits", "c.fits"):
        shutil.copy(good[3], arch / name)
    s = _ingest([arch], tmp_path / "s")
    assert (s.new_ok, s.known) == (1, 2)
    assert [r["file"] for r in _rows(tmp_path / "s")] == [str(arch / "a.fits")]


def test_changed_configuration_detected_and_remeasured(archive, tmp_path):
    root, good, _ = archive
    store = tmp_path / "s"
    _ingest(good[:5], store)
    seventy = MeasureSettings(cap_latitude_deg=70.0)
    # wording of the refusal: our own (regression only); it names both values and the fix
    with pytest.raises(IngestError, match=r"5 records measured under other settings than those in force \(5 with "
                                          r"measure.cap_latitude_deg 60.0 \(records\) vs 70.0 \(in force\)\)"
                                          r".*--remeasure"):
        _ingest(good[:5], store, seventy)
    s = _ingest(good[:4], store, seventy, remeasure=True)
    assert (s.new_ok, s.remeasured, s.stale_config) == (4, 4, 1)
    rows = {r["file"]: r for r in _rows(store)}
    for p in good[:4]:
        assert {k: rows[str(p)][k] for k in JSON_KEYS} == measure_file(p, seventy).to_json()
        assert rows[str(p)]["cap_latitude_deg"] == 70.0
    assert rows[str(good[4])]["cap_latitude_deg"] == 60.0


def test_missing_path_refused_before_work(tmp_path):
    with pytest.raises(IngestError, match="no such file or directory"):
        _ingest([tmp_path / "nope"], tmp_path / "s")


# --- local and distributed agree ------------------------------------------------------------------

def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _stop(procs):
    for p in procs:
        if p.poll() is None:
            os.killpg(p.pid, signal.SIGTERM)
    deadline = time.monotonic() + 15
    for p in procs:
        try:
            p.wait(timeout=max(0.1, deadline - time.monotonic()))
        except subprocess.TimeoutExpired:
            os.killpg(p.pid, signal.SIGKILL)
            p.wait()


def test_local_and_distributed_runs_agree(archive, tmp_path):
    """A real `dask scheduler` and two `dask worker` processes on 127.0.0.1 give the same rows as local workers."""
    dask_cmd = shutil.which("dask") or os.path.join(os.path.dirname(sys.executable), "dask")
    if not os.path.exists(dask_cmd):
        pytest.skip("the `dask` command (dask/distributed) is not installed")
    root, _, _ = archive
    port = _free_port()
    addr = f"tcp://127.0.0.1:{port}"
    env = dict(os.environ, DASK_DISTRIBUTED__WORKER__DAEMON="False")
    common = dict(stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True, env=env,
                  cwd=str(tmp_path))
    procs = [subprocess.Popen([dask_cmd, "scheduler", "--host", "127.0.0.1", "--port", str(port),
                               "--no-dashboard"], **common)]
    try:
        procs += [subprocess.Popen([dask_cmd, "worker", addr, "--nworkers", "1", "--nthreads", "1",
                                    "--no-dashboard", "--local-directory", str(tmp_path / f"w{i}")], **common)
                  for i in range(2)]
        from distributed import Client

        with Client(addr, timeout="60s") as c:
            c.wait_for_workers(2, timeout=90)
        dist = _ingest([root], tmp_path / "dist", settings=IngestSettings(measure_chunk_files=2),
                       scheduler=addr)
    finally:
        _stop(procs)
    local = _ingest([root], tmp_path / "local")
    assert (dist.new_ok, dist.new_skipped) == (local.new_ok, local.new_skipped) == (12, 7)
    strip = ("config_id",)
    for status in ("ok", "skipped"):
        a = [{k: v for k, v in r.items() if k not in strip} for r in _rows(tmp_path / "dist", status)]
        b = [{k: v for k, v in r.items() if k not in strip} for r in _rows(tmp_path / "local", status)]
        assert a == b


# --- kill and resume ------------------------------------------------------------------------------

def _count(store) -> int:
    try:
        con = sqlite3.connect(f"file:{store}?mode=ro", uri=True, timeout=1)
        try:
            return con.execute("SELECT COUNT(*) FROM files").fetchone()[0]
        finally:
            con.close()
    except sqlite3.Error:
        return 0


def test_sigkill_then_resume_equals_uninterrupted(tmp_path):
    """SIGKILL the whole ingest (driver and workers) after some commits; a re-run ends with exactly the rows
    of an uninterrupted ingest: no loss, no duplicates (SQLite transactions are atomic: sqlite.org/atomiccommit)."""
    arch = tmp_path / "arch"
    good_archive(arch, 48)
    hostile_files(arch / "bad")
    cfg = tmp_path / "c.toml"
    cfg.write_text("[ingest]\nworkers = 1\nmeasure_chunk_files = 1\ncommit_every_files = 3\n")
    killed = tmp_path / "killed"
    proc = subprocess.Popen([sys.executable, "-m", "pipeline", "ingest", str(arch), "--store", str(killed),
                             "--config", str(cfg)], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            start_new_session=True)
    try:
        deadline = time.monotonic() + 120
        while _count(killed) < 6 and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.01)
        os.killpg(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
    at_kill = _count(killed)
    assert 6 <= at_kill < 55, f"the kill came too late ({at_kill} rows): the test did not interrupt anything"
    resumed = _ingest([arch], killed)
    assert resumed.known == at_kill and resumed.new == 55 - at_kill
    _ingest([arch], tmp_path / "whole")
    for status in ("ok", "skipped"):
        a, b = _rows(killed, status), _rows(tmp_path / "whole", status)
        assert a == b and len({r["digest"] for r in a}) == len(a)
    assert len(_rows(killed)) == 48
