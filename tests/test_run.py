"""`polecast demo` and `polecast run`: the whole job end to end, its exit codes, its run lock and its products.

Where the expected values come from:

- the synthetic star that made demo_fits/ (pipeline.synth; "closed-loop truth"): ``truth.json`` (whole-cap
  reversal epochs, precursor, next amplitude) and ``truth_frames.csv`` (the exact visible-cap mean of each
  frame, mu >= 0.1);
- the noise: every tolerance on a measured number is a multiple of a standard error that the pipeline states
  (three sigma: a two-sided 99.7 % bound for a normal error; common practice, no source);
- exit codes, lock and file behaviour: the contract in ``pipeline/cli/__init__.py`` and ``pipeline/run.py``
  (regression only); 130 = 128 + SIGINT is the shells' convention (common practice, no source).

The demo is measured once per session (``demo_run`` in conftest.py); the run tests start from a store seeded
with the demo store's records of a short span (2055-2057, 37 frames) and measure only the files they add.
"""

from __future__ import annotations

import csv
import dataclasses
import json
import math
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from pipeline.aggregator import polar_series
from pipeline.cli import main
from pipeline.config import MeasureSettings, load_config
from pipeline.precursor import precursor_at
from pipeline.regression import forecast_amplitude, read_calibration_csv
from pipeline.run import RUN_LOCK_NAME, RunLockedError, run_lock, run_pipeline
from pipeline.store import MeasuredFile, check_measure_settings, file_digest, open_store
from tests._demo_store import (DEMO, DEMO_CONFIG, REPO, demo_files, demo_measure, link_archive, seed_store,
                               write_calibration, write_run_config, write_sunspots_before)
from tests._ingest_archive import committed_rows

FIGURES = ("polar_series.png", "latitude_time.png", "calibration.png", "forecast_history.png",
           "forecast_trajectory.png", "diagnostics.png")
PRODUCTS = ("series.nc", "latitude_time.nc", "reversals.json", "cycles.json", "forecast.json",
            "forecast_history.jsonl", "calibration.csv", "config.json", "summary.json")
#: the short span of the run tests: every demo frame from 2055 on (covers the last minimum, 2056.6, +-0.5 yr)
SPAN_FIRST = "kvm_2055"
THREE_SIGMA = 3.0


def _truth() -> dict:
    return json.loads((DEMO / "truth.json").read_text())


def _json(path: Path):
    return json.loads(path.read_text())


def _without_notes(err: str) -> str:
    """stderr without the ``polecast: note:`` lines (how the phase was chosen; said once, not an error)."""
    return "\n".join(ln for ln in err.splitlines() if not ln.startswith("polecast: note: "))


def _one_line(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert "Traceback" not in err
    return lines[0]


# -- the demo against the synthetic star's truth ------------------------------------------------------------

def _demo_records(demo_run):
    with open_store(demo_run.store) as st:
        return list(st.iter_records(measure=check_measure_settings(st, demo_measure())))


def test_demo_final_reversals_recover_the_truth(demo_run):
    """Closed-loop truth (truth.json final_reversals and final_dipole_reversal): issue 11 requires each truth
    inside its 90 % interval (noise and the systematic ensemble); the 0.25-yr bound on the epoch itself is
    issue 7's requirement (about three rotations), not a derived tolerance."""
    assert demo_run.exit_code == 0, demo_run.stderr[-2000:]
    summary = _json(demo_run.out / "summary.json")
    truth = _truth()
    finals = dict(truth["final_reversals"], dipole=truth["final_dipole_reversal"])
    for pole in ("north", "south", "dipole"):
        final = summary["reversals"][pole]["final"]
        assert final["level"] == 0.9 and final["resolved"] is True
        assert final["low"] <= finals[pole] <= final["high"], (pole, finals[pole], final)
        assert abs(final["time"] - finals[pole]) <= 0.25
        assert final["high"] - final["low"] < 1.0   # an interval that says something (measured 0.44-0.66 yr)
    assert summary["frames"] == 244 and summary["ingest"]["new_ok"] == 244   # demo_fits/README.md: 244 files


def test_demo_band_reversals_hold_the_true_band_epochs(demo_run):
    """Closed-loop truth: truth_br.nc (the star's true axisymmetric Br, 1-deg bins, 5-day steps) gives each
    band's true cap mean (sphere-area weights cos(lat), handbook) and its final persistent crossing; the
    demo's 90 % band intervals must hold them.  Issue 11 saw 5 of 7 south bands miss; measured 14 of 14
    inside, median width 0.44 yr (2026-12).  Required: at least 12 of 14 (90 % less two binomial sd for 14
    bands, sqrt(0.9 * 0.1 / 14) = 0.08), median width under 1 yr."""
    import numpy as np
    import xarray as xr

    from pipeline.reversal import persistent_crossings
    from pipeline.timeutil import decimal_year

    rev = _json(demo_run.out / "reversals.json")
    with xr.open_dataset(DEMO / "truth_br.nc") as ds:
        lat, br = ds["latitude"].values, ds["br"].values
        t = np.atleast_1d(decimal_year(ds["time"].values))
    w = np.cos(np.radians(lat))
    hits, widths = 0, []
    for pole, sign in (("north", 1.0), ("south", -1.0)):
        for boundary, res in rev["bands"][pole].items():
            sel = sign * lat >= float(boundary)
            truth = persistent_crossings(t, (br[sel] * w[sel, None]).sum(0) / w[sel].sum(), 0.4)[-1][0]
            f = res["final"]
            assert f is not None and f["level"] == 0.9, (pole, boundary)
            hits += f["low"] <= truth <= f["high"]
            widths.append(f["high"] - f["low"])
    assert hits >= 12 and float(np.median(widths)) < 1.0, (hits, widths)


def test_measured_visible_cap_precursor_matches_the_visible_truth(demo_run):
    """Like for like: the precursor of the measured visible-cap means (b0_method "visible") against the same
    precursor of the exact visible-cap truth of the same frames (truth_frames.csv, closed-loop truth), same
    rotations, same window.  Both series carry the same per-frame errors, so the only difference is the
    measurement; the tolerance is 3 sigma of its noise, sigma = the window mean's propagated error
    sqrt(sum sigma_i^2) / n of the rotations (``measurement_error_gauss``, 0.028 G here since the
    noise-weighted cap means of measurement version 2; 0.049 G before), plus the pixel-centre sampling
    bias of the steep polar profile at 256 px, at most 5 % of the value (DEVELOPERS.md, known rough
    edges: 1-5 %; the closed-loop measurement of tests/test_measure.py).  The gap seen is +0.101 G
    (2.9 %, measured 2026-12; +0.087 G with the area-weighted means of version 1)."""
    records = _demo_records(demo_run)
    with open(DEMO / "truth_frames.csv", newline="") as fh:
        rows = {r["file"]: r for r in csv.DictReader(fh)}
    assert len(records) == len(rows) == 244
    true_records = [dataclasses.replace(r, north_br_gauss=float(rows[Path(r.file).name]["north_visible_br_gauss"]),
                                        south_br_gauss=float(rows[Path(r.file).name]["south_visible_br_gauss"]))
                    for r in records]
    config = load_config(DEMO_CONFIG)
    visible = dataclasses.replace(config.series, b0_method="visible")
    minimum = _json(demo_run.out / "forecast.json")["minimum_time"]
    kw = dict(kind=config.forecast.precursor_kind, window_years=config.forecast.window_years)
    measured = precursor_at(polar_series(records, visible), minimum, **kw)
    true = precursor_at(polar_series(true_records, visible), minimum, **kw)
    assert measured["n_rotations"] == true["n_rotations"] >= 10
    sigma = measured["measurement_error_gauss"]
    sampling_bias = 0.05 * abs(true["precursor_gauss"])   # DEVELOPERS.md: 1-5 % at <= 512 px
    assert abs(measured["precursor_gauss"] - true["precursor_gauss"]) <= THREE_SIGMA * sigma + sampling_bias
    # the visible part reads far below the whole cap (truth.json 4.93 G): only like may be compared with like
    assert _truth()["precursor_at_last_minimum"] - true["precursor_gauss"] > 10 * sigma


def test_forecast_precursor_matches_the_whole_cap_truth_within_its_stated_error(demo_run):
    """The demo's forecast precursor (b0_method "fill", which estimates the whole cap from the frames that saw
    its hidden part) against the whole-cap truth (truth.json precursor_at_last_minimum, closed-loop truth),
    both mean |(N - S)/2| within +-0.5 yr of the same minimum.  No scale factor: both are whole-cap means.
    Tolerance 3 sigma with sigma = hypot(the stated precursor error, the truth's own standard error):
    3 x hypot(0.105, 0.046) = 0.34 G here; the gap seen is -0.083 G (measured 2026-12)."""
    fc = _json(demo_run.out / "forecast.json")
    truth = _truth()
    assert fc["precursor_detail"]["route"] == "minimum"
    assert fc["minimum_time"] == pytest.approx(truth["last_minimum_time"], abs=0.01)
    sigma = math.hypot(fc["precursor_error"], truth["precursor_at_last_minimum_error"])
    assert abs(fc["precursor"] - truth["precursor_at_last_minimum"]) <= THREE_SIGMA * sigma


def test_forecast_equals_the_forecast_of_the_true_precursor_within_the_propagated_error(demo_run):
    """The forecast made from the true precursor (closed-loop truth) with the same calibration: an OLS
    forecast is the fitted line at the precursor, A = a + b P (Draper & Smith 1998, Applied Regression
    Analysis, sec. 1.4), so the two amplitudes differ by exactly b (P - P_true), and by at most |b| times the
    precursor's 3-sigma bound above.  The truth's next amplitude (130.7) lies inside both 95 % intervals."""
    fc = _json(demo_run.out / "forecast.json")
    truth = _truth()
    config = load_config(DEMO_CONFIG)
    table = read_calibration_csv(DEMO / "calibration.csv")
    p_true = truth["precursor_at_last_minimum"]
    from_truth = forecast_amplitude(table, p_true, config.forecast,
                                    precursor_error=truth["precursor_at_last_minimum_error"]).to_dict()
    assert fc["method"] == from_truth["method"] == "ols"
    assert fc["slope"] == pytest.approx(from_truth["slope"], rel=1e-12)
    gap = fc["amplitude"] - from_truth["amplitude"]
    assert gap == pytest.approx(fc["slope"] * (fc["precursor"] - p_true), rel=1e-9, abs=1e-9)
    sigma = math.hypot(fc["precursor_error"], truth["precursor_at_last_minimum_error"])
    assert abs(gap) <= abs(fc["slope"]) * THREE_SIGMA * sigma
    for f in (fc, from_truth):
        assert f["interval_95"][0] <= truth["next_amplitude"] <= f["interval_95"][1]
        assert f["interval_95"][0] < f["interval_68"][0] < f["amplitude"] < f["interval_68"][1] < f["interval_95"][1]


def test_demo_prints_the_outcome_and_writes_every_product_whole(demo_run):
    """Every product parses and says what the run computed; the page embeds each figure on disk (RFC 2397
    data URIs); no temporary file is left behind (regression only)."""
    import base64

    import xarray as xr

    out = demo_run.out
    summary = _json(out / "summary.json")
    fc = _json(out / "forecast.json")
    lines = demo_run.stdout.splitlines()
    assert lines[0] == "ingest: 244 new (244 ok, 0 skipped), 0 already known"
    assert f"next-cycle amplitude: {fc['amplitude']:.1f} (68%: {fc['interval_68'][0]:.1f}-" in demo_run.stdout
    assert "truth: next-cycle amplitude 130.7 (inside the 95% interval)" in lines
    assert lines[-2] == f"report: {out / 'report' / 'index.html'}"
    with xr.open_dataset(out / "series.nc") as ds:
        assert ds.sizes["time"] == 244 and ds.attrs["b0_method"] == "fill"
    with xr.open_dataset(out / "latitude_time.nc") as ds:
        assert ds.sizes["rotation"] > 200
    assert _json(out / "reversals.json")["north"]["final"] == summary["reversals"]["north"]["final"]
    assert _json(out / "cycles.json")["cycles"] == summary["cycles"]
    # the data date is that of the newest frame (demo_fits/: kvm_20571101_000000.fits)
    newest = demo_files()[-1].name        # kvm_YYYYMMDD_HHMMSS.fits
    assert summary["forecast"] == fc and fc["data_date"] == f"{newest[4:8]}-{newest[8:10]}-{newest[10:12]}"
    history = (out / "forecast_history.jsonl").read_text().splitlines()
    assert len(history) == 1 and json.loads(history[0])["amplitude"] == fc["amplitude"]
    assert (out / "calibration.csv").read_bytes() == (DEMO / "calibration.csv").read_bytes()
    assert _json(out / "config.json")["measure"] == dataclasses.asdict(demo_measure())
    page = (out / "report" / "index.html").read_text()
    prefix = "data:image/png;base64,"
    embedded = sorted(base64.b64decode(chunk.split('"', 1)[0]) for chunk in page.split(prefix)[1:])
    assert embedded == sorted((out / "report" / "figures" / n).read_bytes() for n in FIGURES)
    assert sorted(p.name for p in out.rglob("*.tmp")) == []


def test_demo_forecasts_on_the_phase_matched_route(demo_run):
    """Issue 10: the demo's precursor is taken at the phase the data stand at (the confirmed minimum of the
    synthetic star, truth.json last_minimum_time) and regressed only on calibration rows of that phase (the
    rows of demo_fits/calibration.csv whose phase column says so, counted here with the csv module); the state
    says which minimum, its status and the target cycle (the second cycle of truth.json, counted from the
    sunspot file's first minimum as pipeline.asof numbers them)."""
    fc = _json(demo_run.out / "forecast.json")
    truth = _truth()
    with open(DEMO / "calibration.csv", newline="") as fh:
        phases = [row["phase"] for row in csv.DictReader(fh)]
    assert len(set(phases)) > 1                       # a table of several phases, as polecast synth writes it
    assert fc["phase"] == "minimum" and fc["lag_years"] is None and fc["precursor_detail"]["route"] == "minimum"
    assert fc["n_cycles"] == phases.count("minimum")
    assert fc["minimum_status"] == "confirmed"
    assert fc["minimum_time"] == pytest.approx(truth["last_minimum_time"], abs=0.01)
    assert fc["target_cycle"] == len(truth["cycles"])
    assert fc["reversal_time"] == pytest.approx(truth["final_dipole_reversal"], abs=0.25)
    summary = _json(demo_run.out / "summary.json")
    assert summary["forecast_unavailable"] is None
    assert summary["precursor"]["phase"] == "minimum" and summary["precursor"]["minimum_status"] == "confirmed"
    # the declared sunspot-number version and layout (configs/demo.toml [cycles]) are carried into the summary
    assert summary["sunspot_input"]["sunspot_number_version"] == load_config(DEMO_CONFIG).cycles.sunspot_number_version
    assert summary["sunspot_input"]["format_source"] == "declared"
    assert "note: sunspot file" not in demo_run.stderr     # a declared layout is no fallback: nothing to say


def test_demo_trajectory_is_the_forecast_as_known_on_each_date(demo_run, tmp_path, capsys):
    """Issue 10 (report: the forecast trajectory): trajectory.json holds the run's forecast as of every third
    month start (configs/demo.toml) from the final dipole reversal to the newest frame.  A row is what a run
    given only the frames and sunspot months from before its date forecasts (an independent run on the cut
    data; causal as the issue asks).  Truths: target 1's smoothed maximum and target 2's next amplitude of the
    synthetic star (truth.json, closed-loop truth; 0.05 = the rounding of the sunspot file's one decimal)."""
    from pipeline.asof import as_of_instant

    traj = _json(demo_run.out / "trajectory.json")
    step = load_config(DEMO_CONFIG).run.trajectory_step_months
    assert traj["step_months"] == step == 3
    rows = traj["rows"]
    months = [int(r["as_of"][:4]) * 12 + int(r["as_of"][5:7]) for r in rows]
    assert all(r["as_of"].endswith("-01") for r in rows) and set(np_diff(months)) == {step}
    final = _json(demo_run.out / "summary.json")["reversals"]["dipole"]["final"]["time"]
    assert final < as_of_instant(rows[0]["as_of"]).decimal_year < final + step / 12
    newest = demo_files()[-1].name          # kvm_YYYYMMDD_...: the last date is within a step of it, or the
    newest_month = int(newest[4:8]) * 12 + int(newest[8:10])   # month start just after it
    assert -1 <= newest_month - months[-1] < step
    truth = _truth()
    made = [r for r in rows if r["amplitude"] is not None]
    assert {r["target_cycle"] for r in made} == {1, 2} and len(made) > len(rows) / 2
    for r in made:
        want = truth["cycles"][0]["maximum_value"] if r["target_cycle"] == 1 else truth["next_amplitude"]
        assert r["truth_amplitude"] == pytest.approx(want, abs=0.05)
        assert r["interval_95"][0] < r["interval_68"][0] < r["amplitude"] < r["interval_68"][1] < r["interval_95"][1]
    for r in rows:
        assert (r["amplitude"] is None) == (r["forecast_unavailable"] is not None)

    row = next(r for r in made if r["phase"] == "reversal+4")
    cut_at = as_of_instant(row["as_of"])
    before = write_sunspots_before((tmp_path / "cut").mkdir() or tmp_path / "cut" / "sunspots.csv",
                                   cut_at.decimal_year)
    conf, out, _ = _cut_run(tmp_path / "cut", demo_run, "", "kvm_" + row["as_of"].replace("-", ""), sunspots=before)
    out.mkdir()
    (out / "trajectory.json").write_text("{}")   # left by an earlier configuration that asked for one
    assert main(["run", str(conf)]) == 0
    capsys.readouterr()
    assert not (out / "trajectory.json").exists()   # this configuration asks for none: not shown stale
    fc = _json(out / "forecast.json")
    for key in ("phase", "target_cycle", "data_date", "minimum_time", "minimum_status", "precursor",
                "precursor_error", "amplitude", "interval_68", "interval_95"):
        assert fc[key] == row[key], key


def np_diff(values):
    return [b - a for a, b in zip(values, values[1:])]


# -- polecast run: incremental, exit codes ------------------------------------------------------------------

def _seeded(tmp_path: Path, demo_run, *, hold_back: int = 0, extra: str = "", store_in_products=False):
    """Archive of the short span (minus the last ``hold_back`` frames), a store seeded with its records, a config."""
    files = demo_files(SPAN_FIRST)
    held = files[len(files) - hold_back:] if hold_back else []
    links = link_archive(tmp_path / "archive", files[:len(files) - hold_back])
    out = tmp_path / "products"
    store = (out if store_in_products else tmp_path) / "store.sqlite"
    store.parent.mkdir(parents=True, exist_ok=True)
    seed_store(demo_run.store, store, links)
    conf = write_run_config(tmp_path / "run.toml", tmp_path / "archive", out, store=store, extra=extra)
    return conf, out, store, held, len(links)


def _products(out: Path) -> dict:
    keep = {name: _json(out / name) for name in ("reversals.json", "cycles.json")}
    forecast = _json(out / "forecast.json")
    keep["forecast"] = {k: forecast[k] for k in ("amplitude", "interval_68", "interval_95", "precursor", "r",
                                                 "loo_rmse", "data_date")}
    return keep


def test_run_is_incremental_and_appends_one_history_entry_per_update(tmp_path, demo_run, capsys):
    """Issue 7: a run with no new files measures nothing and gives the same products and no history entry;
    with new files it measures only those and appends one entry (exit 0 each time)."""
    conf, out, _, held, n = _seeded(tmp_path, demo_run, hold_back=2)
    assert main(["run", str(conf)]) == 0
    first = capsys.readouterr()
    assert first.out.splitlines()[0] == f"ingest: 0 new (0 ok, 0 skipped), {n} already known"
    # nothing skipped, nothing refused: at most a note on how the phase was chosen (the span holds no reversal)
    assert all(ln.startswith("polecast: note: ") for ln in first.err.splitlines()), first.err
    history = out / "forecast_history.jsonl"
    assert len(history.read_text().splitlines()) == 1
    before = _products(out)

    assert main(["run", str(conf)]) == 0
    assert capsys.readouterr().out.splitlines()[0] == f"ingest: 0 new (0 ok, 0 skipped), {n} already known"
    assert _products(out) == before
    assert len(history.read_text().splitlines()) == 1  # nothing new: no entry appended

    old_history = history.read_bytes()
    for f in held:
        os.symlink(f, tmp_path / "archive" / f.name)
    assert main(["run", str(conf)]) == 0
    assert capsys.readouterr().out.splitlines()[0] == f"ingest: 2 new (2 ok, 0 skipped), {n} already known"
    lines = history.read_text().splitlines()
    assert len(lines) == 2 and history.read_bytes().startswith(old_history)  # appended, never rewritten
    dates = [json.loads(line)["data_date"] for line in lines]
    assert dates[0] < dates[1] == _json(demo_run.out / "forecast.json")["data_date"]  # the demo's newest data


def test_run_exit_1_when_a_new_file_is_skipped(tmp_path, demo_run, capsys):
    """Exit 1 (some input skipped): the bad file gets one line on stderr with its reason; the products are
    written from the rest."""
    conf, out, _, _, n = _seeded(tmp_path, demo_run)
    bad = tmp_path / "archive" / "kvm_20571129_000000.fits"
    bad.write_text("not a FITS file\n" * 10)
    assert main(["run", str(conf)]) == 1
    cap = capsys.readouterr()
    assert cap.out.splitlines()[0] == f"ingest: 1 new (0 ok, 1 skipped: 1 not a FITS file), {n} already known"
    assert _one_line(_without_notes(cap.err)).startswith(f"polecast: skipped {bad}: ")
    assert _json(out / "forecast.json")["data_date"] == _json(demo_run.out / "forecast.json")["data_date"]
    assert _json(out / "summary.json")["ingest"]["new_skipped"] == 1


def _cut_run(tmp_path: Path, demo_run, first: str, last: str, **kw):
    """A run of the demo frames named within [first, last] from a seeded store; (config, products, frames)."""
    links = link_archive(tmp_path / "archive", demo_files(first, last))
    store = seed_store(demo_run.store, tmp_path / "store.sqlite", links)
    conf = write_run_config(tmp_path / "run.toml", tmp_path / "archive", tmp_path / "products", store=store, **kw)
    return conf, tmp_path / "products", links


def _stderr_reason(err: str) -> str:
    """The one ``polecast: no forecast: ...`` line of stderr (notes may precede it; no traceback)."""
    assert "Traceback" not in err
    lines = [ln for ln in err.splitlines() if ln.startswith("polecast: no forecast: ")]
    assert len(lines) == 1, err
    return lines[0][len("polecast: no forecast: "):]


@pytest.mark.parametrize("case", ["before the reversal", "window incomplete", "no calibration rows of the phase"])
def test_run_without_a_forecast_writes_everything_and_exits_3(tmp_path, demo_run, capsys, case):
    """Issue 10, never abort for want of a forecast: the series, reversals, cycles and summary are written,
    summary.json has "forecast": null and the one-line reason, the ingest line is printed, no history entry
    is made, and the exit code is 3 (pipeline.cli.forecast.EXIT_NO_FORECAST; 2 stays usage/configuration).

    Cases on parts of the demo archive, against the synthetic star's truth (truth.json): frames of
    2044-2045 end before its final dipole reversal (2047.66); frames of 2046 to mid-2049 end before the
    reversal+2 window is complete (reversal + 2 + 0.5 yr = 2050.2, the window half-width of configs/demo.toml);
    frames of 2046-2054 reach the reversal+6 window (ends 2054.2) but the calibration keeps only its
    'minimum' rows (regression only for the wording)."""
    truth = _truth()
    if case == "before the reversal":
        conf, out, links = _cut_run(tmp_path, demo_run, "kvm_2044", "kvm_2046")
        want = "no dipole reversal"
    elif case == "window incomplete":
        conf, out, links = _cut_run(tmp_path, demo_run, "kvm_2046", "kvm_20496")
        want = "has a complete window yet"
    else:
        tmp_path.mkdir(exist_ok=True)
        cal = write_calibration(tmp_path / "calibration.csv", ["minimum"])
        conf, out, links = _cut_run(tmp_path, demo_run, "kvm_2046", "kvm_2055", calibration=cal,
                                    report=True)
        want = "at phase 'reversal+6'"
    assert main(["run", str(conf)]) == 3
    cap = capsys.readouterr()
    reason = _stderr_reason(cap.err)
    assert want in reason
    assert cap.out.splitlines()[0] == f"ingest: 0 new (0 ok, 0 skipped), {len(links)} already known"
    assert f"no forecast: {reason}" in cap.out.splitlines()
    summary = _json(out / "summary.json")
    assert summary["forecast"] is None and summary["forecast_unavailable"] == reason
    assert "\n" not in reason and summary["cautions"] and summary["frames"] == len(links)
    for name in ("series.nc", "latitude_time.nc", "reversals.json", "cycles.json", "config.json"):
        assert (out / name).is_file(), name
    fc = _json(out / "forecast.json")
    assert fc["forecast_unavailable"] == reason and "amplitude" not in fc and fc["cautions"]
    assert not (out / "forecast_history.jsonl").exists()
    if case == "no calibration rows of the phase":
        # the phase is the largest configured lag whose window is complete: 6 (truth's reversal + 6 + 0.5 yr
        # < the newest frame's time), and the state says so
        assert summary["precursor"]["phase"] == fc["phase"] == "reversal+6" and fc["lag_years"] == 6.0
        assert truth["final_dipole_reversal"] + 6.5 < 2055.0
        assert fc["target_cycle"] == len(truth["cycles"])
        page = (out / "report" / "index.html").read_text(encoding="utf-8")
        assert "No forecast" in page and html_escape(reason) in page
    else:
        assert summary["precursor"]["phase"] is None


def html_escape(text: str) -> str:
    import html

    return html.escape(text, quote=True)


def test_history_entries_record_phase_minimum_target_and_the_calibration(tmp_path, demo_run, capsys):
    """Issue 10: each history entry records the phase, the lag, the minimum used with its status, the target
    cycle, the calibration file's digest and its declared scale.  Expected: the synthetic star's truth
    (truth.json: last minimum, cycles, calibration_scale) and the file's BLAKE2b-256 digest computed here with
    hashlib (RFC 7693).  A new calibration file is a new forecast: it appends an entry even with no new data."""
    import hashlib

    conf, out, _, _, _ = _seeded(tmp_path, demo_run)
    assert main(["run", str(conf)]) == 0
    capsys.readouterr()
    truth = _truth()
    (entry,) = [json.loads(line) for line in (out / "forecast_history.jsonl").read_text().splitlines()]
    assert entry["phase"] == "minimum" and entry["lag_years"] is None
    assert entry["minimum_time"] == pytest.approx(truth["last_minimum_time"], abs=0.01)
    assert entry["minimum_status"] == "confirmed"
    assert entry["target_cycle"] == len(truth["cycles"])
    data = (DEMO / "calibration.csv").read_bytes()
    assert entry["calibration_digest"] == hashlib.blake2b(data, digest_size=32).hexdigest()
    assert entry["calibration_scale"] == truth["calibration_scale"]
    assert entry["as_of"] is None and entry["amplitude"] == _json(out / "forecast.json")["amplitude"]

    other = write_calibration(tmp_path / "minimum_only.csv", ["minimum"])
    conf.write_text(conf.read_text().replace(str(DEMO / "calibration.csv"), str(other)))
    assert main(["run", str(conf)]) == 0
    capsys.readouterr()
    entries = [json.loads(line) for line in (out / "forecast_history.jsonl").read_text().splitlines()]
    assert len(entries) == 2 and entries[1]["data_date"] == entries[0]["data_date"]
    assert entries[1]["calibration_digest"] == hashlib.blake2b(other.read_bytes(), digest_size=32).hexdigest()
    assert entries[1]["amplitude"] == pytest.approx(entries[0]["amplitude"], rel=1e-12)  # the same minimum rows


def test_a_calibration_of_another_scale_is_exit_2_with_every_other_product_written(tmp_path, demo_run, capsys):
    """Issue 10: a calibration whose declared scale differs from the store's measurement definition is a
    configuration error (exit 2, one line naming both scales), not an abort: the series, reversals, cycles
    and summary (forecast null, the reason) are written.  The demo table declares the synthetic truth's
    scale (truth.json calibration_scale), the store measures through the B0 fill (configs/demo.toml)."""
    conf, out, links = _cut_run(tmp_path, demo_run, SPAN_FIRST, "z", allow_scale_mismatch=False)
    assert main(["run", str(conf)]) == 2
    cap = capsys.readouterr()
    reason = _stderr_reason(cap.err)
    assert repr(_truth()["calibration_scale"]) in reason and "b0_method=fill" in reason
    summary = _json(out / "summary.json")
    assert summary["forecast"] is None and summary["forecast_unavailable"] == reason
    assert cap.out.splitlines()[0] == f"ingest: 0 new (0 ok, 0 skipped), {len(links)} already known"
    for name in ("series.nc", "reversals.json", "cycles.json"):
        assert (out / name).is_file(), name
    assert not (out / "forecast_history.jsonl").exists()


def test_as_of_run_forecasts_with_what_was_known_then(tmp_path, demo_run, capsys):
    """Issue 10, [forecast] as_of: a run over the whole archive as of 2054-01-01 gives the forecast of a run
    given only the frames and the sunspot months from before that date (the causality the issue asks for;
    the two runs share nothing else).  Between the reversal and the minimum the phase is a reversal+L."""
    as_of = "2054-01-01"
    full, full_out, _ = _cut_run(tmp_path / "full", demo_run, "kvm_2046", "z", forecast=f'as_of = "{as_of}"')
    before = write_sunspots_before((tmp_path / "cut").mkdir() or tmp_path / "cut" / "sunspots.csv", 2054.0)
    cut, cut_out, _ = _cut_run(tmp_path / "cut", demo_run, "kvm_2046", "kvm_20531231", sunspots=before)
    assert main(["run", str(full)]) == 0
    assert main(["run", str(cut)]) == 0
    capsys.readouterr()
    a, b = _json(full_out / "forecast.json"), _json(cut_out / "forecast.json")
    assert a["as_of"] == as_of and b["as_of"] is None
    assert a["phase"].startswith("reversal+")
    for key in ("phase", "lag_years", "minimum_time", "minimum_status", "reversal_time", "target_cycle", "data_date",
                "precursor", "precursor_error", "amplitude", "interval_68", "interval_95", "n_cycles"):
        assert a[key] == b[key], key
    # the products of the whole archive still describe all of it
    assert _json(full_out / "summary.json")["frames"] > _json(cut_out / "summary.json")["frames"]


def _foreign_record(store: Path, demo_file: Path, measure: MeasureSettings) -> None:
    """Add one record under other measure settings, at a path outside the run's archive."""
    with open_store(store, "r") as st:
        rec = next(st.iter_records())
    st_ = os.stat(demo_file)
    d = dict(rec.to_dict(), file=str(demo_file))
    with open_store(store, "a") as st:
        st.add([MeasuredFile(str(demo_file), st_.st_size, st_.st_mtime_ns, file_digest(demo_file), d)],
               st.register_config(measure))
        st.commit()


def test_run_exit_2_configuration_and_usage_errors_in_one_line(tmp_path, demo_run, capsys):
    """Exit 2 with one line on stderr that names the key or the cause (pipeline/cli/__init__.py contract)."""
    def run(conf):
        code = main(["run", str(conf)])
        return code, _one_line(capsys.readouterr().err)

    conf = tmp_path / "bad.toml"
    conf.write_text('[run]\narchive = ["x"]\nsunspots = "missing.csv"\ncalibration = "c.csv"\n')
    code, err = run(conf)
    assert code == 2 and "run.sunspots" in err and "does not exist" in err
    conf.write_text('[run]\nscheduler = "localhost:8786"\n')
    code, err = run(conf)
    assert code == 2 and "run.scheduler" in err and "tcp://" in err
    conf.write_text('[run]\ntrajectory_step_months = -1\n')
    code, err = run(conf)
    assert code == 2 and "run.trajectory_step_months" in err
    conf.write_text('[run]\ntrajectory_start = "soon"\n')
    code, err = run(conf)
    assert code == 2 and "run.trajectory_start" in err and "YYYY-MM-DD" in err
    conf.write_text('[series]\nb0_method = "guess"\n')
    code, err = run(conf)
    assert code == 2 and "series.b0_method" in err and "'fill'" in err
    code, err = run(tmp_path / "absent.toml")
    assert code == 2 and "absent.toml not found" in err

    good, out, store, _, _ = _seeded(tmp_path / "s", demo_run)
    text = good.read_text()
    bad_truth = tmp_path / "truth.json"
    bad_truth.write_text("[1, 2]")
    conf.write_text(text.replace("[run]\n", f'[run]\ntruth = "{bad_truth}"\n', 1))
    code, err = run(conf)
    assert code == 2 and "run.truth" in err and "final_reversals" in err
    assert not out.exists()  # refused before anything was written

    out.mkdir()
    with run_lock(out) as lock:  # the products folder held by another run
        code, err = run(good)
        assert code == 2 and f"products directory {out} is in use by another `polecast run` (pid {os.getpid()} " in err
        assert lock == out / RUN_LOCK_NAME
    assert sorted(p.name for p in out.iterdir()) == [RUN_LOCK_NAME]  # nothing written while refused

    # a store holding records measured under other settings (remeasure cannot reach a file outside the
    # archive): the settings in force are refused, never mixed (pipeline.store.check_measure_settings)
    _foreign_record(store, demo_files("kvm_2050")[0], MeasureSettings(cap_latitude_deg=70.0))
    conf.write_text(text.replace("[run]\n", "[run]\nremeasure = true\n", 1))
    code, err = run(conf)
    assert code == 2 and "cap_latitude_deg" in err and "70" in err
    assert not (out / "forecast.json").exists()


# -- one run at a time; products whole ----------------------------------------------------------------------

def test_a_second_run_of_one_configuration_is_refused_while_the_first_holds_it(tmp_path, demo_run, monkeypatch,
                                                                               capsys):
    """Two runs at once: the first is held between reading the history and appending to it (the window in
    which two unlocked runs would both append the same update); the second is refused in one line (exit 2),
    the first finishes, and the history holds one whole entry (regression only)."""
    import pipeline.history

    conf, out, _, _, _ = _seeded(tmp_path, demo_run)
    real_append = pipeline.history.append_history
    inside, release = threading.Event(), threading.Event()

    def held_append(path, entry):
        if threading.current_thread().name == "first-run":
            inside.set()
            assert release.wait(120)
        real_append(path, entry)

    monkeypatch.setattr(pipeline.history, "append_history", held_append)
    from pipeline.cli.run import _load

    outcome = {}

    def first():
        try:
            outcome["result"] = run_pipeline(_load(conf))
        except BaseException as exc:  # reported by the assertions below
            outcome["error"] = exc

    thread = threading.Thread(target=first, name="first-run")
    thread.start()
    try:
        assert inside.wait(120), outcome
        code = main(["run", str(conf)])
        err = capsys.readouterr().err
    finally:
        release.set()
        thread.join(120)
    assert code == 2 and "is in use by another `polecast run`" in _one_line(err)
    assert "error" not in outcome and outcome["result"].exit_code == 0
    lines = (out / "forecast_history.jsonl").read_text().splitlines()
    assert len(lines) == 1 and json.loads(lines[0])["data_date"] == _json(demo_run.out / "forecast.json")["data_date"]
    for name in PRODUCTS:
        if name.endswith(".json"):
            assert isinstance(_json(out / name), dict), name


def test_a_dead_run_releases_its_lock(tmp_path):
    """flock(2): the kernel releases a lock when its holder dies, even by SIGKILL (common practice, no source)."""
    code = ("import sys, time\nfrom pipeline.run import run_lock\nwith run_lock(sys.argv[1]):\n"
            "    print('held', flush=True)\n    time.sleep(300)\n")
    proc = subprocess.Popen([sys.executable, "-c", code, str(tmp_path)], stdout=subprocess.PIPE, text=True,
                            cwd=REPO, start_new_session=True)
    try:
        assert proc.stdout.readline().strip() == "held"
        with pytest.raises(RunLockedError, match=f"in use by another `polecast run` \\(pid {proc.pid} "):
            with run_lock(tmp_path):
                pass
    finally:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(30)
        proc.stdout.close()
    with run_lock(tmp_path) as path:
        assert path.read_text().startswith(f"pid {os.getpid()} on ")


def test_a_crash_while_writing_a_product_leaves_the_old_product(tmp_path, demo_run, monkeypatch, capsys):
    """A write that fails half-way (a torn netCDF file, then ENOSPC) leaves every product of the previous run
    byte for byte and no temporary file; the run exits 2 with the reason (regression only)."""
    import xarray as xr

    conf, out, _, _, _ = _seeded(tmp_path, demo_run)
    assert main(["run", str(conf)]) == 0
    capsys.readouterr()
    before = {p.name: p.read_bytes() for p in out.iterdir() if p.name != RUN_LOCK_NAME}
    assert set(before) == set(PRODUCTS)

    def torn(self, path, *args, **kwargs):
        Path(path).write_bytes(b"\x89HDF\r\n\x1a\n" + b"\0" * 64)  # the HDF5 signature, then nothing
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(xr.Dataset, "to_netcdf", torn)
    assert main(["run", str(conf)]) == 2
    assert "No space left on device" in _one_line(capsys.readouterr().err)
    after = {p.name: p.read_bytes() for p in out.iterdir() if p.name != RUN_LOCK_NAME}
    assert after == before


def test_sigint_mid_ingest_exits_130_in_one_line_and_keeps_committed_work(tmp_path):
    """Ctrl-C (SIGINT to the whole process group, as a terminal sends it) while `polecast run` measures:
    exit 130, one line on stderr, no traceback; the records committed before it are in the store, the store
    and the products folder are unlocked, and no product was half written (contract of pipeline/cli)."""
    files = demo_files(SPAN_FIRST)[:30]
    link_archive(tmp_path / "archive", files)
    out = tmp_path / "products"
    store = tmp_path / "store.sqlite"
    conf = write_run_config(tmp_path / "run.toml", tmp_path / "archive", out, store=store,
                            extra="[ingest]\nworkers = 1\nmeasure_chunk_files = 1\ncommit_every_files = 2\n")
    proc = subprocess.Popen([sys.executable, "-m", "pipeline", "run", str(conf)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, cwd=REPO, start_new_session=True)
    try:
        deadline = time.monotonic() + 180
        while committed_rows(store) < 4 and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.02)
        at_signal = committed_rows(store)
        os.killpg(proc.pid, signal.SIGINT)
        stdout, stderr = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    assert 4 <= at_signal < len(files), f"the signal came too late ({at_signal} rows): nothing was interrupted"
    assert proc.returncode == 130, stderr
    assert _one_line(stderr) == "polecast run: interrupted; what was committed is kept, run again to carry on"
    with open_store(store, "a") as st:  # the writer lock was released
        kept = list(st.iter_records(status=None))
    assert len(kept) >= at_signal and all(r.status == "ok" for r in kept)
    assert {Path(r.file).name for r in kept} <= {f.name for f in files}
    with run_lock(out):
        pass
    assert sorted(p.name for p in out.iterdir()) == [RUN_LOCK_NAME]
