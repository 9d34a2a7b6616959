"""`polecast series STORE`: only records measured under the measure settings in force are used (issue 17).

The rule is the project's own (issue 17); the wording of the refusals is regression only.  The stores hold
plain records (tests/_ingest_archive.record_store), so no FITS file is read.
"""

from __future__ import annotations

import xarray as xr

from pipeline.cli import main
from pipeline.config import MeasureSettings
from pipeline.measure import MEASUREMENT_VERSION
from tests._ingest_archive import record_store

VISIBLE = '[series]\nb0_method = "visible"\n'  # the plain records carry no latitude profile


def _config(tmp_path, measure: str = "", name="c.toml"):
    path = tmp_path / name
    path.write_text(VISIBLE + measure)
    return str(path)


def _run(capsys, *argv):
    rc = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return rc, out, err


def _refusal(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


def test_config_whose_measure_settings_differ_is_refused(tmp_path, capsys):
    store = record_store(tmp_path / "s.polecast", MeasureSettings(), n=60)
    out = tmp_path / "series.nc"
    rc, _, err = _run(capsys, "series", store, "--out", out, "--config",
                      _config(tmp_path, "[measure]\ncap_latitude_deg = 70\n"))
    # exit codes of every sub-command (pipeline.cli docstring): 2 = usage or configuration error
    assert rc == 2 and not out.exists()
    line = _refusal(err)
    assert line.startswith("polecast series: store ")
    assert "60 with measure.cap_latitude_deg 60.0 (records) vs 70.0 (in force)" in line and "--remeasure" in line


def test_matching_config_and_no_config_use_the_records(tmp_path, capsys):
    store = record_store(tmp_path / "s.polecast", MeasureSettings(cap_latitude_deg=70.0), n=60)
    out = tmp_path / "series.nc"
    rc, _, _ = _run(capsys, "series", store, "--out", out, "--config",
                    _config(tmp_path, "[measure]\ncap_latitude_deg = 70.0\n"))
    with xr.open_dataset(out) as ds:
        assert rc == 0 and ds.sizes["time"] == 60
    # a configuration without [measure] puts the defaults (60 deg) in force: refused for this 70-deg store
    rc, _, err = _run(capsys, "series", store, "--out", out, "--config", _config(tmp_path))
    assert rc == 2 and "measure.cap_latitude_deg 70.0 (records) vs 60.0 (in force)" in _refusal(err)
    # no configuration at all: the store's own settings (70 deg) are in force
    rc, _, err = _run(capsys, "series", store, "--out", out, "--b0-method", "visible")
    with xr.open_dataset(out) as ds:
        assert rc == 0 and ds.sizes["time"] == 60, err


def test_store_of_several_settings_is_refused_without_config(tmp_path, capsys):
    store = record_store(tmp_path / "s.polecast", MeasureSettings(), n=30)
    record_store(store, MeasureSettings(cap_latitude_deg=70.0), n=10, start=30)
    rc, _, err = _run(capsys, "series", store, "--out", tmp_path / "x.nc", "--b0-method", "visible")
    line = _refusal(err)
    assert rc == 2 and "several settings" in line and "30 with configuration" in line and "10 with" in line
    rc, _, err = _run(capsys, "series", store, "--out", tmp_path / "x.nc", "--config", _config(tmp_path))
    assert rc == 2 and "10 with measure.cap_latitude_deg 70.0 (records) vs 60.0 (in force)" in _refusal(err)


def test_records_of_another_measurement_version_are_refused(tmp_path, capsys):
    store = record_store(tmp_path / "s.polecast", MeasureSettings(), n=20, measure_version=MEASUREMENT_VERSION + 7)
    rc, _, err = _run(capsys, "series", store, "--out", tmp_path / "x.nc", "--b0-method", "visible")
    assert rc == 2
    assert (f"20 with measurement code version {MEASUREMENT_VERSION + 7} (records) vs {MEASUREMENT_VERSION} "
            f"(in force)") in _refusal(err)
