"""`polecast demo` and `polecast run`: the whole job end to end on the embedded demo archive.

The truth comes from the synthetic star that made demo_fits/ (pipeline.synth; regression of the
whole pipeline against a closed-loop truth, no outside source beyond the components' own tests).
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "demo_fits"

FIGURES = ("polar_series.png", "latitude_time.png", "calibration.png", "forecast_history.png", "diagnostics.png")


def _polecast(*args, cwd=REPO):
    return subprocess.run([sys.executable, "-m", "pipeline", *map(str, args)], capture_output=True, text=True,
                          cwd=cwd, timeout=900)


@pytest.fixture(scope="module")
def demo_out(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    res = _polecast("demo", "--out", out, "--workers", "2")
    assert res.returncode == 0, res.stderr[-2000:]
    return out, res.stdout


def test_demo_recovers_the_synthetic_truth(demo_out):
    """Issue 7 end-to-end checks: final reversal epochs within 0.25 yr of the truth and the truth's
    next-cycle amplitude inside the forecast's 95 % interval."""
    out, stdout = demo_out
    summary = json.loads((out / "summary.json").read_text())
    truth = json.loads((DEMO / "truth.json").read_text())
    for pole in ("north", "south"):
        final = summary["reversals"][pole]["final"]
        assert set(final) >= {"time", "low", "high", "time_iso", "sign_after"}
        assert summary["truth"]["reversals"][pole] == truth["final_reversals"][pole]
        assert abs(final["time"] - truth["final_reversals"][pole]) <= 0.25
    f = summary["forecast"]
    lo, hi = f["interval_95"]
    assert lo <= truth["next_amplitude"] <= hi
    assert f["interval_68"][0] >= lo and f["interval_68"][1] <= hi
    assert summary["truth"]["next_amplitude"] == truth["next_amplitude"]
    assert "official space-weather forecasts" in summary["cautions"].lower()
    # what the demo prints: the forecast, the reversal epochs and where the report is
    assert "next-cycle amplitude" in stdout and "final reversal" in stdout and "report:" in stdout


def test_demo_writes_every_figure_and_the_page(demo_out):
    out, _ = demo_out
    for name in FIGURES:
        png = out / "report" / "figures" / name
        assert png.exists(), name
        data = png.read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 8000  # PNG signature (ISO/IEC 15948)
    page = (out / "report" / "index.html").read_text()
    assert "mission rules" in page and page.count("data:image/png;base64,") >= len(FIGURES)
    for product in ("series.nc", "latitude_time.nc", "reversals.json", "cycles.json", "forecast.json",
                    "forecast_history.jsonl", "calibration.csv", "config.json"):
        assert (out / product).stat().st_size > 0, product


def _config(path: Path, archive: Path, out: Path) -> Path:
    path.write_text(f"""
[run]
archive = ["{archive}"]
sunspots = "{DEMO / 'sunspots.csv'}"
calibration = "{DEMO / 'calibration.csv'}"
store = "{out / 'store.sqlite'}"
products_dir = "{out}"
report = false

[measure]
profile_min_latitude_deg = 55.0
""")
    return path


def _products(out: Path) -> dict:
    keep = {}
    for name in ("reversals.json", "cycles.json"):
        keep[name] = json.loads((out / name).read_text())
    forecast = json.loads((out / "forecast.json").read_text())
    keep["forecast"] = {k: forecast[k] for k in ("amplitude", "interval_68", "interval_95", "precursor", "r",
                                                 "loo_rmse", "data_date")}
    return keep


def test_run_is_incremental_and_appends_one_history_entry_per_update(tmp_path):
    """Issue 7: a second run with no new files measures nothing and gives the same products; with
    new files it measures only those and appends one forecast-history entry."""
    files = sorted(DEMO.glob("*.fits"))
    archive = tmp_path / "archive"
    archive.mkdir()
    held_back = files[-2:]
    for f in files[:-2]:
        (archive / f.name).symlink_to(f)
    out = tmp_path / "products"
    conf = _config(tmp_path / "run.toml", archive, out)

    first = _polecast("run", conf)
    assert first.returncode == 0, first.stderr[-2000:]
    assert f"{len(files) - 2} new" in first.stdout
    history = out / "forecast_history.jsonl"
    assert len(history.read_text().splitlines()) == 1
    before = _products(out)

    second = _polecast("run", conf)
    assert second.returncode == 0, second.stderr[-2000:]
    assert "0 new" in second.stdout and f"{len(files) - 2} already known" in second.stdout
    assert _products(out) == before
    assert len(history.read_text().splitlines()) == 1  # nothing new: no entry appended

    old_history = history.read_bytes()
    for f in held_back:
        shutil.copy(f, archive / f.name)
    third = _polecast("run", conf)
    assert third.returncode == 0, third.stderr[-2000:]
    assert "2 new" in third.stdout
    lines = history.read_text().splitlines()
    assert len(lines) == 2 and history.read_bytes().startswith(old_history)  # appended, never rewritten
    assert json.loads(lines[1])["data_date"] > json.loads(lines[0])["data_date"]


def test_run_configuration_errors_name_the_key(tmp_path):
    conf = tmp_path / "bad.toml"
    conf.write_text('[run]\narchive = ["x"]\nsunspots = "missing.csv"\ncalibration = "c.csv"\n')
    res = _polecast("run", conf)
    assert res.returncode == 2 and "run.sunspots" in res.stderr and "Traceback" not in res.stderr
    conf.write_text('[run]\nscheduler = "localhost:8786"\n')
    res = _polecast("run", conf)
    assert res.returncode == 2 and "run.scheduler" in res.stderr and "tcp://" in res.stderr
    conf.write_text('[series]\nb0_method = "guess"\n')
    res = _polecast("run", conf)
    assert res.returncode == 2 and "series.b0_method" in res.stderr and "'fill'" in res.stderr
    assert _polecast("run", tmp_path / "absent.toml").returncode == 2
