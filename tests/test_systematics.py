"""The systematic ensemble of reversal epochs (pipeline.systematics) on records of rendered frames.

Frames of a known axisymmetric field reversing at known epochs (the closed loop of
tests/test_cli_reversals.py: Br = B(t) sin^8|lat|, Svalgaard, Duvall & Scherrer 1978 profile) are rendered
with the fictional KVM from the Earth's true B0 and measured; the ensemble must re-run every analysis choice
on those records (never re-measure), name each member, and give a total interval that holds the truth.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from pipeline.aggregator import SeriesSettings, polar_series
from pipeline.config import load_config
from pipeline.measure import measure_file
from pipeline.reversal import ReversalSettings
from pipeline.systematics import series_members, store_reversals
from tests._polar_frames import render_frames, reversing_sin8_field

T_NORTH, T_SOUTH = 2034.70, 2035.20   # true epochs of the rendered field (decimal years)
TAU_YR = 0.6
_field = reversing_sin8_field(T_NORTH, T_SOUTH, TAU_YR)


@pytest.fixture(scope="module")
def records(tmp_path_factory):
    root = tmp_path_factory.mktemp("ens")
    years = np.arange(2033.8, 2036.2, 13.6 / 365.25)
    paths = render_frames(root, years, _field, size=96, noise_gauss=2.0, seed=11)
    recs = [measure_file(p) for p in paths]
    assert all(r.status == "ok" for r in recs)
    return recs


def test_members_are_named_and_built_from_the_records(records):
    members, skipped = series_members(records, SeriesSettings())
    # fill is the default: its members are the other whole-cap methods, the cap boundary +-5 deg and the
    # other zero-offset treatment (pipeline.systematics module docstring)
    assert set(members) | set(skipped) == {"b0_method=profile", "b0_method=season", "cap_latitude=55",
                                           "cap_latitude=65", "zero_offset=none", "zero_offset=corrected"} - (
        {"zero_offset=corrected"} if any(r.zero_offset_applied for r in records) else {"zero_offset=none"})
    assert "b0_method=profile" in members and "cap_latitude=65" in members
    for name, ds in members.items():
        assert ds.sizes["rotation"] > 10, name


def test_visible_primary_cannot_move_the_cap_and_says_why(records):
    _, skipped = series_members(records, SeriesSettings(b0_method="visible"))
    assert "cap_latitude=55" in skipped and "own cap means" in skipped["cap_latitude=55"]


def test_ensemble_never_remeasures_and_holds_the_truth(records, monkeypatch):
    import pipeline.measure as measure

    def refuse(*a, **k):
        raise AssertionError("the ensemble re-measured a frame")

    monkeypatch.setattr(measure, "measure_file", refuse)
    monkeypatch.setattr(measure, "measure_frame", refuse)
    config = load_config(None, reversals={"n_bootstrap": 150})
    out = store_reversals(records, polar_series(records, config.series), config)
    for pole, truth in (("north", T_NORTH), ("south", T_SOUTH)):
        f = out[pole]["final"]
        assert f["low"] <= truth <= f["high"], (pole, f)
        assert f["level"] == 0.9 and f["noise_interval"]["level"] == 0.9
        assert f["systematic_interval"]["low"] <= f["time"] <= f["systematic_interval"]["high"]
        assert {"smoothing_width_x0.5", "smoothing_width_x2", "b0_method=profile"} <= set(f["ensemble"])
    assert set(out["bands"]) == {"north", "south"}
    band = out["bands"]["north"]["60"]["final"]
    assert band is not None and "smoothing_width_x2" in band["ensemble"]


def test_records_without_a_zero_offset_estimate_skip_that_member_with_a_reason(records):
    old = [dataclasses.replace(r, zero_offset_gauss=None, zero_offset_applied=False) for r in records]
    members, skipped = series_members(old, SeriesSettings())
    assert "zero_offset=corrected" in skipped and "no zero-offset estimate" in skipped["zero_offset=corrected"]
    config = load_config(None, reversals={"n_bootstrap": 40})
    out = store_reversals(old, polar_series(old, config.series), config)
    assert "zero_offset=corrected" in out["north"]["members_skipped"]


def test_systematics_off_leaves_only_the_noise(records):
    config = load_config(None, reversals={"n_bootstrap": 40, "systematics": False})
    out = store_reversals(records, polar_series(records, config.series), config)
    f = out["north"]["final"]
    assert f["ensemble"] == {}
    assert f["systematic_interval"]["low"] == f["systematic_interval"]["high"] == f["time"]
    assert ReversalSettings().systematics is True


def test_season_dipole_exists_and_its_interval_holds_the_truth(records):
    # issue 11: the season method's per-rotation dipole (nearest seasons, pipeline.b0) must exist and reverse
    # within its interval of the truth.  Truth: (N - S)/2 of the two equal tanh reversals crosses zero midway
    # between them by symmetry, 2034.95 (the same argument as tests/test_cli_reversals.py).
    from pipeline.reversal import series_reversals

    ds = polar_series(records, SeriesSettings(b0_method="season"))
    assert np.isfinite(ds["dipole_br_rotation_gauss"].values).sum() >= 20
    members, skipped = series_members(records, SeriesSettings(b0_method="season"))
    res = series_reversals(ds, ReversalSettings(n_bootstrap=150), None, members, skipped)
    f = res["dipole"].final
    assert f is not None and f.low <= 0.5 * (T_NORTH + T_SOUTH) <= f.high, f
    assert "b0_method=fill" in dict(f.members)


def test_band_fill_errors_are_errors_of_the_band_means(records):
    # the band means' correlated errors must be one-sigma fill errors (>= 0) and, for the band at the cap
    # boundary, the same as the polar series' own fill errors (same cap, same fill: pipeline.aggregator)
    from pipeline.systematics import band_inputs

    means, errors, _, _ = band_inputs(records, SeriesSettings())
    e60 = errors["north"][60.0].values
    assert np.nanmin(e60) >= 0.0
    ds = polar_series(records, SeriesSettings())
    se = ds["north_br_rotation_fill_error_gauss"].values
    ok = np.isfinite(e60) & np.isfinite(se) & (se > 0)
    assert ok.sum() >= 5
    assert np.median(e60[ok] / se[ok]) == pytest.approx(1.0, rel=0.5)
