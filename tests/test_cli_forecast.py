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
    fit = sm.OLS(y, sm.add_constant(x)).fit()
    frame = fit.get_prediction(np.array([[1.0, 1.5]])).summary_frame(alpha=0.05)
    assert doc["amplitude"] == pytest.approx(frame["mean"][0], rel=1e-8)
    assert doc["interval_95"] == pytest.approx([frame["obs_ci_lower"][0], frame["obs_ci_upper"][0]], rel=1e-8)
    assert doc["method"] == "ols" and doc["n_cycles"] == 8 and doc["precursor"] == 1.5
    assert doc["r"] == pytest.approx(np.corrcoef(x, y)[0, 1], rel=1e-10)  # numpy reference
    # leave-one-out residuals of OLS are the PRESS residuals e_i / (1 - h_ii) (Allen 1974); statsmodels' influence
    press = fit.get_influence().resid_press
    assert doc["loo_rmse"] == pytest.approx(np.sqrt(np.mean(press ** 2)), rel=1e-8)
    assert doc["warnings"] == [] and "Official space-weather" in doc["cautions"]


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
    # issue 10: too few calibration rows of the phase is "no forecast", exit 3 (not a usage error)
    assert main(["forecast", "--calibration", str(small), "--precursor", "1.0"]) == 3
    assert "no forecast: calibration table: got 3 cycles; at least 4 are needed" in capsys.readouterr().err
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


def _store_with_dipole(tmp_path, t_end):
    """A store of Tessaly frame records with dipole 6 sin(2 pi (t - 2033)/22) G (invented demo data)."""
    store_mod = pytest.importorskip("pipeline.store")
    pytest.importorskip("pipeline.aggregator")
    from pipeline.config import MeasureSettings
    from pipeline.measure import FrameRecord
    from pipeline.timeutil import from_decimal_year, iso_time

    records = []
    for k, t in enumerate(np.arange(2030.0, t_end, 0.04)):
        d = 6.0 * np.sin(2 * np.pi * (t - 2033.0) / 22.0)
        records.append(FrameRecord(file=f"kvm_{k:04d}.fits", status="ok", time=iso_time(from_decimal_year(t)),
                                   b0_deg=0.0, north_br_gauss=d, south_br_gauss=-d, north_br_error_gauss=0.2,
                                   south_br_error_gauss=0.2, north_coverage=0.5, south_coverage=0.5,
                                   north_pixels=100, south_pixels=100))
    path = tmp_path / "kvm.polecast"
    with store_mod.open_store(path, "a") as store:
        cid = store.register_config(MeasureSettings())
        store.add([store_mod.MeasuredFile(r.file, 1, 1, f"{i:064x}", r.to_dict()) for i, r in enumerate(records)],
                  cid)
        store.commit()
    config = tmp_path / "polecast.toml"
    config.write_text('[series]\nb0_method = "visible"\n')
    return path, config


def _sunspots(path, t_end):
    # Tessaly's invented monthly sunspot numbers: minima at 2027.5 and 2038.5, ISO months
    months = np.arange(np.datetime64("2025-01"), np.datetime64(f"{int(t_end)}-{int((t_end % 1) * 12) + 1:02d}"))
    t = 2025.0 + (np.arange(months.size) + 0.5) / 12
    ssn = 5 + 150 * np.sin(np.pi * (t - 2027.5) / 11.0) ** 2
    path.write_text("month,ssn\n" + "".join(f"{m},{v:.1f}\n" for m, v in zip(months, ssn)))


def test_store_route_at_the_minimum(tmp_path, capsys):
    store, config = _store_with_dipole(tmp_path, 2042.0)
    ssn = tmp_path / "ssn.csv"
    _sunspots(ssn, 2041.0)
    cal = tmp_path / "cal.csv"
    _write_table(cal)
    hist = tmp_path / "h.jsonl"
    assert main(["forecast", "--calibration", str(cal), "--store", str(store), "--sunspots", str(ssn),
                 "--config", str(config), "--history", str(hist)]) == 0
    doc = json.loads(capsys.readouterr().out)
    detail = doc["precursor_detail"]
    assert detail["route"] == "minimum" and doc["phase"] == "minimum" and doc["lag_years"] is None
    assert doc["minimum_time"] == pytest.approx(2038.5, abs=0.1) and doc["minimum_status"] == "confirmed"
    # the dipole peaks (6 G) at the minimum: mean |B| over +-0.5 yr of 6 sin(...) is 5.99 G (closed form)
    assert doc["precursor"] == pytest.approx(5.99, abs=0.05)
    # the final reversal of the dipole, 2033.0 by construction (interpolated zero crossing)
    assert doc["reversal_time"] == pytest.approx(2033.0, abs=0.1)
    # the second minimum of the sunspot file (2027.5, 2038.5) begins cycle 2 of its numbering
    assert doc["target_cycle"] == 2 and doc["as_of"] is None and doc["data_date"].startswith("2041-")
    assert json.loads(hist.read_text())["precursor_source"] == "store"
    assert json.loads(hist.read_text())["data_date"].startswith("2041-")


def _phase_table(path, phases, n=8, seed=5):
    """A calibration table whose rows carry the given phases in turn (seeded, invented)."""
    x, y = _write_table(path, n=n, seed=seed)
    lines = path.read_text().splitlines()
    rows = [f"{line},{phases[i % len(phases)]}" for i, line in enumerate(lines[1:])]
    path.write_text(lines[0] + ",phase\n" + "\n".join(rows) + "\n")
    return x, y


def test_store_route_after_the_reversal(tmp_path, capsys):
    # frames to 2036.26: the reversal (2033.0 by construction) + 2 + 0.5 yr is complete, + 3 + 0.5 is not
    store, config = _store_with_dipole(tmp_path, 2036.3)
    ssn = tmp_path / "ssn.csv"
    _sunspots(ssn, 2036.5)
    cal = tmp_path / "cal.csv"
    _phase_table(cal, ["reversal+2", "reversal+3"], n=16)
    assert main(["forecast", "--calibration", str(cal), "--store", str(store), "--sunspots", str(ssn),
                 "--config", str(config)]) == 0
    cap = capsys.readouterr()
    doc = json.loads(cap.out)
    detail = doc["precursor_detail"]
    # phase auto: the minimum of 2027.5 precedes the reversal and the lowest smoothed value since the 2033
    # maximum is only a pending candidate, so the largest complete lag is taken
    assert detail["route"] == "after_reversal" and doc["phase"] == "reversal+2" and doc["lag_years"] == 2.0
    assert doc["minimum_status"] == "pending" and doc["minimum_time"] > doc["reversal_time"]
    assert doc["n_cycles"] == 8 and "is pending, not yet known" in " ".join(doc["notes"])
    assert doc["target_cycle"] == 2  # the cycle that begins at the minimum after the 2033 reversal
    # lag 2 yr < 4 yr: Kumar et al. (2021) caution
    assert any("Kumar et al. 2021" in w for w in doc["warnings"]) and "Kumar" in cap.err
    t = detail["time"]
    assert t == pytest.approx(2035.0, abs=0.1)
    truth = np.mean(np.abs(6.0 * np.sin(2 * np.pi * (np.linspace(t - 0.5, t + 0.5, 2001) - 2033.0) / 22.0)))
    assert doc["precursor"] == pytest.approx(truth, rel=0.02)  # closed form of the constructed dipole
    # --lag-years L is --phase reversal+L; an explicit phase whose window is incomplete is "no forecast"
    assert main(["forecast", "--calibration", str(cal), "--store", str(store), "--sunspots", str(ssn),
                 "--config", str(config), "--lag-years", "2.0"]) == 0
    assert json.loads(capsys.readouterr().out)["precursor_detail"]["lag_years"] == 2.0
    assert main(["forecast", "--calibration", str(cal), "--store", str(store), "--sunspots", str(ssn),
                 "--config", str(config), "--phase", "reversal+3"]) == 3
    cap = capsys.readouterr()
    assert cap.out == "" and "no forecast: the window of +-0.5 yr around 3 yr after the final reversal" in cap.err
    assert main(["forecast", "--calibration", str(cal), "--store", str(tmp_path / "absent.polecast"),
                 "--sunspots", str(ssn)]) == 2
    assert "cannot take the precursor" in capsys.readouterr().err


def test_store_route_refuses_records_of_other_settings(tmp_path, capsys):
    """Issue 17 (the project's rule; wording regression only): the store's records were measured at the default
    60-deg cap; a configuration putting 70 deg in force is refused in one line, exit 2."""
    store, config = _store_with_dipole(tmp_path, 2042.0)
    config.write_text(config.read_text() + "[measure]\ncap_latitude_deg = 70\n")
    ssn = tmp_path / "ssn.csv"
    _sunspots(ssn, 2041.0)
    cal = tmp_path / "cal.csv"
    _write_table(cal)
    assert main(["forecast", "--calibration", str(cal), "--store", str(store), "--sunspots", str(ssn),
                 "--config", str(config)]) == 2
    cap = capsys.readouterr()
    lines = cap.err.strip().splitlines()
    assert cap.out == "" and len(lines) == 1 and "Traceback" not in cap.err
    assert "measure.cap_latitude_deg 60.0 (records) vs 70.0 (in force)" in lines[0]
    assert lines[0].startswith(f"polecast forecast: cannot take the precursor from {store}")
