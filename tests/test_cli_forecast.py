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


# ---- issue 10: --series, --as-of, --phase, exit 3, scale ------------------------------------------------

ROTATION_YEARS = 27.2753 / 365.25  # Carrington synodic period (common practice, no source)


def _series_csv(path, t0, t1, seed=8):
    """Tessaly's polar series per rotation, dipole 6 sin(2 pi (t - 2033)/22) G + 0.2 G noise (invented);
    the noise of row k is the k-th draw of one seeded stream, so a longer table only appends rows."""
    rng = np.random.default_rng(seed)
    t = np.arange(t0, t1, ROTATION_YEARS)
    d = 6.0 * np.sin(2 * np.pi * (t - 2033.0) / 22.0)
    noise = rng.normal(0, 0.2, (t.size, 2))
    rows = [f"{a:.6f},{n:.5f},{s:.5f},0.2,0.2" for a, n, s in zip(t, d + noise[:, 0], -d + noise[:, 1])]
    path.write_text("time,north_br_gauss,south_br_gauss,north_br_error_gauss,south_br_error_gauss\n"
                    + "\n".join(rows) + "\n")


def _plain_config(tmp_path, extra=""):
    path = tmp_path / "plain.toml"
    path.write_text('[cycles]\nsunspot_format = "plain-csv"\n' + extra)
    return path


def test_series_route_as_of_keys_and_causality(tmp_path, capsys):
    """The forecast JSON as of 2036-04-01 from a series table and sunspot file ending at the date, and from
    the same files with six more years appended: identical (issue 10's causality check, through the CLI)."""
    cal = tmp_path / "cal.csv"
    _phase_table(cal, ["reversal+2", "minimum"], n=12)
    config = _plain_config(tmp_path)
    runs = []
    for name, t_end in (("short", 2036.25), ("long", 2042.0)):
        series, ssn = tmp_path / f"{name}.csv", tmp_path / f"{name}_ssn.csv"
        _series_csv(series, 2030.0, t_end)
        _sunspots(ssn, t_end)
        assert main(["forecast", "--calibration", str(cal), "--series", str(series), "--sunspots", str(ssn),
                     "--as-of", "2036-04-01", "--config", str(config)]) == 0
        runs.append(capsys.readouterr().out)
    assert runs[0] == runs[1]
    doc = json.loads(runs[0])
    # closed-loop truth of the seeded series: reversal 2033.0; rows to 2036.23, so reversal+2 is the
    # largest complete lag (reversal+3 needs data to 2036.5)
    assert doc["phase"] == "reversal+2" and doc["lag_years"] == 2.0 and doc["n_cycles"] == 6
    assert doc["reversal_time"] == pytest.approx(2033.0, abs=0.1) and doc["target_cycle"] == 2
    assert doc["as_of"] == "2036-04-01" and doc["data_date"] < "2036-04-01" and doc["precursor_source"] == "series"
    for key in ("minimum_time", "minimum_status", "provisional", "provisional_reasons", "scale_override"):
        assert key in doc
    # the same table with no --as-of uses all of it: the minimum of 2038.5 is confirmed by 2042
    long_series, long_ssn = tmp_path / "long.csv", tmp_path / "long_ssn.csv"
    assert main(["forecast", "--calibration", str(cal), "--series", str(long_series), "--sunspots", str(long_ssn),
                 "--config", str(config), "--format", "text"]) == 0
    out = capsys.readouterr().out
    assert "cycle 2 amplitude:" in out and "at phase minimum" in out and "(confirmed)" in out
    assert main(["forecast", "--calibration", str(cal), "--series", str(long_series), "--sunspots", str(long_ssn),
                 "--as-of", "2036-04"]) == 2
    assert capsys.readouterr().err == "polecast forecast: --as-of: got '2036-04'; expected an ISO date YYYY-MM-DD\n"


def test_no_forecast_exits_3_with_one_line(tmp_path, capsys):
    cal = tmp_path / "cal.csv"
    _phase_table(cal, ["minimum"], n=8)
    config = _plain_config(tmp_path)
    series, ssn = tmp_path / "s.csv", tmp_path / "ssn.csv"
    _series_csv(series, 2030.0, 2032.8)  # the dipole has not reversed yet (2033.0)
    _sunspots(ssn, 2032.8)
    cases = [
        (["--series", str(series)], "no dipole reversal in the polar series"),
        (["--series", str(tmp_path / "later.csv"), "--as-of", "2036-04-01"], "phase 'reversal+2' (the table has rows "
                                                                           "of phase 'minimum': 8)"),
    ]
    _series_csv(tmp_path / "later.csv", 2030.0, 2042.0)
    _sunspots(ssn, 2042.0)
    for extra, reason in cases:
        assert main(["forecast", "--calibration", str(cal), "--sunspots", str(ssn), "--config", str(config)]
                    + extra) == 3
        cap = capsys.readouterr()
        failing = [line for line in cap.err.splitlines() if "no forecast" in line]
        assert cap.out == "" and len(failing) == 1 and reason in failing[0] and "Traceback" not in cap.err
        assert failing[0].startswith("polecast forecast: no forecast: ")


def test_scale_mismatch_exit_2_unless_allowed(tmp_path, capsys):
    store, config = _store_with_dipole(tmp_path, 2042.0)
    ssn = tmp_path / "ssn.csv"
    _sunspots(ssn, 2041.0)
    cal = tmp_path / "cal.csv"
    _write_table(cal)
    other = "instrument=OTHER; cap_latitude_deg=70; b0_method=fill; precursor_kind=dipole"
    lines = cal.read_text().splitlines()
    cal.write_text(lines[0] + ",scale\n" + "\n".join(f'{line},"{other}"' for line in lines[1:]) + "\n")
    base = ["forecast", "--calibration", str(cal), "--store", str(store), "--sunspots", str(ssn),
            "--config", str(config)]
    assert main(base) == 2
    cap = capsys.readouterr()
    # the store's records name no instrument (a fallback, said as a note) and were measured at 60 deg, visible
    in_force = "instrument=unnamed; cap_latitude_deg=60; b0_method=visible; precursor_kind=dipole"
    err = [line for line in cap.err.splitlines() if "differs" in line]
    assert cap.out == "" and len(err) == 1 and other in err[0] and in_force in err[0]
    assert "no instrument" in cap.err
    assert main(base + ["--allow-scale-mismatch"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["scale_override"]["table_scales"] == [other] and doc["scale_override"]["scale_in_force"] == in_force
    assert any("scale mismatch allowed" in w for w in doc["warnings"])
    assert main(base + ["--scale", "x"]) == 2
    assert "--scale applies to --precursor and --series" in capsys.readouterr().err


def test_given_precursor_phase_and_options(tmp_path, capsys):
    cal = tmp_path / "cal.csv"
    _phase_table(cal, ["reversal+4"], n=8)
    assert main(["forecast", "--calibration", str(cal), "--precursor", "1.5", "--phase", "reversal+4.0"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert (doc["phase"], doc["lag_years"], doc["n_cycles"], doc["precursor_source"]) == ("reversal+4", 4.0, 8, "given")
    assert doc["minimum_time"] is None and doc["target_cycle"] is None and doc["as_of"] is None
    # without --phase a given precursor is at the minimum: the table has none of that phase
    assert main(["forecast", "--calibration", str(cal), "--precursor", "1.5"]) == 3
    cap = capsys.readouterr()
    assert "taken to be at the phase 'minimum'" in cap.err and "no forecast" in cap.err
    config = tmp_path / "c.toml"
    config.write_text('[forecast]\nphase = "reversal+4"\nas_of = "2034-05-01"\n')
    assert main(["forecast", "--calibration", str(cal), "--precursor", "1.5", "--config", str(config)]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["phase"] == "reversal+4" and doc["as_of"] == doc["data_date"] == "2034-05-01"
    assert main(["forecast", "--calibration", str(cal), "--precursor", "1.5", "--phase", "max"]) == 2
    assert "--phase: got 'max'; valid phases are 'auto'" in capsys.readouterr().err
    assert main(["forecast", "--calibration", str(cal), "--precursor", "1.5", "--phase", "minimum",
                 "--lag-years", "4"]) == 2
    assert "give --phase or --lag-years, not both" in capsys.readouterr().err
