"""Tests of ``polecast calibrate`` and ``polecast hindcast`` (in process), on the seeded synthetic star of
tests/test_hindcast.py written as a polar-series CSV and a plain monthly sunspot CSV.  Expected values are the
library functions' results on the same data (pipeline.hindcast, itself checked against the closed-loop truth
there) or exit codes and messages of the documented interface (regression only)."""

import csv
import io
import json

import numpy as np
import pytest

from pipeline.cli import main
from pipeline.hindcast import HINDCAST_ROW_KEYS, SKILL_KEYS, archive_calibration
from pipeline.regression import SELF_CALIBRATION_COLUMNS, read_calibration_csv
from tests.test_hindcast import make_archive


def _write(tmp_path, end=None):
    table, (months, ssn), *_ = make_archive(end=end)
    series = tmp_path / "series.csv"
    with open(series, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["time", "north_br_gauss", "south_br_gauss"])
        for row in zip(table.time_decimal_year, table.north_br_gauss, table.south_br_gauss):
            w.writerow([repr(float(v)) for v in row])
    spots = tmp_path / "sunspots.csv"
    with open(spots, "w") as fh:
        fh.write("date,value\n")
        for t, v in zip(months, ssn):
            y, m = int(np.floor(t)), int(np.floor((t - np.floor(t)) * 12)) + 1
            fh.write(f"{y:04d}-{m:02d},{float(v)!r}\n")
    return series, spots


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    return _write(tmp_path_factory.mktemp("hc"))


def test_calibrate_writes_the_archive_rows(files, tmp_path, capsys):
    series, spots = files
    out = tmp_path / "cal.csv"
    code = main(["calibrate", "--series", str(series), "--sunspots", str(spots), "--phase", "reversal+3",
                 "--scale", "synthetic dipole", "--out", str(out)])
    err = capsys.readouterr().err
    assert code == 0, err
    assert out.read_text().splitlines()[0] == ",".join(SELF_CALIBRATION_COLUMNS)
    table = read_calibration_csv(out)
    assert table.n_cycles >= 12 and set(table.phase) == {"reversal+3"} and set(table.scale) == {"synthetic dipole"}
    assert "no row: cycle 1: no dipole reversal" in err
    # the same rows as the library (the file's monthly times are mid-month, as the arrays were)
    from pipeline.asof import read_series_table
    from pipeline.cycles import read_sunspot_file

    lib = archive_calibration(read_series_table(series), read_sunspot_file(spots), phase="reversal+3").table
    assert table.cycle == lib.cycle
    np.testing.assert_allclose(table.precursor, lib.precursor, rtol=1e-12)


def test_calibrate_merge_only_where_phase_and_scale_match(files, tmp_path, capsys):
    series, spots = files
    other = tmp_path / "other.csv"
    other.write_text("cycle,precursor,amplitude,phase,scale\n"
                     "90,4.0,120,reversal+3,synthetic dipole\n"
                     "91,4.0,120,minimum,synthetic dipole\n"
                     "92,4.0,120,reversal+3,another instrument\n")
    out = tmp_path / "merged.csv"
    code = main(["calibrate", "--series", str(series), "--sunspots", str(spots), "--phase", "reversal+3",
                 "--scale", "synthetic dipole", "--out", str(out), "--merge", str(other)])
    err = capsys.readouterr().err
    assert code == 1  # rows of the other table were left out, each with a reason
    merged = read_calibration_csv(out)
    assert "90" in merged.cycle and "91" not in merged.cycle and "92" not in merged.cycle
    assert "cycle '91'" in err and "cycle '92'" in err


def test_hindcast_json(files, capsys):
    series, spots = files
    code = main(["hindcast", "--series", str(series), "--sunspots", str(spots), "--phase", "reversal+3"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    doc = json.loads(captured.out)
    assert doc["phase"] == "reversal+3" and set(doc["skill"]) == set(SKILL_KEYS)
    assert len(doc["rows"]) >= 12 and all(set(r) == set(HINDCAST_ROW_KEYS) for r in doc["rows"])
    assert abs(doc["skill"]["median_relative_error"]) < 0.05
    assert all(isinstance(r["as_of"], float) and len(r["interval_68"]) == 2 for r in doc["rows"])


def test_hindcast_csv_and_trajectory(files, capsys):
    series, spots = files
    code = main(["hindcast", "--series", str(series), "--sunspots", str(spots), "--phase", "minimum",
                 "--format", "csv"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    rows = list(csv.DictReader(io.StringIO(captured.out)))
    assert len(rows) >= 12 and "interval_95_high" in rows[0] and rows[0]["phase"] == "minimum"
    assert "skill: n " in captured.err
    code = main(["hindcast", "--series", str(series), "--sunspots", str(spots), "--phase", "reversal+3",
                 "--from", "1951-01-01", "--to", "1953-01-01", "--step-months", "3"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    doc = json.loads(captured.out)
    assert [r["as_of_date"] for r in doc["rows"]][-1] == "1953-01-01"
    assert len({r["target_cycle"] for r in doc["rows"]}) == 1


def test_hindcast_exit_codes(files, tmp_path, capsys):
    series, spots = files
    base = ["hindcast", "--series", str(series), "--sunspots", str(spots)]
    assert main(base + ["--phase", "auto"]) == 2
    assert "phase: got 'auto'" in capsys.readouterr().err
    assert main(base + ["--phase", "reversal-3"]) == 2
    assert "valid phases" in capsys.readouterr().err
    assert main(base + ["--phase", "minimum", "--from", "1950-01-01"]) == 2
    assert "needs both --from DATE and --to DATE" in capsys.readouterr().err
    assert main(["hindcast", "--series", str(tmp_path / "absent.csv"), "--sunspots", str(spots),
                 "--phase", "minimum"]) == 2
    capsys.readouterr()
    # too short a series for any hindcast: exit 3 with a reason per target
    short_series, short_spots = _write(tmp_path, end=1914.0)
    code = main(["hindcast", "--series", str(short_series), "--sunspots", str(short_spots), "--phase", "minimum"])
    err = capsys.readouterr().err
    assert code == 3 and "no hindcast row can be made at minimum" in err
    code = main(["calibrate", "--series", str(short_series), "--sunspots", str(short_spots), "--phase",
                 "reversal+5", "--out", str(tmp_path / "x.csv")])
    assert code == 3 and "no calibration row" in capsys.readouterr().err
