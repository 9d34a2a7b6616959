"""The ledger: digests, round trips, superseded contents, the writer lock, CSV and netCDF export."""

from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import signal
import sqlite3
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from pipeline.config import MeasureSettings
from pipeline.measure import JSON_KEYS, measure_file
from pipeline.measure import MEASUREMENT_VERSION
from pipeline.store import (EXTRA_COLUMNS, SCHEMA_VERSION, MeasuredFile, StoreError, StoreLockedError,
                            StoreSettingsError, check_measure_settings, config_id_of, export_csv, export_netcdf,
                            file_digest, open_store, reason_group, records_dataset, records_settings)
from tests._ingest_archive import good_archive, hostile_files, record_store


def _measured(path, settings=None):
    st = os.stat(path)
    rec = measure_file(path, settings or MeasureSettings())
    return MeasuredFile(str(path), st.st_size, st.st_mtime_ns, file_digest(path), rec.to_dict())


@pytest.fixture(scope="module")
def frames(tmp_path_factory):
    root = tmp_path_factory.mktemp("frames")
    good = good_archive(root, 6)
    bad = hostile_files(root / "bad")
    return good, bad


@pytest.fixture()
def filled(tmp_path, frames):
    good, bad = frames
    results = [_measured(p) for p in list(good) + [bad["text.fits"], bad["notime.fits"]]]
    path = tmp_path / "s.polecast"
    with open_store(path, "a") as st:
        cid = st.register_config(MeasureSettings())
        st.add(results, cid)
        st.commit()
    return path, results


def test_digest_is_blake2b_256_of_the_bytes(tmp_path):
    # BLAKE2b (RFC 7693) through Python's reference hashlib, on the bytes read in one piece
    p = tmp_path / "x.bin"
    data = os.urandom(3 * 1024 * 1024 + 17)  # spans several read buffers
    p.write_bytes(data)
    assert file_digest(p) == hashlib.blake2b(data, digest_size=32).hexdigest()


def test_records_round_trip_in_time_order(filled):
    """Stored records equal what measure_file returned (identity round trip), ordered by time."""
    path, results = filled
    with open_store(path) as st:
        got = list(st.iter_records())
        skipped = list(st.iter_records("skipped"))
    want = sorted((r for r in results if r.record["status"] == "ok"), key=lambda r: r.record["time"])
    assert [g.to_dict() for g in got] == [r.record for r in want]
    assert [g.time for g in got] == sorted(g.time for g in got)
    assert {s.reason.split(" (")[0] for s in skipped} == {"not a FITS file", "no observation time"}


def test_wal_journal_and_schema(filled):
    path, _ = filled
    # SQLite documentation, "Write-Ahead Logging": journal_mode reports 'wal' once set
    con = sqlite3.connect(path)
    assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert {"meta", "configs", "files", "paths"} <= tables
    row = con.execute("SELECT size, version, config_id FROM files LIMIT 1").fetchone()
    con.close()
    assert row[1] and row[2] == config_id_of(MeasureSettings())


def test_summary_counts(filled):
    path, results = filled
    with open_store(path) as st:
        s = st.summary()
    assert (s["ok"], s["skipped"], s["current"], s["superseded"]) == (6, 2, 8, 0)
    assert s["skip_reasons"] == {"not a FITS file": 1, "no observation time": 1}
    assert s["first_time"] == min(r.record["time"] for r in results if r.record["time"])


def test_changed_content_supersedes_old_record(tmp_path, frames):
    """A path with new content: the new record is current, the old one stays in the ledger, not exported."""
    good, _ = frames
    a, b = _measured(good[0]), _measured(good[1])
    b_at_a = MeasuredFile(a.path, b.size, b.mtime_ns, b.digest, dict(b.record, file=a.path))
    with open_store(tmp_path / "s", "a") as st:
        cid = st.register_config(MeasureSettings())
        st.add([a], cid)
        st.add([b_at_a], cid)
        st.commit()
        assert st.summary()["superseded"] == 1
        assert [r.north_br_gauss for r in st.iter_records()] == [b.record["north_br_gauss"]]


def test_rename_link_forgets_vanished_path(tmp_path, frames):
    good, _ = frames
    src = tmp_path / "a.fits"
    src.write_bytes(good[0].read_bytes())
    m = _measured(src)
    with open_store(tmp_path / "s", "a") as st:
        cid = st.register_config(MeasureSettings())
        st.add([m], cid)
        dst = tmp_path / "b.fits"
        src.rename(dst)
        st.link(str(dst), m.size, m.mtime_ns, m.digest)
        st.commit()
        assert [r.file for r in st.iter_records()] == [str(dst)]
        assert st.digest_for_stat(str(src), m.size, m.mtime_ns) is None
        assert st.digest_for_stat(str(dst), m.size, m.mtime_ns) == m.digest
        assert st.digest_for_stat(str(dst), m.size + 1, m.mtime_ns) is None


def test_second_writer_refused_readers_allowed(filled):
    path, _ = filled
    with open_store(path, "a"):
        with pytest.raises(StoreLockedError, match=rf"in use by another ingest \(pid {os.getpid()} "):
            open_store(path, "a")
        with open_store(path, "r") as reader:  # WAL readers need no lock
            assert reader.count() == 6
    with open_store(path, "a"):  # released on close
        pass


def test_lock_of_a_killed_process_does_not_block(tmp_path):
    """flock(2) locks go with the open file: the kernel drops them when the holder dies (Linux man page)."""
    path = tmp_path / "s.polecast"
    code = textwrap.dedent(f"""
        import sys, time
        from pipeline.store import open_store
        st = open_store({str(path)!r}, "a")
        print("locked", flush=True)
        time.sleep(120)
    """)
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "locked"
        with pytest.raises(StoreLockedError):
            open_store(path, "a")
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=20)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    with open_store(path, "a") as st:
        assert st.count() == 0


def test_open_errors(tmp_path):
    with pytest.raises(StoreError, match="no such file.*polecast ingest"):
        open_store(tmp_path / "absent", "r")
    with pytest.raises(ValueError, match="mode: got 'w'; valid modes are 'a', 'r'"):
        open_store(tmp_path / "x", "w")
    junk = tmp_path / "junk"
    junk.write_bytes(b"not a database at all" * 100)
    with pytest.raises(StoreError, match="not a polecast store"):
        open_store(junk, "a")
    with open_store(tmp_path / "ro", "a"):
        pass
    with open_store(tmp_path / "ro", "r") as st, pytest.raises(StoreError, match="read-only"):
        st.commit()


def test_reason_group():
    # the grouping rule of the ingest summary: text before the first '(' or ':' (our own convention)
    assert reason_group("truncated file: header declares 2880 bytes, file has 100") == "truncated file"
    assert reason_group("not a FITS file (no SIMPLE card at the start)") == "not a FITS file"
    assert reason_group(None) == "unknown"


def test_csv_export_columns_and_values(filled):
    """CSV read back with Python's csv module equals the records; the measure keys come first, in order."""
    path, results = filled
    buf = io.StringIO()
    with open_store(path) as st:
        n = export_csv(st, buf)
    rows = list(csv.DictReader(io.StringIO(buf.getvalue())))
    assert n == len(rows) == 6
    assert list(rows[0])[: len(JSON_KEYS)] == list(JSON_KEYS)
    assert list(rows[0])[len(JSON_KEYS):] == list(EXTRA_COLUMNS)
    by_digest = {r.digest: r.record for r in results}
    for row in rows:
        rec = by_digest[row["digest"]]
        assert row["time"] == rec["time"] and row["status"] == "ok"
        assert float(row["north_br_gauss"]) == rec["north_br_gauss"]  # repr round trip is exact
        assert int(row["south_pixels"]) == rec["south_pixels"]


def test_netcdf_export_opens_with_xarray_and_has_cf_attributes(filled, tmp_path):
    """The file opens with xarray; every variable has units (UDUNITS spelling, from memory) and long_name."""
    import xarray as xr

    path, results = filled
    out = tmp_path / "frames.nc"
    with open_store(path) as st:
        assert export_netcdf(st, out) == 6
    with xr.open_dataset(out) as ds:
        ds.load()
    assert ds.attrs["Conventions"].startswith("CF-")
    # CF conventions 1.10 section 4.4: a time coordinate with standard_name and axis
    assert ds["time"].attrs["standard_name"] == "time" and ds["time"].attrs["axis"] == "T"
    assert "since 1970-01-01" in ds["time"].encoding["units"]
    # CF section 7.1: a boundary variable takes its units from its coordinate, so it is left out here
    numeric = [v for v in ds.data_vars if ds[v].dtype.kind in "fi" and v != "latitude_bnds"]
    # every numeric `polecast measure` key (JSON_KEYS after file, status, reason, time) and the profile
    assert set(JSON_KEYS[4:]) | {"profile_br_gauss", "profile_area_m2"} <= set(numeric)
    for v in numeric:
        assert ds[v].attrs.get("units"), v
        assert ds[v].attrs.get("long_name"), v
    assert ds["north_br_gauss"].attrs["units"] == "gauss"
    assert ds["north_flux_mx"].attrs["units"] == "maxwell"
    # CF section 7.1: the bounds variable named by the coordinate's 'bounds' attribute
    assert ds["latitude"].attrs["bounds"] == "latitude_bnds"
    want = sorted((r.record for r in results if r.record["status"] == "ok"), key=lambda d: d["time"])
    edges = np.asarray(want[0]["profile_edges_deg"])
    np.testing.assert_array_equal(ds["latitude_bnds"].values, np.stack([edges[:-1], edges[1:]], axis=1))
    np.testing.assert_array_equal(ds["north_br_gauss"].values, [d["north_br_gauss"] for d in want])
    np.testing.assert_array_equal(ds["time"].values, np.array([d["time"].rstrip("Z") for d in want],
                                                              dtype="datetime64[ns]"))
    prof = np.array([[np.nan if v is None else v for v in d["profile_br_gauss"]] for d in want])
    np.testing.assert_array_equal(ds["profile_br_gauss"].values, prof)


def test_records_dataset_of_empty_store(tmp_path):
    with open_store(tmp_path / "s", "a"):
        pass
    with open_store(tmp_path / "s") as st:
        ds = records_dataset(st)
    assert ds.sizes["time"] == 0 and "north_br_gauss" in ds


# --- the settings of the records (issue 17) --------------------------------------------------------
# The rule checked here is the project's own (issue 17: "every command that reads a store uses only records
# measured under the measurement settings in force"); the wording of the messages is regression only.

SIXTY, SEVENTY = MeasureSettings(), MeasureSettings(cap_latitude_deg=70.0)


def _one_line(exc) -> str:
    text = str(exc.value)
    assert "\n" not in text
    return text


def test_a_whole_number_and_its_float_are_one_configuration():
    # TOML (toml.io 1.0) reads `70` as an integer and `70.0` as a float: the same setting, one configuration
    assert config_id_of(MeasureSettings(cap_latitude_deg=70)) == config_id_of(SEVENTY)
    assert config_id_of(SEVENTY) != config_id_of(SIXTY)


def test_empty_store_passes_every_check(tmp_path):
    with open_store(tmp_path / "s", "a"):
        pass
    with open_store(tmp_path / "s") as st:
        assert records_settings(st) == MeasureSettings()   # no records: no settings of its own, the defaults
        assert check_measure_settings(st, None) == MeasureSettings()
        assert check_measure_settings(st, SEVENTY) == SEVENTY
        assert list(st.iter_records(measure=SEVENTY)) == []


def test_records_settings_are_those_the_records_were_measured_under(tmp_path):
    path = record_store(tmp_path / "s", SEVENTY, n=5)
    with open_store(path) as st:
        got = records_settings(st)
        assert got == SEVENTY and got.cap_latitude_deg == 70.0
        assert check_measure_settings(st, None) == SEVENTY        # no configuration: the store's own
        assert check_measure_settings(st, SEVENTY) == SEVENTY
        assert len(list(st.iter_records(measure=SEVENTY))) == 5
        with pytest.raises(StoreSettingsError) as exc:
            check_measure_settings(st, SIXTY)                     # a configuration that differs is refused
    text = _one_line(exc)
    assert "5 with measure.cap_latitude_deg 70.0 (records) vs 60.0 (in force)" in text
    assert "--remeasure" in text and "leave out --config" in text and str(path) in text


def test_mixed_settings_are_named_and_filtered(tmp_path):
    path = record_store(tmp_path / "s", SIXTY, n=6)
    record_store(path, SEVENTY, n=3, start=6)
    with open_store(path) as st:
        with pytest.raises(StoreSettingsError) as exc:
            records_settings(st)
        several = _one_line(exc)
        with pytest.raises(StoreSettingsError) as exc:
            check_measure_settings(st, None)
        assert str(exc.value) == several
        with pytest.raises(StoreSettingsError) as exc:
            check_measure_settings(st, SEVENTY)
        against_70 = _one_line(exc)
        # after the caller checked, iter_records(measure=...) yields only that configuration's records
        assert [r.cap_latitude_deg for r in st.iter_records(measure=SEVENTY)] == [70.0] * 3
        assert [r.cap_latitude_deg for r in st.iter_records(measure=SIXTY)] == [60.0] * 6
        assert len(list(st.iter_records())) == 9                   # no settings given: every record
        assert st.count("ok", SEVENTY) == 3 and st.settings_groups() == {
            (config_id_of(SIXTY), MEASUREMENT_VERSION): 6, (config_id_of(SEVENTY), MEASUREMENT_VERSION): 3}
    assert f"6 with configuration {config_id_of(SIXTY)}" in several
    assert f"3 with configuration {config_id_of(SEVENTY)} (measure.cap_latitude_deg 70.0)" in several
    assert "6 with measure.cap_latitude_deg 60.0 (records) vs 70.0 (in force)" in against_70
    assert "holds 6 records measured under other settings" in against_70


def test_records_of_another_measurement_version_are_refused(tmp_path):
    old = MEASUREMENT_VERSION - 1
    path = record_store(tmp_path / "s", SIXTY, n=4, measure_version=old)
    with open_store(path) as st:
        for measure in (None, SIXTY):
            with pytest.raises(StoreSettingsError) as exc:
                check_measure_settings(st, measure)
            assert f"4 with measurement code version {old} (records) vs {MEASUREMENT_VERSION} (in force)" \
                in _one_line(exc)
        assert list(st.iter_records(measure=SIXTY)) == []          # not this code's records
        assert st.summary()["measurement_versions"] == {old: 4}
        assert [r["measurement_version"] for r in st.rows()] == [old] * 4


def test_settings_this_polecast_cannot_rebuild_are_refused(tmp_path):
    path = record_store(tmp_path / "s", SIXTY, n=2)
    con = sqlite3.connect(path)
    stored = dict(json.loads(con.execute("SELECT settings FROM configs").fetchone()[0]))
    cid = config_id_of(SIXTY)
    con.execute("UPDATE configs SET settings = ? WHERE config_id = ?", (json.dumps(dict(stored, old_key=1)), cid))
    con.commit()
    with open_store(path) as st, pytest.raises(StoreSettingsError) as exc:
        records_settings(st)
    assert "settings this polecast cannot use" in _one_line(exc) and "old_key" in str(exc.value)
    # records made before a key (here hdu) was added to MeasureSettings: filling its default would be a guess
    del stored["hdu"]
    old = config_id_of(stored)
    con.execute("UPDATE configs SET settings = ?, config_id = ? WHERE config_id = ?", (json.dumps(stored), old, cid))
    con.execute("UPDATE files SET config_id = ?", (old,))
    con.commit()
    con.close()
    with open_store(path) as st, pytest.raises(StoreSettingsError) as exc:
        records_settings(st)
    assert "measure.hdu absent (records) vs None (in force)" in _one_line(exc)


def _as_schema_1(path):
    """Turn a store into the schema-1 layout (no measurement version), as stores written before it looked."""
    con = sqlite3.connect(path)
    con.execute("ALTER TABLE files DROP COLUMN measure_version")  # SQLite >= 3.35
    con.execute("UPDATE meta SET value = '1' WHERE key = 'schema_version'")
    con.commit()
    con.close()


def test_schema_1_store_read_with_unknown_version_and_upgraded_on_write(tmp_path):
    path = record_store(tmp_path / "s", SIXTY, n=3)
    _as_schema_1(path)
    with open_store(path) as st:  # read-only: read as is, the version unknown
        assert st.summary()["measurement_versions"] == {None: 3}
        with pytest.raises(StoreSettingsError) as exc:
            check_measure_settings(st, None)
        assert "3 with measurement code version unknown (records) vs" in _one_line(exc)
        # the values record_store wrote: 6 sin(2 pi (t - 2033) / 22) G at t = 2030, 2030.04, 2030.08
        want = [6.0 * np.sin(2 * np.pi * (2030.0 + 0.04 * k - 2033.0) / 22.0) for k in range(3)]
        assert [r.north_br_gauss for r in st.iter_records()] == pytest.approx(want, rel=1e-12)
    with open_store(path, "a"):  # a writer upgrades the schema, keeping the records with NULL
        pass
    con = sqlite3.connect(path)
    assert con.execute("SELECT value FROM meta WHERE key='schema_version'").fetchone()[0] == str(SCHEMA_VERSION)
    assert con.execute("SELECT COUNT(*), COUNT(measure_version) FROM files").fetchone() == (3, 0)
    con.close()


def test_error_records_are_not_stored(tmp_path):
    """An error is not a result (issue 17): the store refuses to keep one, so the file is tried again."""
    rec = {"file": "a.fits", "status": "error", "reason": "worker error: RuntimeError: boom"}
    with open_store(tmp_path / "s", "a") as st, pytest.raises(ValueError, match="status 'error' is not stored"):
        st.add([MeasuredFile("a.fits", 1, 1, "0" * 64, rec)], st.register_config(SIXTY))
