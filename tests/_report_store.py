"""Test helper: a small store with a polarity reversal, skipped files (one with a hostile name) and products."""

from __future__ import annotations

import dataclasses
import json
import math
import os

import numpy as np

from pipeline.batch import scan_paths
from pipeline.measure import measure_file
from pipeline.store import MeasuredFile, file_digest, open_store
from tests._frames import make_observer, write_frame

#: a path component that would run as script if the page did not escape it
HOSTILE_NAME = "<script>alert(1)</script>.fits"
START_YR = 2031.0
STEP_YR = 0.09            # about 1.2 Carrington rotations between frames
N_FRAMES = 28
NORTH_REVERSAL_YR = 2032.2   # the synthetic north field changes sign here
SOUTH_REVERSAL_YR = 2032.5
#: when and how the forecast's precursor was taken (invented state keys, as pipeline.asof writes them)
PRECURSOR_STATE = {
    "phase": "reversal+1", "lag_years": 1.0, "reversal_time": 2032.2, "minimum_time": 2035.4,
    "minimum_status": "pending", "target_cycle": 8, "data_date": "2033-06-01", "as_of": None,
    "phase_requested": "auto", "phase_notes": ["the cycle minimum candidate at 2035.400 is pending"],
    "provisional_reasons": ["the final dipole reversal may move"], "precursor_source": "store",
    "precursor_detail": {"time": 2033.2, "window_years": 0.25, "n_rotations": 7, "route": "after_reversal",
                         "kind": "dipole", "phase": "reversal+1"},
    "sunspot_input": {"sunspot_number_version": 2, "format": "semicolon-monthly", "format_source": "declared",
                      "months_used": 40},
}
#: history updates (data date, precursor, target cycle, phase): three for cycle 7 after its reversal, then two
#: for cycle 8 once the minimum beginning it is known (invented; the figure must not join the two targets)
HISTORY_UPDATES = (("2033-02-01", 1.2, 7, "reversal+2"), ("2033-03-01", 1.3, 7, "reversal+2"),
                   ("2033-04-01", 1.45, 7, "reversal+3"), ("2033-05-01", 1.7, 8, "minimum"),
                   ("2033-06-01", 1.5, 8, "minimum"))


def _date(year: float) -> str:
    from pipeline.timeutil import from_decimal_year, iso_time

    return iso_time(from_decimal_year(year)).rstrip("Z")


def _field(year: float):
    """``Br = B(t) sin^8(lat)`` per hemisphere; north changes sign at NORTH_REVERSAL_YR, south at SOUTH_..."""
    bn = -6.0 * math.tanh((year - NORTH_REVERSAL_YR) / 0.3)
    bs = 6.0 * math.tanh((year - SOUTH_REVERSAL_YR) / 0.3)

    def br(lat, lon):
        s = np.sin(np.deg2rad(lat))
        return np.where(lat >= 0, bn, bs) * s ** 8
    return br


def write_archive(root):
    """N_FRAMES good 64-px frames over ~2.5 years, plus an empty file and a text file under a hostile path."""
    root.mkdir(parents=True, exist_ok=True)
    for k in range(N_FRAMES):
        year = START_YR + STEP_YR * k
        obs = make_observer(b0_deg=7.25 * math.sin(2 * math.pi * (year - 2031.43)), crln_deg=(47.0 * k) % 360.0)
        write_frame(root / f"kvm_{k:03d}.fits", _field(year), observer=obs, size=64, date_obs=_date(year),
                    bscale=0.01)
    hostile = root / HOSTILE_NAME       # a directory "<script>alert(1)<" holding "script>.fits"
    hostile.parent.mkdir(parents=True, exist_ok=True)
    hostile.write_text("<b>not FITS</b> & certainly not a magnetogram\n" * 20)
    (root / "empty.fits").write_bytes(b"")
    return root


def build_store(tmp_path):
    """Measure the archive in this process and record it in ``tmp_path/store.polecast``; the store path.

    The same route as :func:`pipeline.batch.ingest` (scan, digest, measure, ``Store.add``) without a
    process pool, which keeps the fixture quick.
    """
    from pipeline.config import MeasureSettings

    archive = write_archive(tmp_path / "archive")
    store = tmp_path / "store.polecast"
    settings = MeasureSettings()
    results = []
    for path in scan_paths([str(archive)]):
        st = os.stat(path)
        rec = measure_file(path, settings)
        results.append(MeasuredFile(path, st.st_size, st.st_mtime_ns, file_digest(path), rec.to_dict()))
    with open_store(store, "a") as st:
        st.add(results, st.register_config(settings))
    return store


#: as-of dates of the trajectory (date, precursor or None for "no forecast", target cycle, phase): invented
TRAJECTORY_DATES = (("2032-06-01", None, 7, None), ("2032-09-01", 1.2, 7, "reversal+2"),
                    ("2032-12-01", 1.3, 7, "reversal+2"), ("2033-03-01", 1.4, 7, "reversal+3"),
                    ("2033-06-01", 1.6, 8, "minimum"), ("2033-09-01", 1.5, 8, "minimum"))
#: the amplitudes the two targets turned out to have (invented): cycle 7 from the sunspot series, cycle 8 the
#: synthetic star's truth
TRAJECTORY_TRUTH = {7: (95.0, "sunspot maximum"), 8: (112.0, "truth.json")}


def trajectory_document(table, config) -> dict:
    """A ``trajectory.json`` like pipeline.run writes, from the calibration ``table`` (invented dates)."""
    from pipeline.regression import forecast_amplitude

    rows = []
    for date, x, target, phase in TRAJECTORY_DATES:
        row = {"as_of": date, "data_date": date, "phase": phase, "target_cycle": target, "amplitude": None,
               "interval_68": None, "interval_95": None, "truth_amplitude": None, "truth_source": None,
               "forecast_unavailable": "no configured lag has a complete window yet"}
        if x is not None:
            f = forecast_amplitude(table, x, config.forecast).to_dict()
            amp, source = TRAJECTORY_TRUTH[target]
            row.update(amplitude=f["amplitude"], interval_68=f["interval_68"], interval_95=f["interval_95"],
                       precursor=x, truth_amplitude=amp, truth_source=source, forecast_unavailable=None)
        rows.append(row)
    return {"step_months": 3, "start": TRAJECTORY_DATES[0][0], "stop": TRAJECTORY_DATES[-1][0], "rows": rows}


#: hindcast skill per phase (invented; the keys of pipeline.hindcast.SKILL_KEYS), saved as products/hindcasts/
HINDCAST_SKILL = {
    "reversal+2": {"n": 9, "r": 0.61, "rmse": 24.0, "bias": 14.0, "median_relative_error": 0.11, "coverage_68": 0.56,
                   "coverage_95": 0.89},
    "reversal+5": {"n": 9, "r": 0.80, "rmse": 16.5, "bias": 4.0, "median_relative_error": 0.03, "coverage_68": 0.67,
                   "coverage_95": 1.0},
    "minimum": {"n": 10, "r": 0.88, "rmse": 12.0, "bias": -1.5, "median_relative_error": -0.01, "coverage_68": 0.7,
                "coverage_95": None},
}


def write_hindcasts(folder) -> None:
    """``polecast hindcast --format json``-shaped objects of HINDCAST_SKILL (no rows), a trajectory and a bad file."""
    folder.mkdir(parents=True, exist_ok=True)
    for phase, skill in HINDCAST_SKILL.items():
        (folder / f"{phase}.json").write_text(json.dumps({"phase": phase, "rows": [], "skill": skill,
                                                          "skipped": [], "notes": []}))
    (folder / "trajectory.json").write_text(json.dumps({"phase": "auto", "rows": [], "skill": {"n": 0}}))
    (folder / "zz-broken.json").write_text("{ not json")


def write_products(products, store):
    """Products like `polecast run` writes: series, diagram, reversals, cycles, forecast, history, trajectory,
    calibration."""
    from pipeline.aggregator import latitude_time_diagram, polar_series
    from pipeline.ncio import write_netcdf
    from pipeline.config import load_config
    from pipeline.history import append_history, history_entry
    from pipeline.regression import forecast_amplitude, read_calibration_csv
    from pipeline.reversal import series_reversals

    products.mkdir(parents=True, exist_ok=True)
    config = load_config(None)
    with open_store(store) as st:
        records = list(st.iter_records())
    ds = polar_series(records, config.series)
    write_netcdf(ds, products / "series.nc")
    latitude_time_diagram(records, config.series).to_netcdf(products / "latitude_time.nc")
    quick = dataclasses.replace(config.reversals, n_bootstrap=60)
    rev = {k: v.to_dict() for k, v in series_reversals(ds, quick).items()}
    (products / "reversals.json").write_text(json.dumps(rev))
    cycles = {"cycles": [{"minimum_time": 2031.3, "minimum_value": 4.0, "maximum_time": 2032.4,
                          "maximum_value": 120.0}]}
    (products / "cycles.json").write_text(json.dumps(cycles))
    # invented calibration cycles of the synthetic star (demo data only)
    # (rows of the forecast's phase, as a run's calibration would hold them)
    rows = ((1.1, 82), (1.6, 121), (0.9, 70), (2.0, 150), (1.4, 99), (1.8, 131))
    (products / "calibration.csv").write_text("cycle,precursor,amplitude,phase\n" + "".join(
        f"T{k + 1},{x},{a},{PRECURSOR_STATE['phase']}\n" for k, (x, a) in enumerate(rows)))
    table = read_calibration_csv(products / "calibration.csv")
    fc = forecast_amplitude(table, 1.5, config.forecast, precursor_error=0.1,
                            phase=PRECURSOR_STATE["phase"]).to_dict()
    # the history and trajectory entries were made at other phases: the same invented cycles stand in for them
    table = dataclasses.replace(table, phase=("minimum",) * table.n_cycles)
    fc.update(PRECURSOR_STATE)
    (products / "forecast.json").write_text(json.dumps(fc))
    for date, x, target, phase in HISTORY_UPDATES:
        f = forecast_amplitude(table, x, config.forecast).to_dict()
        f.update(target_cycle=target, phase=phase)
        append_history(products / "forecast_history.jsonl",
                       history_entry(f, date, calibration="calibration.csv", calibration_digest=None,
                                     calibration_scale=None))
    (products / "trajectory.json").write_text(json.dumps(trajectory_document(table, config)))
    write_hindcasts(products / "hindcasts")
    (products / "config.json").write_text(json.dumps(config.to_dict(), default=list))
    summary = {"reversals": rev, "forecast": fc,
               "truth": {"reversals": {"north": NORTH_REVERSAL_YR, "south": SOUTH_REVERSAL_YR},
                         "next_amplitude": 112.0}}
    (products / "summary.json").write_text(json.dumps(summary))
    return products
