"""`polecast series` / `polecast reversals`: CSV route, and the closed loop through a store.

Closed loop: frames of a known axisymmetric field whose caps reverse at known epochs are rendered
with the fictional KVM from the Earth's true B0 (sunpy ephemeris), ingested into a store with
pipeline.batch/pipeline.store, and the CLI must recover the epochs within two Carrington rotations
(issue 5 check).
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import xarray as xr

from pipeline.cli import main
from pipeline.smoothing import rotations_to_years
from tests._polar_frames import render_frames, reversing_sin8_field

ROT_YR = rotations_to_years(1.0)
T_NORTH, T_SOUTH = 2034.70, 2035.20  # true reversal epochs (decimal years); each falls in the season its pole faces the Earth
TAU_YR = 0.6
_field = reversing_sin8_field(T_NORTH, T_SOUTH, TAU_YR)


@pytest.fixture(scope="module")
def store_path(tmp_path_factory):
    pytest.importorskip("pipeline.store")
    from pipeline.batch import IngestSettings, ingest
    from pipeline.store import open_store

    root = tmp_path_factory.mktemp("kvm")
    frames = root / "frames"
    frames.mkdir()
    years = np.arange(2033.8, 2036.2, 13.6 / 365.25)  # two frames per rotation, 2.4 yr
    render_frames(frames, years, _field, size=96, noise_gauss=2.0, seed=7)
    path = root / "archive.polecast"
    with open_store(path, "a") as store:
        summary = ingest([frames], store, settings=IngestSettings(workers=1))
    # every rendered frame measured (the renderer writes valid files: regression only)
    assert (summary.new_ok, summary.new_skipped, summary.errors, summary.unreadable) == (len(years), 0, 0, 0)
    return path


def _json(capsys):
    return json.loads(capsys.readouterr().out)


def test_closed_loop_store_reversals_within_two_rotations(store_path, capsys):
    assert main(["reversals", str(store_path), "--format", "json", "--n-bootstrap", "150"]) == 0
    out = _json(capsys)
    assert set(out) >= {"north", "south", "dipole", "bands"}
    north, south = out["north"], out["south"]
    assert len(north["crossings"]) == 1 and len(south["crossings"]) == 1
    assert north["final"]["sign_after"] == 1 and south["final"]["sign_after"] == -1
    assert abs(north["final"]["time"] - T_NORTH) <= 2 * ROT_YR
    assert abs(south["final"]["time"] - T_SOUTH) <= 2 * ROT_YR
    assert north["final"]["low"] <= north["final"]["time"] <= north["final"]["high"]
    # fact of the trade (common practice, no source): the two poles reverse months to ~1 yr apart
    assert 0.1 < abs(north["final"]["time"] - south["final"]["time"]) < 1.5
    # dipole (N - S)/2 with equal amplitudes crosses midway between the poles (symmetry of tanh)
    assert abs(out["dipole"]["final"]["time"] - 0.5 * (T_NORTH + T_SOUTH)) <= 2 * ROT_YR
    # per-band epochs: the field is separable, so every cap boundary reverses with its pole. Bands
    # 55-75 deg must be within two rotations; the 80-85 deg bands hold few pixels of a 96-px image and
    # are filled from the seasons that see them (default B0 method "fill"), so they may have no epoch;
    # one that is placed must also be within two rotations (its bootstrap interval covers the noise
    # only, not the error of filling the hidden season)
    assert sorted(out["bands"]["north"], key=float) == ["55", "60", "65", "70", "75", "80", "85"]
    for pole, truth in (("north", T_NORTH), ("south", T_SOUTH)):
        for boundary, res in out["bands"][pole].items():
            assert len(res["crossings"]) <= 1, (pole, boundary)
            if float(boundary) <= 75.0:
                assert abs(res["final"]["time"] - truth) <= 2 * ROT_YR, (pole, boundary, res["final"])
            elif res["final"] is not None:
                assert abs(res["final"]["time"] - truth) <= 2 * ROT_YR, (pole, boundary, res["final"])


def test_series_netcdf_and_csv_round_trip(store_path, tmp_path, capsys):
    nc = tmp_path / "series.nc"
    assert main(["series", str(store_path), "--out", str(nc)]) == 0
    ds = xr.open_dataset(nc)
    assert ds.attrs["b0_method"] == "fill"  # the default
    for name in ("north_br_gauss", "dipole_br_rotation_gauss", "south_br_smooth_gauss", "frames_per_rotation"):
        assert ds[name].attrs["units"] in ("G", "1")
    assert ds.sizes["rotation"] >= 30 and int(ds["frames_per_rotation"].sum()) == ds.sizes["time"]
    ds.close()
    csv_path = tmp_path / "series.csv"
    assert main(["series", str(store_path), "--out", str(csv_path), "--format", "csv"]) == 0
    capsys.readouterr()
    header = csv_path.read_text().splitlines()[0].split(",")
    assert header[:3] == ["rotation", "time", "north_br_gauss"]
    # the CSV feeds `reversals --series` and gives the same cap epochs as the store route
    assert main(["reversals", "--series", str(csv_path)]) == 0
    from_csv = _json(capsys)
    assert main(["reversals", str(store_path)]) == 0
    from_store = _json(capsys)
    for pole in ("north", "south"):
        assert from_csv[pole]["final"]["time"] == pytest.approx(from_store[pole]["final"]["time"], abs=0.01)


def _write_csv(path, rows, header="time,north_br_gauss,south_br_gauss"):
    path.write_text(header + "\n" + "\n".join(rows) + "\n")
    return path


def _synthetic_rows(with_gap=False, iso=False):
    from pipeline.timeutil import iso_date

    rng = np.random.default_rng(3)
    t = np.arange(2031.0, 2037.0, ROT_YR)
    rows = []
    for y in t:
        if with_gap and 2033.9 < y < 2034.5:
            continue
        n = 6.0 * np.tanh((y - 2034.2) / 0.8) + rng.normal(0, 0.8)
        s = -6.0 * np.tanh((y - 2034.8) / 0.8) + rng.normal(0, 0.8)
        rows.append(f"{iso_date(float(y)) if iso else f'{y:.5f}'},{n:.3f},{s:.3f}")
    return rows


def test_reversals_csv_json_format(tmp_path, capsys):
    path = _write_csv(tmp_path / "s.csv", _synthetic_rows(iso=True))
    assert main(["reversals", "--series", str(path), "--format", "json"]) == 0
    out = _json(capsys)
    assert set(out) == {"north", "south", "dipole"}
    for name in out:
        # issue 11's contract: the total interval in low/high, its parts and the ensemble beside it, each
        # interval with its level
        assert set(out[name]) == {"crossings", "final", "level", "bootstrap_block_rotations", "members_skipped"}
        assert out[name]["level"] == 0.9 and out[name]["bootstrap_block_rotations"] >= 13
        for c in out[name]["crossings"]:
            assert set(c) == {"time", "low", "high", "level", "time_iso", "sign_after", "resolved", "reason",
                              "support", "noise_interval", "systematic_interval", "ensemble"}
            assert c["sign_after"] in (1, -1) and len(c["time_iso"]) == 10
            assert c["resolved"] is True and 0.0 < c["support"] <= 1.0
            n, sy = c["noise_interval"], c["systematic_interval"]
            assert n["level"] == sy["level"] == c["level"] == 0.9
            assert c["low"] <= min(n["low"], sy["low"]) and c["high"] >= max(n["high"], sy["high"])
            # a series table has no records: only the smoothing-width members apply
            assert set(c["ensemble"]) == {"smoothing_width_x0.5", "smoothing_width_x2"}
    assert abs(out["north"]["final"]["time"] - 2034.2) < 2 * ROT_YR  # seeded truth
    assert abs(out["south"]["final"]["time"] - 2034.8) < 2 * ROT_YR


def test_reversals_csv_gap_empty_cells_bad_row_and_text(tmp_path, capsys):
    rows = _synthetic_rows(with_gap=True)
    rows[5] = rows[5].split(",")[0] + ",,1.0"  # empty north cell: a gap, not an error
    rows.insert(10, "not-a-date,1.0,2.0")      # unreadable row: reported, left out, exit 1
    path = _write_csv(tmp_path / "s.csv", rows)
    assert main(["reversals", "--series", str(path), "--format", "text"]) == 1
    cap = capsys.readouterr()
    assert "line 12: unreadable row" in cap.err
    assert "north: 1 reversal(s)" in cap.out and "final: 2034-" in cap.out
    assert cap.out.startswith("intervals: 90%") and "90% [" in cap.out and "noise [" in cap.out


def test_reversals_usage_errors(tmp_path, capsys):
    assert main(["reversals"]) == 2
    path = _write_csv(tmp_path / "bad.csv", ["2034.0,1.0"], header="time,north_br_gauss")
    assert main(["reversals", "--series", str(path)]) == 2
    assert "missing column(s) south_br_gauss" in capsys.readouterr().err
    assert main(["reversals", "--series", str(tmp_path / "absent.csv")]) == 2
    assert main(["series", str(tmp_path / "absent.polecast"), "--out", str(tmp_path / "x.nc")]) == 2
    assert main(["reversals", "--series", str(path), "--confidence", "2"]) == 2


def test_store_route_uses_only_records_of_the_settings_in_force(store_path, tmp_path, capsys):
    """Issue 17: --config whose [measure] differs from the records' is refused in one line (exit 2); one that
    matches, or none, reads the records (the rule is the project's own; wording regression only)."""
    seventy = tmp_path / "seventy.toml"
    seventy.write_text("[measure]\ncap_latitude_deg = 70\n")
    assert main(["reversals", str(store_path), "--config", str(seventy)]) == 2
    cap = capsys.readouterr()
    lines = cap.err.strip().splitlines()
    assert cap.out == "" and len(lines) == 1 and lines[0].startswith("polecast reversals: store ")
    assert "measure.cap_latitude_deg 60.0 (records) vs 70.0 (in force)" in lines[0]
    same = tmp_path / "same.toml"
    same.write_text("[measure]\ncap_latitude_deg = 60\n")  # the records' settings (the defaults)
    assert main(["reversals", str(store_path), "--config", str(same), "--n-bootstrap", "20"]) == 0
    assert len(_json(capsys)["north"]["crossings"]) == 1
