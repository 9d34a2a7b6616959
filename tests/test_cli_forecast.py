"""Tests of ``polecast forecast`` (the command-line contract)."""

import json

import numpy as np
import pytest

from pipeline.cli import main

sm = pytest.importorskip("statsmodels.api")


def _write_table(path, n=8, errors=False, seed=5):
    # seeded synthetic calibration table for the demo star Tessaly (invented data)
    rng = np.random.default_rng(seed)
    x = rng.uniform(0.8, 2.2, n)
    y = 30 + 70 * x + rng.normal(0, 12, n)
    head = "cycle,precursor,amplitude" + (",precursor_error,amplitude_error" if errors else "")
    rows = [f"{i + 1},{a:.6f},{b:.6f}" + (",0.08,9" if errors else "") for i, (a, b) in enumerate(zip(x, y))]
    path.write_text(head + "\n" + "\n".join(rows) + "\n")
    return x.round(6), y.round(6)


def test_json_output_matches_statsmodels(tmp_path, capsys):
    cal = tmp_path / "cal.csv"
    x, y = _write_table(cal)
    assert main(["forecast", "--calibration", str(cal), "--precursor", "1.5", "--format", "json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    # reference library: statsmodels OLS prediction interval for a new observation
    frame = sm.OLS(y, sm.add_constant(x)).fit().get_prediction(np.array([[1.0, 1.5]])).summary_frame(alpha=0.05)
    assert doc["amplitude"] == pytest.approx(frame["mean"][0], rel=1e-8)
    assert doc["interval_95"] == pytest.approx([frame["obs_ci_lower"][0], frame["obs_ci_upper"][0]], rel=1e-8)
    assert doc["method"] == "ols" and doc["n_cycles"] == 8 and doc["precursor"] == 1.5
    assert doc["r"] == pytest.approx(np.corrcoef(x, y)[0, 1], rel=1e-10)  # numpy reference
    assert doc["loo_rmse"] > 0 and doc["warnings"] == [] and "Official space-weather" in doc["cautions"]


def test_text_output_prints_cautions_and_warning(tmp_path, capsys):
    cal = tmp_path / "cal.csv"
    _write_table(cal)
    assert main(["forecast", "--calibration", str(cal), "--precursor", "9.0", "--format", "text"]) == 0
    cap = capsys.readouterr()
    assert "next-cycle amplitude" in cap.out and "caution:" in cap.out and "mission rules" in cap.out
    assert "outside the calibrated range" in cap.out and "outside the calibrated range" in cap.err


@pytest.mark.parametrize("method", ["odr", "loglinear"])
def test_other_methods(tmp_path, capsys, method):
    cal = tmp_path / "cal.csv"
    _write_table(cal, errors=True)
    assert main(["forecast", "--calibration", str(cal), "--precursor", "1.4", "--method", method]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["method"] == method
    assert doc["interval_95"][0] < doc["interval_68"][0] < doc["amplitude"] < doc["interval_68"][1]


def test_exit_codes(tmp_path, capsys):
    small = tmp_path / "small.csv"
    _write_table(small, n=3)
    assert main(["forecast", "--calibration", str(small), "--precursor", "1.0"]) == 2
    assert "got 3 cycles; at least 4 are needed" in capsys.readouterr().err
    cal = tmp_path / "cal.csv"
    _write_table(cal)
    assert main(["forecast", "--calibration", str(cal), "--precursor", "1.0", "--method", "lasso"]) == 2
    assert "forecast.method: got 'lasso'" in capsys.readouterr().err
    assert main(["forecast", "--calibration", str(cal), "--precursor", "1.0", "--method", "odr"]) == 2
    assert "needs errors in both variables" in capsys.readouterr().err
    assert main(["forecast", "--calibration", str(tmp_path / "none.csv"), "--precursor", "1.0"]) == 2
    assert "cannot read" in capsys.readouterr().err
    assert main(["forecast", "--calibration", str(cal), "--store", str(tmp_path / "s.db")]) == 2
    assert "--store needs --sunspots" in capsys.readouterr().err
    assert main(["forecast", "--calibration", str(cal), "--precursor", "1.0", "--as-of", "May"]) == 2
    assert "--as-of: got 'May'" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:  # argparse: neither --precursor nor --store
        main(["forecast", "--calibration", str(cal)])
    assert exc.value.code == 2
    capsys.readouterr()
    bad = tmp_path / "bad.csv"
    bad.write_text(cal.read_text() + "9,oops,100\n")
    assert main(["forecast", "--calibration", str(bad), "--precursor", "1.0"]) == 1
    cap = capsys.readouterr()
    assert "precursor 'oops' is not a finite number" in cap.err
    assert json.loads(cap.out)["n_cycles"] == 8


def test_history_appends_without_rewriting(tmp_path, capsys):
    cal = tmp_path / "cal.csv"
    _write_table(cal)
    hist = tmp_path / "history.jsonl"
    base = ["forecast", "--calibration", str(cal), "--history", str(hist)]
    assert main(base + ["--precursor", "1.2", "--as-of", "2034-01-31"]) == 0
    first = hist.read_bytes()
    assert main(base + ["--precursor", "1.3", "--as-of", "2034-02-28"]) == 0
    capsys.readouterr()
    # append-only (common practice, no source): earlier bytes unchanged
    assert hist.read_bytes().startswith(first)
    lines = [json.loads(s) for s in hist.read_text().splitlines()]
    assert [e["data_date"] for e in lines] == ["2034-01-31", "2034-02-28"]
    assert [e["precursor"] for e in lines] == [1.2, 1.3] and lines[0]["method"] == "ols"
