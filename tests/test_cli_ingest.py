"""`polecast ingest` and `polecast export`: exit codes, summary line, errors, the store lock."""

from __future__ import annotations

import csv
import io
import socket
import subprocess
import sys

import pytest

from pipeline.cli import main
from pipeline.measure import JSON_KEYS
from pipeline.store import open_store
from tests._ingest_archive import good_archive, hostile_files, record_store


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    root = tmp_path_factory.mktemp("cli_archive")
    good_archive(root, 5)
    bad = hostile_files(root / "bad")
    for name in list(bad)[2:]:  # keep two bad kinds: empty and truncated
        bad[name].unlink()
    return root


def _run(capsys, *argv):
    rc = main(list(argv))
    out, err = capsys.readouterr()
    return rc, out, err


def test_ingest_exit_codes_and_summary(archive, tmp_path, capsys):
    store = str(tmp_path / "s.polecast")
    rc, out, err = _run(capsys, "ingest", str(archive), "--store", store, "--workers", "2")
    # exit codes shared by every sub-command (pipeline.cli docstring): 1 = some input skipped
    assert rc == 1
    assert out.strip() == "ingest: 7 new (5 ok, 2 skipped: 1 empty file, 1 truncated file), 0 already known"
    assert err.count("polecast ingest: skipped ") == 2 and "empty.fits: empty file" in err
    assert "\r" not in out  # stdout is not a terminal: no progress bar
    rc, out, _ = _run(capsys, "ingest", str(archive), "--store", store)
    assert rc == 0 and out.strip() == "ingest: 0 new (0 ok, 0 skipped), 7 already known"


def test_export_csv_and_skipped(archive, tmp_path, capsys):
    store = str(tmp_path / "s.polecast")
    _run(capsys, "ingest", str(archive), "--store", store, "--workers", "1")
    rc, out, err = _run(capsys, "export", store, "--format", "csv")
    assert rc == 0 and "5 frames" in err
    rows = list(csv.DictReader(io.StringIO(out)))
    assert len(rows) == 5 and list(rows[0])[: len(JSON_KEYS)] == list(JSON_KEYS)
    assert [r["time"] for r in rows] == sorted(r["time"] for r in rows)
    out_file = tmp_path / "skipped.csv"
    rc, _, _ = _run(capsys, "export", store, "--skipped", "--out", str(out_file))
    skipped = list(csv.DictReader(out_file.open()))
    assert rc == 0 and sorted(r["reason"].split(":")[0] for r in skipped) == ["empty file", "truncated file"]
    rc, _, err = _run(capsys, "export", store, "--format", "netcdf", "--skipped", "--out", "x.nc")
    assert rc == 2 and "--skipped is CSV only" in err
    rc, _, err = _run(capsys, "export", str(tmp_path / "none"), "--out", str(tmp_path / "x.csv"))
    assert rc == 2 and "no such file" in err


def test_export_netcdf_via_cli(archive, tmp_path, capsys):
    import xarray as xr

    store = str(tmp_path / "s.polecast")
    _run(capsys, "ingest", str(archive), "--store", store, "--workers", "1")
    out = tmp_path / "f.nc"
    rc, _, _ = _run(capsys, "export", store, "--format", "netcdf", "--out", str(out))
    with xr.open_dataset(out) as ds:
        assert rc == 0 and ds.sizes["time"] == 5
        assert ds["south_br_gauss"].attrs["units"] == "gauss"


def test_unreachable_scheduler_is_a_one_line_error(archive, tmp_path, capsys):
    with socket.socket() as s:  # a port nobody listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    cfg = tmp_path / "c.toml"
    cfg.write_text("[ingest]\nconnect_timeout_s = 2\n")
    store = tmp_path / "s.polecast"
    rc, out, err = _run(capsys, "ingest", str(archive), "--store", str(store), "--config", str(cfg),
                        "--scheduler", f"tcp://127.0.0.1:{port}")
    assert rc == 2 and out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and f"cannot reach the dask scheduler at tcp://127.0.0.1:{port}" in lines[0]
    with open_store(store) as st:  # no silent local run
        assert st.count(None) == 0
    rc, _, err = _run(capsys, "ingest", str(archive), "--store", str(store), "--scheduler", "localhost")
    assert rc == 2 and "expected an address such as tcp://HOST:8786" in err


def test_concurrent_ingest_refused(archive, tmp_path, capsys):
    store = tmp_path / "s.polecast"
    with open_store(store, "a"):
        rc, out, err = _run(capsys, "ingest", str(archive), "--store", str(store))
    assert rc == 2 and "is in use by another ingest" in err and out == ""
    # and from another process, through the installed command
    with open_store(store, "a"):
        proc = subprocess.run([sys.executable, "-m", "pipeline", "ingest", str(archive), "--store", str(store)],
                              capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2 and "in use by another ingest" in proc.stderr


def test_changed_configuration_needs_remeasure(archive, tmp_path, capsys):
    store = str(tmp_path / "s.polecast")
    _run(capsys, "ingest", str(archive), "--store", store, "--workers", "1")
    cfg = tmp_path / "c.toml"
    cfg.write_text("[measure]\nmu_min = 0.2\n")
    rc, _, err = _run(capsys, "ingest", str(archive), "--store", store, "--config", str(cfg))
    assert rc == 2 and "measure.mu_min 0.1 (records) vs 0.2 (in force)" in err and "--remeasure" in err
    rc, out, _ = _run(capsys, "ingest", str(archive), "--store", store, "--config", str(cfg), "--remeasure",
                      "--workers", "1")
    assert rc == 1 and "7 re-measured" in out and "7 new" in out


def test_bad_arguments(tmp_path, capsys):
    rc, _, err = _run(capsys, "ingest", str(tmp_path / "absent"), "--store", str(tmp_path / "s"))
    assert rc == 2 and "no such file or directory" in err
    rc, _, err = _run(capsys, "ingest", str(tmp_path), "--store", str(tmp_path / "s"), "--workers", "-3")
    assert rc == 2 and "ingest.workers: got -3" in err


def test_export_uses_only_records_of_the_settings_in_force(tmp_path, capsys):
    """Issue 17 (the project's rule; wording regression only): export refuses a store holding records of other
    settings than those in force, in one line with exit 2, for CSV, --skipped and netCDF alike."""
    from pipeline.config import MeasureSettings

    store = record_store(tmp_path / "s.polecast", MeasureSettings(cap_latitude_deg=70.0), n=4)
    sixty = tmp_path / "c.toml"
    sixty.write_text("[measure]\ncap_latitude_deg = 60\n")
    for extra in ([], ["--skipped"], ["--format", "netcdf", "--out", str(tmp_path / "x.nc")]):
        rc, out, err = _run(capsys, "export", str(store), "--config", str(sixty), *extra)
        lines = err.strip().splitlines()
        assert (rc, out, len(lines)) == (2, "", 1), (extra, err)
        assert "measure.cap_latitude_deg 70.0 (records) vs 60.0 (in force)" in lines[0]
    rc, out, _ = _run(capsys, "export", str(store))  # no configuration: the store's own settings
    assert rc == 0 and [r["cap_latitude_deg"] for r in csv.DictReader(io.StringIO(out))] == ["70.0"] * 4
    record_store(store, MeasureSettings(), n=2, start=4)  # now two settings: refused without --config too
    rc, out, err = _run(capsys, "export", str(store))
    assert rc == 2 and out == "" and "several settings" in err and len(err.strip().splitlines()) == 1


def test_errors_are_reported_apart_from_skips(archive, tmp_path, capsys, monkeypatch):
    """The command's wiring (issue 17): an error is reported as "not stored", a skip as "skipped", and the exit
    code is 1 (pipeline.cli docstring).  The driver is replaced by one that reports one of each."""
    import pipeline.batch as batch

    def fake_ingest(paths, store, measure, settings, *, on_skip, on_error, **kw):
        s = batch.IngestSummary(new_ok=1, new_skipped=1, errors=1)
        s.skip_reasons["empty file"] += 1
        s.error_reasons["unexpected RuntimeError while measuring"] += 1
        on_skip("/a/empty.fits", "empty file")
        on_error("/a/f.fits", "unexpected RuntimeError while measuring: injected fault")
        return s

    monkeypatch.setattr(batch, "ingest", fake_ingest)
    rc, out, err = _run(capsys, "ingest", str(archive), "--store", str(tmp_path / "s.polecast"))
    assert rc == 1 and err.splitlines() == [
        "polecast ingest: skipped /a/empty.fits: empty file",
        "polecast ingest: not stored /a/f.fits: unexpected RuntimeError while measuring: injected fault"]
    assert out.strip() == ("ingest: 2 new (1 ok, 1 skipped: 1 empty file), 0 already known, 1 error (1 unexpected "
                           "RuntimeError while measuring; not stored, tried again next run)")
