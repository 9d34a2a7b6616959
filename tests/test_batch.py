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

from pipeline.batch import (CHANGED_WHILE_READ, DEFAULT_PATTERNS, IngestError, IngestSettings, IngestSummary,
                            hash_files, ingest, measure_files, scan_paths)
from pipeline.config import ConfigError, MeasureSettings
from pipeline.measure import JSON_KEYS, MEASUREMENT_VERSION, measure_file
from pipeline.store import file_digest, open_store
from tests._ingest_archive import (HOSTILE_REASONS, committed_rows, faulty_settings, good_archive, hostile_files,
                                   write_good)

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


# --- errors versus bad input, worker failures (issue 17) ---------------------------------------------
# The rules are the project's own (issue 17: bad input is permanent and carries its reason; errors are retried
# on the next run and counted; a file that crashes a worker is isolated and retried; a file that changed while
# it was read is caught).  Reason wording: regression only.

def _reported():
    seen = []
    return seen, lambda path, reason: seen.append((os.path.basename(path), reason))


def _small(archive_dir, n):
    root, good, _ = archive_dir
    return good[:n]


def test_errors_are_counted_not_stored_and_retried(archive, tmp_path):
    """An unexpected exception (RuntimeError) or MemoryError inside a worker process is an error, not a skip."""
    files = _small(archive, 4)
    store = tmp_path / "s"
    faults = faulty_settings({files[1].name: "runtime", files[2].name: "memory"})
    skipped, on_skip = _reported()
    errors, on_error = _reported()
    s = _ingest(files, store, faults, on_skip=on_skip, on_error=on_error)
    assert (s.new_ok, s.new_skipped, s.errors, s.unreadable, s.exit_code) == (2, 0, 2, 0, 1)
    assert s.error_reasons == {"unexpected RuntimeError while measuring": 1, "out of memory while measuring": 1}
    assert skipped == [] and sorted(errors) == sorted([
        (files[1].name, "unexpected RuntimeError while measuring: injected fault"),
        (files[2].name, "out of memory while measuring")])
    # ties are listed alphabetically, whichever worker finished first
    assert s.line().endswith(", 0 already known, 2 errors (1 out of memory while measuring, 1 unexpected "
                             "RuntimeError while measuring; not stored, tried again next run)")
    with open_store(store) as st:
        assert (st.count("ok"), st.count("skipped")) == (2, 0)  # nothing permanent about an error
    again = _ingest(files, store)  # the cause is gone: the two files are measured now
    assert (again.new_ok, again.known, again.errors, again.exit_code) == (2, 2, 0, 0)
    rows = {os.path.basename(r["file"]): r for r in _rows(store)}
    assert {k: rows[files[1].name][k] for k in JSON_KEYS} == measure_file(files[1]).to_json()


def test_a_file_that_kills_its_worker_is_isolated_and_retried(archive, tmp_path):
    """os._exit in the worker for one file: the files sharing its task are stored, it is not, and is tried
    again by the next run."""
    files = _small(archive, 6)
    store = tmp_path / "s"
    three = IngestSettings(workers=2, measure_chunk_files=3, hash_chunk_files=8)
    errors, on_error = _reported()
    s = _ingest(files, store, faulty_settings({files[1].name: "exit"}), three, on_error=on_error)
    assert (s.new_ok, s.errors, s.exit_code) == (5, 1, 1)
    assert len(errors) == 1 and errors[0][0] == files[1].name
    assert errors[0][1].startswith("worker process died while measuring it (BrokenProcessPool")
    assert s.error_reasons == {"worker process died while measuring it": 1}
    stored = {os.path.basename(r["file"]) for r in _rows(store)}
    assert stored == {p.name for p in files} - {files[1].name}
    again = _ingest(files, store, settings=three)
    assert (again.new_ok, again.known, again.errors) == (1, 5, 0)
    assert len(_rows(store)) == 6


def test_several_killers_and_copies_of_one(archive, tmp_path):
    """Two killers in one task, one of them also at a second path: each is an error, every other file stored."""
    root, good, _ = archive
    arch = tmp_path / "arch"
    arch.mkdir()
    for p in good[:5]:
        shutil.copy2(p, arch / p.name)
    shutil.copy2(good[3], arch / "zz_copy_of_3.fits")  # same bytes: joins the measurement of kvm_0003
    one = IngestSettings(workers=1, measure_chunk_files=4, hash_chunk_files=16)
    s = _ingest([arch], tmp_path / "s", faulty_settings({good[1].name: "exit", good[3].name: "exit"}), one)
    assert (s.new_ok, s.errors, s.known) == (3, 3, 0)  # the copy shares its content's outcome
    assert {os.path.basename(r["file"]) for r in _rows(tmp_path / "s")} == {good[0].name, good[2].name,
                                                                             good[4].name}


def test_file_replaced_between_hashing_and_measuring_is_hashed_again(archive, tmp_path):
    """The digest stored names the bytes that were measured (in-process worker function)."""
    p = tmp_path / "f.fits"
    shutil.copy2(archive[1][0], p)
    [(path, size, mtime_ns, digest, err)] = hash_files([str(p)])
    write_good(p, 41)
    os.utime(p, ns=(mtime_ns + 5_000_000_000, mtime_ns + 5_000_000_000))
    [r] = measure_files([(path, size, mtime_ns, digest)], MeasureSettings())
    assert err is None and r.digest == file_digest(p) != digest
    assert (r.size, r.mtime_ns) == (p.stat().st_size, p.stat().st_mtime_ns)
    assert r.record == measure_file(p).to_dict() and r.measure_version == MEASUREMENT_VERSION


def test_file_changed_while_it_was_read_is_not_stored(archive, tmp_path):
    """A file replaced by other bytes after the reader read it (inside the worker): its record would describe
    bytes that no digest names, so it is not stored; the next run measures what is there."""
    files = _small(archive, 3)
    arch = tmp_path / "arch"
    arch.mkdir()
    for p in files:
        shutil.copy2(p, arch / p.name)
    target = arch / files[1].name
    new = write_good(tmp_path / "new.fits", 42)
    os.utime(new, ns=(1_900_000_000_000_000_000,) * 2)  # another mtime than the file it replaces
    store = tmp_path / "s"
    errors, on_error = _reported()
    s = _ingest([arch], store, faulty_settings({target.name: ("replace", str(new))}), on_error=on_error)
    assert (s.new_ok, s.unreadable, s.errors, s.exit_code) == (2, 1, 0, 1)
    assert errors == [(target.name, CHANGED_WHILE_READ)] and s.unreadable_reasons == {CHANGED_WHILE_READ: 1}
    assert "1 not stored (1 file changed while it was read; tried again next run)" in s.line()
    again = _ingest([arch], store)
    assert (again.new_ok, again.known) == (1, 2)
    rows = {os.path.basename(r["file"]): r for r in _rows(store)}
    assert {k: rows[target.name][k] for k in JSON_KEYS} == measure_file(target).to_json()
    assert rows[target.name]["digest"] == file_digest(target)


def test_summary_exit_code_and_line_with_errors():
    # exit codes shared by every sub-command (pipeline.cli docstring): 1 = some input not measured
    s = IngestSummary(new_ok=3, errors=1)
    s.error_reasons["worker process died while measuring it"] += 1
    assert s.exit_code == 1
    assert s.line() == ("ingest: 3 new (3 ok, 0 skipped), 0 already known, 1 error (1 worker process died while "
                        "measuring it; not stored, tried again next run)")
    assert IngestSummary(new_ok=3).exit_code == 0


# --- measurement-code version (issue 17) -------------------------------------------------------------

def _set_version(store, version):
    con = sqlite3.connect(store)
    con.execute("UPDATE files SET measure_version = ?", (version,))
    con.commit()
    con.close()


def test_records_of_another_measurement_version_are_measured_again(archive, tmp_path):
    """A change of the measurement code's version re-measures, as a change of settings does (issue 17)."""
    files = _small(archive, 3)
    store = tmp_path / "s"
    _ingest(files, store)
    _set_version(store, MEASUREMENT_VERSION - 1)
    with pytest.raises(IngestError, match=rf"3 records measured under other settings than those in force \(3 with "
                                          rf"measurement code version {MEASUREMENT_VERSION - 1} \(records\) vs "
                                          rf"{MEASUREMENT_VERSION} \(in force\)\).*--remeasure"):
        _ingest(files, store)
    s = _ingest(files, store, remeasure=True)
    assert (s.new_ok, s.remeasured, s.known, s.stale_config) == (3, 3, 0, 0)
    with open_store(store) as st:
        assert st.summary()["measurement_versions"] == {MEASUREMENT_VERSION: 3}


def test_schema_1_store_needs_remeasure(archive, tmp_path):
    """Stores written before the version was kept: upgraded, their records' version unknown, so re-measured."""
    files = _small(archive, 2)
    store = tmp_path / "s"
    _ingest(files, store)
    con = sqlite3.connect(store)
    con.execute("ALTER TABLE files DROP COLUMN measure_version")
    con.execute("UPDATE meta SET value = '1' WHERE key = 'schema_version'")
    con.commit()
    con.close()
    with pytest.raises(IngestError, match=r"2 with measurement code version unknown \(records\) vs"):
        _ingest(files, store)
    s = _ingest(files, store, remeasure=True)
    assert (s.new_ok, s.remeasured) == (2, 2)


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
        while committed_rows(killed) < 6 and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.01)
        os.killpg(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
    at_kill = committed_rows(killed)
    assert 6 <= at_kill < 55, f"the kill came too late ({at_kill} rows): the test did not interrupt anything"
    resumed = _ingest([arch], killed)
    assert resumed.known == at_kill and resumed.new == 55 - at_kill
    _ingest([arch], tmp_path / "whole")
    for status in ("ok", "skipped"):
        a, b = _rows(killed, status), _rows(tmp_path / "whole", status)
        assert a == b and len({r["digest"] for r in a}) == len(a)
    assert len(_rows(killed)) == 48
