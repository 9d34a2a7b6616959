"""Report: what each figure draws (through its matplotlib objects), the self-contained page, escaping,
tolerance of missing products, settings that are never guessed, atomic files, CLI."""

from __future__ import annotations

import base64
import html
import json
import re
import shutil
import struct
import subprocess
from html.parser import HTMLParser

import numpy as np
import pytest

from pipeline.cli import main
from pipeline.config import ConfigError, MeasureSettings
from pipeline.report import (FIGURE_FILES, VERSION_PACKAGES, ReportSettings, build_report, load_products,
                             render_report)
from pipeline.report.html import table_html
from tests._report_store import (HINDCAST_SKILL, HISTORY_UPDATES, HOSTILE_NAME, PRECURSOR_STATE, TRAJECTORY_DATES, TRAJECTORY_TRUTH, N_FRAMES, NORTH_REVERSAL_YR, SOUTH_REVERSAL_YR,
                                 build_store, write_products)

#: PNG file signature, PNG specification (ISO/IEC 15948:2004 / W3C PNG 2nd ed., sec. 5.2)
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """One rendered report of the small store and its products, shared by the tests of this module."""
    root = tmp_path_factory.mktemp("report")
    store = build_store(root)
    products = write_products(root / "products", store)
    rendered = render_report(store, root / "out", products)
    return {"root": root, "store": store, "products": products, "index": rendered.index, "rendered": rendered}


@pytest.fixture(scope="module")
def bare(built):
    return build_report(built["store"], built["root"] / "bare")


class _Collector(HTMLParser):
    """Elements, attributes and text of a page, as the HTML standard's tokenizer sees them."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.text, self.cells = [], [], []
        self._in_cell = False

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag == "td":
            self._in_cell, self._cell = True, []

    def handle_endtag(self, tag):
        if tag == "td" and self._in_cell:
            self.cells.append("".join(self._cell))
            self._in_cell = False

    def handle_data(self, data):
        self.text.append(data)
        if self._in_cell:
            self._cell.append(data)


def _parse(path):
    c = _Collector()
    c.feed(path.read_text(encoding="utf-8"))
    return c


def _png_size(data: bytes):
    # PNG spec sec. 11.2.2: the first chunk is IHDR; width and height are 4-byte big-endian integers
    assert data[:8] == PNG_SIGNATURE
    length, kind = struct.unpack(">I4s", data[8:16])
    assert kind == b"IHDR" and length == 13
    return struct.unpack(">II", data[16:24])


def test_every_figure_is_the_png_of_its_figure_at_the_configured_size(built):
    """Each PNG on disk is its Figure saved at settings.dpi: pixel size = size in inches x dots per inch, to
    within the pixel matplotlib rounds away (common practice, no source), read from the IHDR chunk (PNG spec
    sec. 11.2.2)."""
    settings = ReportSettings()
    rendered = built["rendered"]
    assert set(rendered.figures) == set(FIGURE_FILES)
    for key, fig in rendered.figures.items():
        data = rendered.figure_paths[key].read_bytes()
        assert data[:8] == PNG_SIGNATURE, key           # PNG spec sec. 5.2
        width_in, height_in = fig.get_size_inches()
        assert width_in == settings.figure_width_in, key
        width_px, height_px = _png_size(data)
        assert abs(width_px - width_in * settings.dpi) < 1 and abs(height_px - height_in * settings.dpi) < 1, key


# -- what each figure draws, read from its matplotlib objects -------------------------------------------------
# Times are drawn as decimal years; the reference is astropy's ``Time.decimalyear`` (a reference library),
# to 1e-6 yr (30 s; astropy counts leap seconds in UTC, the pipeline does not: <= 1 s a year).

def _astropy_years(times) -> np.ndarray:
    from astropy.time import Time

    return np.atleast_1d(Time(np.asarray(times, dtype="datetime64[ns]").astype(str), scale="utc").decimalyear)


def _line(ax, label):
    found = [ln for ln in ax.get_lines() if ln.get_label() == label]
    assert len(found) == 1, (label, [ln.get_label() for ln in ax.get_lines()])
    return found[0]


def _errorbar(ax, label):
    found = [c for c in ax.containers if c.get_label() == label]
    assert len(found) == 1, (label, [c.get_label() for c in ax.containers])
    return found[0].lines[0]


def _gid_lines(ax, prefix):
    return [ln for ln in ax.get_lines() if (ln.get_gid() or "").startswith(prefix)]


def _span_x(patch):
    """x extent (data units) of an axvspan patch: Polygon (matplotlib < 3.9) or Rectangle (>= 3.9)."""
    xy = patch.get_patch_transform().transform(patch.get_path().vertices)
    return float(xy[:, 0].min()), float(xy[:, 0].max())


def _assert_units(label, unit):
    assert label.endswith(f"({unit})"), (label, unit)


def test_series_figure_draws_every_rotation_the_smoothed_curves_and_the_reversal_epochs(built):
    """Per-rotation points with their errors and the smoothed curves are the series' values at the rotation
    times; a vertical line marks every crossing of reversals.json (the final one heavier, with its shaded
    interval); the cycle minimum and maximum of cycles.json are marked (products of tests/_report_store.py)."""
    import xarray as xr

    fig = built["rendered"].figures["series"]
    top, bottom = fig.axes
    _assert_units(top.get_ylabel(), "G")
    _assert_units(bottom.get_ylabel(), "G")
    assert bottom.get_xlabel() == "time (decimal year, UTC)"
    with xr.open_dataset(built["products"] / "series.nc") as ds:
        series = ds.load()
    t = _astropy_years(series["rotation_time"].values)
    for ax, poles in ((top, ("north", "south")), (bottom, ("dipole",))):
        for pole in poles:
            y = series[f"{pole}_br_rotation_gauss"].values
            ok = np.isfinite(y)
            points = _errorbar(ax, f"{pole} (per rotation)")
            np.testing.assert_allclose(points.get_xdata(), t[ok], atol=1e-6)
            np.testing.assert_array_equal(points.get_ydata(), y[ok])
            smooth = _line(ax, f"{pole} (smoothed)")
            np.testing.assert_allclose(smooth.get_xdata(), t, atol=1e-6)
            np.testing.assert_array_equal(smooth.get_ydata(), series[f"{pole}_br_smooth_gauss"].values)
        lo, hi = ax.get_xlim()
        assert lo < t.min() and hi > t.max()  # every rotation inside the drawn range
    reversals = json.loads((built["products"] / "reversals.json").read_text())
    for ax, pole in ((top, "north"), (top, "south"), (bottom, "dipole")):
        crossings = reversals[pole]["crossings"]
        markers = _gid_lines(ax, f"reversal:{pole}")
        assert sorted(ln.get_xdata()[0] for ln in markers) == sorted(c["time"] for c in crossings)
        final = [ln for ln in markers if ln.get_gid() == f"reversal:{pole}:final"]
        assert len(final) == 1 and final[0].get_xdata()[0] == reversals[pole]["final"]["time"]
        assert final[0].get_linewidth() > max([0.0] + [ln.get_linewidth() for ln in markers if ln is not final[0]])
        spans = sorted(_span_x(p) for p in ax.patches if p.get_gid() == f"reversal-interval:{pole}")
        want = sorted((c["low"], c["high"]) for c in crossings if c["high"] > c["low"])
        assert len(spans) == len(want) >= 1
        np.testing.assert_allclose(np.array(spans), np.array(want), rtol=0, atol=1e-9)
    # the constructed field reverses at NORTH_REVERSAL_YR and SOUTH_REVERSAL_YR (tests/_report_store.py)
    north_final = [ln.get_xdata()[0] for ln in _gid_lines(top, "reversal:north:final")]
    assert north_final[0] == pytest.approx(NORTH_REVERSAL_YR, abs=0.1)
    cycles = json.loads((built["products"] / "cycles.json").read_text())["cycles"][0]
    for ax in (top, bottom):
        assert [ln.get_xdata()[0] for ln in _gid_lines(ax, "cycle:minimum")] == [cycles["minimum_time"]]
        assert [ln.get_xdata()[0] for ln in _gid_lines(ax, "cycle:maximum")] == [cycles["maximum_time"]]


def test_series_figure_draws_the_precursor_window_of_the_forecast(built):
    """Issue 10: the window the precursor was averaged over (forecast.json precursor_detail: centre time +-
    window_years, decimal years) is a span on both panels, inside the drawn time range (products of
    tests/_report_store.py; regression only)."""
    fig = built["rendered"].figures["series"]
    detail = PRECURSOR_STATE["precursor_detail"]
    want = (detail["time"] - detail["window_years"], detail["time"] + detail["window_years"])
    for ax in fig.axes:
        (span,) = [p for p in ax.patches if p.get_gid() == "precursor-window"]
        assert _span_x(span) == pytest.approx(want, abs=1e-12)
        assert span.get_label() == f"precursor window ({PRECURSOR_STATE['phase']})"
        lo, hi = ax.get_xlim()
        assert lo < want[0] and want[1] < hi
    from pipeline.report.figures import polar_series_figure

    plain = polar_series_figure(built["rendered"].products.series, ReportSettings(), precursor=None)
    assert not [p for ax in plain.axes for p in ax.patches if p.get_gid() == "precursor-window"]


def test_page_states_when_and_how_the_precursor_was_taken(built):
    """Issue 10: the page gives the phase, the window, the route, the minimum and its status, the target cycle,
    the data date and the declared sunspot-number version (forecast.json of tests/_report_store.py)."""
    text = " ".join(_parse(built["index"]).text)
    assert "When and how the precursor was taken" in text
    st, detail = PRECURSOR_STATE, PRECURSOR_STATE["precursor_detail"]
    lo, hi = detail["time"] - detail["window_years"], detail["time"] + detail["window_years"]
    assert f"{st['phase']} (1 years after the final dipole reversal)" in text
    assert f"{lo:.3f} \u2013 {hi:.3f} (centre {detail['time']:.3f} \u00b1 {detail['window_years']:g} yr, " \
           f"{detail['n_rotations']} rotations)" in text
    assert f"{detail['route']}: window mean L years after the final dipole reversal" in text
    assert f"{st['minimum_time']:.3f} ({st['minimum_status']})" in text
    assert f"{st['reversal_time']:.3f}" in text and st["data_date"] in text
    assert "version 2 (declared); layout semicolon-monthly (declared); 40 months used" in text
    assert f"may be revised: {st['provisional_reasons'][0]}" in text


def test_page_without_a_forecast_gives_the_reason_and_keeps_the_cautions(built, tmp_path):
    """A run that could not forecast writes the state with forecast_unavailable in forecast.json: the page says
    "No forecast" with the reason, still states how the precursor was taken, and keeps the cautions."""
    products = tmp_path / "p"
    shutil.copytree(built["products"], products)
    reason = "calibration table: got 0 cycles at phase 'reversal+1' <none>"
    state = dict(PRECURSOR_STATE, forecast_unavailable=reason)
    (products / "forecast.json").write_text(json.dumps(state))
    rendered = render_report(built["store"], tmp_path / "out", products)
    text = " ".join(" ".join(_parse(rendered.index).text).split())
    assert f"No forecast. {reason}" in text and f"No forecast: {reason}" in text
    assert "When and how the precursor was taken" in text and "after_reversal" in text
    low = text.lower()
    assert "statistical forecast" in low and "official space-weather forecasts" in low
    assert any(p.get_gid() == "precursor-window" for p in rendered.figures["series"].axes[1].patches)


def test_latitude_time_figure_maps_every_bin_and_marks_the_cap_of_the_settings_in_force(built):
    """The colour mesh holds the diagram's values bin for bin, on its latitude edges and on rotation-time
    edges half a step beyond the first and last rotation; dashed lines at +-cap latitude of the measure
    settings in force (the products' config.json: 60 deg)."""
    import xarray as xr

    fig = built["rendered"].figures["latitude_time"]
    ax, bar = fig.axes
    _assert_units(ax.get_ylabel(), "deg")
    assert ax.get_xlabel() == "time (decimal year, UTC)"
    _assert_units(bar.get_ylabel(), "G")
    with xr.open_dataarray(built["products"] / "latitude_time.nc") as da:
        diagram = da.load()
    assert diagram.dims == ("latitude", "rotation")
    (mesh,) = ax.collections
    np.testing.assert_array_equal(np.ma.filled(mesh.get_array(), np.nan), diagram.values)
    coords = mesh.get_coordinates()
    lat_edges = np.concatenate([diagram["latitude_lower"].values, diagram["latitude_upper"].values[-1:]])
    np.testing.assert_array_equal(coords[:, 0, 1], lat_edges)
    t = _astropy_years(diagram["rotation_time"].values)
    x_edges = coords[0, :, 0]
    assert x_edges.size == t.size + 1 and np.all((x_edges[:-1] < t) & (t < x_edges[1:]))
    np.testing.assert_allclose(0.5 * (x_edges[:-1] + x_edges[1:])[1:-1], t[1:-1], atol=0.05)
    assert built["rendered"].measure == MeasureSettings()
    cap = [ln.get_ydata()[0] for ln in _gid_lines(ax, "cap-boundary")]
    assert sorted(cap) == [-MeasureSettings().cap_latitude_deg, MeasureSettings().cap_latitude_deg]
    from pipeline.report.figures import latitude_time_figure

    other = latitude_time_figure(diagram, ReportSettings(), cap_latitude_deg=70.0)
    assert sorted(ln.get_ydata()[0] for ln in _gid_lines(other.axes[0], "cap-boundary")) == [-70.0, 70.0]


def test_calibration_figure_line_and_bands_match_statsmodels_ols(built):
    """Points at the table's cycles; the fitted line and the 68 % and 95 % prediction bands equal statsmodels'
    OLS fit and ``get_prediction(...).summary_frame`` obs_ci (a reference library); the forecast marker sits
    at forecast.json's precursor and amplitude."""
    import statsmodels.api as sm

    fig = built["rendered"].figures["calibration"]
    (ax,) = fig.axes
    _assert_units(ax.get_xlabel(), "G")
    assert "sunspot number" in ax.get_ylabel()
    table = built["rendered"].products.calibration
    points = _errorbar(ax, "calibration cycles")
    np.testing.assert_array_equal(points.get_xdata(), table.precursor)
    np.testing.assert_array_equal(points.get_ydata(), table.amplitude)
    line = _line(ax, "fitted line (ols)")
    grid = np.asarray(line.get_xdata())
    ols = sm.OLS(np.asarray(table.amplitude, float), sm.add_constant(np.asarray(table.precursor, float))).fit()
    np.testing.assert_allclose(line.get_ydata(), ols.params[0] + ols.params[1] * grid, rtol=1e-9)
    for label, level in (("95% prediction band", 0.95), ("68% prediction band", 0.6826894921370859)):
        (band,) = [c for c in ax.collections if c.get_label() == label]
        verts = band.get_paths()[0].vertices
        frame = ols.get_prediction(sm.add_constant(grid)).summary_frame(alpha=1.0 - level)
        for x, lo, hi in zip(grid[::17], frame["obs_ci_lower"].values[::17], frame["obs_ci_upper"].values[::17]):
            ys = verts[np.isclose(verts[:, 0], x, rtol=0, atol=1e-12), 1]
            assert (ys.min(), ys.max()) == pytest.approx((lo, hi), rel=1e-9), label
    fc = json.loads((built["products"] / "forecast.json").read_text())
    (marker,) = [c for c in ax.containers if c.get_label().startswith("forecast ")]
    assert (marker.lines[0].get_xdata()[0], marker.lines[0].get_ydata()[0]) == (fc["precursor"], fc["amplitude"])


def test_history_figure_draws_one_line_per_target_cycle_each_update_at_its_data_date(built):
    """Issue 10: the history figure never joins entries of different target cycles in one line.  Each target
    of the history (tests/_report_store.py HISTORY_UPDATES: three updates for cycle 7, then two for cycle 8) is
    its own line holding exactly its updates, at their data dates (astropy decimalyear, a reference library)
    and amplitudes, with its 68 % and 95 % bands spanning the entries' intervals."""
    fig = built["rendered"].figures["history"]
    (ax,) = fig.axes
    assert "sunspot number" in ax.get_ylabel() and "decimal year" in ax.get_xlabel()
    entries = built["rendered"].products.history
    targets = sorted({e["target_cycle"] for e in entries})
    assert targets == sorted({u[2] for u in HISTORY_UPDATES}) and len(targets) == 2
    lines = [ln for ln in ax.get_lines() if (ln.get_gid() or "").startswith("history:target:")]
    assert sorted(ln.get_gid() for ln in lines) == [f"history:target:{t}" for t in targets]
    for target in targets:
        mine = [e for e in entries if e["target_cycle"] == target]
        (line,) = [ln for ln in lines if ln.get_gid() == f"history:target:{target}"]
        dates = np.array([e["data_date"] for e in mine], dtype="datetime64[D]")
        np.testing.assert_allclose(line.get_xdata(), _astropy_years(dates), atol=1e-6)
        np.testing.assert_array_equal(line.get_ydata(), [e["amplitude"] for e in mine])
        for level in ("68", "95"):
            (band,) = [c for c in ax.collections if c.get_gid() == f"history:target:{target}:band{level}"]
            ys = band.get_paths()[0].vertices[:, 1]
            lo = min(e[f"interval_{level}"][0] for e in mine)
            hi = max(e[f"interval_{level}"][1] for e in mine)
            assert ys.min() == pytest.approx(lo, rel=1e-12) and ys.max() == pytest.approx(hi, rel=1e-12)
    assert sum(len(ln.get_xdata()) for ln in lines) == len(entries) == len(HISTORY_UPDATES)
    assert ax.get_title() == f"Forecast history ({len(entries)} updates; one line per target cycle)"


def test_history_figure_keeps_entries_without_a_target_on_a_line_of_their_own(built):
    """Entries written before target_cycle existed are one "target unknown" line, never joined to a known
    target (regression only)."""
    from pipeline.report.figures import forecast_history_figure

    entries = [dict(e) for e in built["rendered"].products.history]
    for e in entries[:2]:
        e.pop("target_cycle")
    (ax,) = forecast_history_figure(entries, ReportSettings()).axes
    gids = sorted(ln.get_gid() for ln in ax.get_lines() if (ln.get_gid() or "").startswith("history:target:"))
    assert gids == sorted({f"history:target:{e.get('target_cycle', 'unknown')}" for e in entries})
    (unknown,) = [ln for ln in ax.get_lines() if ln.get_gid() == "history:target:unknown"]
    assert list(unknown.get_ydata()) == [e["amplitude"] for e in entries[:2]]


def test_trajectory_figure_draws_each_target_its_bands_its_truth_and_the_dates_without_a_forecast(built):
    """Issue 10: amplitude with its 68 % and 95 % bands against data date (astropy decimalyear), one line per
    target cycle, and each target's truth (trajectory.json of tests/_report_store.py: cycle 7's smoothed
    maximum, cycle 8's synthetic truth) as a dashed line at its value over that target's dates; the date without
    a forecast is a tick of its own, joined to no line."""
    fig = built["rendered"].figures["trajectory"]
    (ax,) = fig.axes
    assert "sunspot number" in ax.get_ylabel() and "decimal year" in ax.get_xlabel()
    rows = built["rendered"].products.trajectory["rows"]
    made = [r for r in rows if r["amplitude"] is not None]
    targets = sorted({r["target_cycle"] for r in made})
    assert targets == sorted(TRAJECTORY_TRUTH)
    for target in targets:
        mine = [r for r in made if r["target_cycle"] == target]
        (line,) = [ln for ln in ax.get_lines() if ln.get_gid() == f"trajectory:target:{target}"]
        dates = _astropy_years(np.array([r["data_date"] for r in mine], dtype="datetime64[D]"))
        np.testing.assert_allclose(line.get_xdata(), dates, atol=1e-6)
        np.testing.assert_array_equal(line.get_ydata(), [r["amplitude"] for r in mine])
        for level in ("68", "95"):
            (band,) = [c for c in ax.collections if c.get_gid() == f"trajectory:target:{target}:band{level}"]
            ys = band.get_paths()[0].vertices[:, 1]
            assert ys.min() == pytest.approx(min(r[f"interval_{level}"][0] for r in mine), rel=1e-12)
            assert ys.max() == pytest.approx(max(r[f"interval_{level}"][1] for r in mine), rel=1e-12)
        (truth,) = [ln for ln in ax.get_lines() if ln.get_gid() == f"trajectory:truth:{target}"]
        assert set(truth.get_ydata()) == {TRAJECTORY_TRUTH[target][0]}
        lo, hi = truth.get_xdata()
        assert lo < dates.min() and dates.max() < hi and hi - lo < 1.5   # over the target's own dates
    (ticks,) = [ln for ln in ax.get_lines() if ln.get_gid() == "trajectory:unavailable"]
    missing = [d for d, x, _, _ in TRAJECTORY_DATES if x is None]
    np.testing.assert_allclose(ticks.get_xdata(), _astropy_years(np.array(missing, dtype="datetime64[D]")),
                               atol=1e-6)


def test_skill_figure_draws_each_phase_in_cycle_order_from_the_hindcast_products(built):
    """Issue 10: the skill-against-phase figure from the hindcast products (tests/_report_store.py
    HINDCAST_SKILL): phases in cycle order (reversal+2, reversal+5, then the minimum), RMSE and bias at their
    values, coverage with the nominal 0.68 / 0.95 (a null value leaves that point out); a trajectory (phase
    auto) and an unreadable file are left out with a note."""
    fig = built["rendered"].figures["skill"]
    top, bottom = fig.axes
    order = ["reversal+2", "reversal+5", "minimum"]
    assert [t.get_text().split("\n")[0] for t in bottom.get_xticklabels()] == order
    for ax, key in ((top, "rmse"), (top, "bias"), (bottom, "coverage_68"), (bottom, "coverage_95")):
        (line,) = [ln for ln in ax.get_lines() if ln.get_gid() == f"skill:{key}"]
        want = [(i, HINDCAST_SKILL[p][key]) for i, p in enumerate(order) if HINDCAST_SKILL[p][key] is not None]
        assert list(zip(line.get_xdata(), line.get_ydata())) == want, key
    for level in (68, 95):
        (nominal,) = [ln for ln in bottom.get_lines() if ln.get_gid() == f"skill:nominal_{level}"]
        assert set(nominal.get_ydata()) == {level / 100}
    notes = built["rendered"].products.notes
    assert any(n.startswith("hindcasts/trajectory.json: phase 'auto' is not one phase") for n in notes)
    assert any(n.startswith("hindcasts/zz-broken.json: unreadable (JSONDecodeError") for n in notes)
    text = " ".join(_parse(built["index"]).text)
    assert "Hindcast skill against phase" in text and "hindcasts/reversal+5.json" in text


def test_diagnostics_figure_draws_b0_coverage_and_the_skipped_files(built):
    """B0 and cap coverage of every frame; one bar per skip reason whose lengths add up to the two bad files
    of the archive (an empty file and a text file, tests/_report_store.py)."""
    fig = built["rendered"].figures["diagnostics"]
    ax_b0, ax_cov, ax_skip = fig.axes
    _assert_units(ax_b0.get_ylabel(), "deg")
    _assert_units(ax_cov.get_ylabel(), "fraction")
    series = built["rendered"].products.series
    (b0,) = [ln for ln in ax_b0.get_lines() if ln.get_marker() == "."]
    np.testing.assert_allclose(b0.get_xdata(), _astropy_years(series["time"].values), atol=1e-6)
    np.testing.assert_array_equal(b0.get_ydata(), series["b0_deg"].values)
    assert b0.get_xdata().size == N_FRAMES
    for pole in ("north", "south"):
        np.testing.assert_array_equal(_line(ax_cov, f"{pole} cap").get_ydata(), series[f"{pole}_coverage"].values)
    widths = [p.get_width() for p in ax_skip.patches]
    assert sum(widths) == 2 and len(widths) == len(ax_skip.get_yticklabels())


def test_page_is_self_contained_and_embeds_every_figure(built):
    page = _parse(built["index"])
    tags = [t for t, _ in page.tags]
    assert "script" not in tags and "link" not in tags and "iframe" not in tags
    metas = [a for t, a in page.tags if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"]
    assert len(metas) == 1 and "script-src 'none'" in metas[0]["content"] and "img-src data:" in metas[0]["content"]
    imgs = [a["src"] for t, a in page.tags if t == "img"]
    assert len(imgs) == len(FIGURE_FILES)
    prefix = "data:image/png;base64,"                    # RFC 2397 data URI
    embedded = sorted(base64.b64decode(s[len(prefix):]) for s in imgs if s.startswith(prefix))
    on_disk = sorted((built["index"].parent / "figures" / n).read_bytes() for n in FIGURE_FILES.values())
    assert embedded == on_disk
    for t, a in page.tags:
        for key in ("src", "href"):
            v = a.get(key)
            assert v is None or v.startswith(("data:", "#")), (t, v)


def test_hostile_file_name_is_shown_as_text_not_markup(built):
    raw = built["index"].read_text(encoding="utf-8")
    assert HOSTILE_NAME not in raw
    assert html.escape(HOSTILE_NAME) in raw
    page = _parse(built["index"])
    # decoded by the HTML tokenizer, the cell holds the literal name (and no <script> element was made)
    assert any(c.endswith(HOSTILE_NAME) for c in page.cells)
    assert not any(t == "script" for t, _ in page.tags)


def test_table_cells_round_trip_through_the_html_tokenizer():
    hostile = ['<img src=x onerror="alert(1)">', "a & b", "'quoted' \"twice\"", "</td></tr></table>"]
    c = _Collector()
    c.feed(table_html(["h"], [[h] for h in hostile]))
    assert c.cells == hostile
    assert [t for t, _ in c.tags] == ["table", "thead", "tr", "th", "tbody"] + ["tr", "td"] * len(hostile)


def test_tables_carry_every_crossing_the_forecast_the_truth_and_the_cautions(built):
    text = " ".join(_parse(built["index"]).text)
    reversals = json.loads((built["products"] / "reversals.json").read_text())
    for pole in ("north", "south", "dipole"):
        for c in reversals[pole]["crossings"]:
            assert c["time_iso"] in text
            assert f"{c['low']:.3f}" in text and f"{c['high']:.3f}" in text
    raw = built["index"].read_text(encoding="utf-8")
    n_final = sum(1 for p in ("north", "south", "dipole") if reversals[p]["final"])
    assert raw.count('<tr class="final">') == n_final
    fc = json.loads((built["products"] / "forecast.json").read_text())
    assert f"{fc['amplitude']:.1f}" in text and f"{fc['loo_rmse']:.1f}" in text and f"{fc['r']:.3f}" in text
    assert f"{fc['interval_95'][0]:.1f} \u2013 {fc['interval_95'][1]:.1f}" in text
    low = text.lower()
    assert "statistical forecast" in low and "official space-weather forecasts" in low and "mission rules" in low
    assert "truth inside?" in text and f"{NORTH_REVERSAL_YR:.3f}" in text and f"{SOUTH_REVERSAL_YR:.3f}" in text
    for pkg in VERSION_PACKAGES:
        assert pkg in text


def test_bare_store_recomputes_series_and_reversals(built, bare):
    fig_dir = bare.parent / "figures"
    assert {p.name for p in fig_dir.iterdir()} == {FIGURE_FILES[k] for k in ("series", "latitude_time", "diagnostics")}
    text = " ".join(_parse(bare).text)
    assert "recomputed from the store (series, latitude-time diagram, reversals) with the default settings" in text
    assert "calibration figure left out" in text and "no forecast history" in text
    assert "no hindcast product: the skill-against-phase figure is left out" in text
    # the constructed field changes sign at NORTH_REVERSAL_YR / SOUTH_REVERSAL_YR (tests/_report_store.py);
    # the recomputed final epochs are in the page's reversal table
    from pipeline.aggregator import polar_series
    from pipeline.reversal import series_reversals
    from pipeline.store import open_store

    with open_store(built["store"]) as st:
        res = series_reversals(polar_series(list(st.iter_records())))
    assert abs(res["north"].final.time - NORTH_REVERSAL_YR) < 0.1
    assert abs(res["south"].final.time - SOUTH_REVERSAL_YR) < 0.1
    assert res["north"].final.time_iso in text and res["south"].final.time_iso in text


def test_bad_and_missing_products_are_left_out_with_a_note(built, tmp_path):
    products = tmp_path / "p"
    shutil.copytree(built["products"], products)
    (products / "cycles.json").write_text("{ not json")
    (products / "forecast_history.jsonl").unlink()
    (products / "trajectory.json").write_text("[1, 2]")
    shutil.rmtree(products / "hindcasts")
    (products / "calibration.csv").write_text("cycle,amplitude\n1,2\n")
    (products / "series.nc").write_bytes(b"\x89HDF\r\n\x1a\n" + b"\0" * 64)  # a torn netCDF-4 file
    loaded = load_products(products)
    assert loaded.cycles is None and loaded.history is None and loaded.calibration is None and loaded.series is None
    rendered = render_report(built["store"], tmp_path / "out", products)
    text = " ".join(_parse(rendered.index).text)
    assert "cycles.json: unreadable (JSONDecodeError" in text
    assert "forecast_history.jsonl: not in the products directory" in text
    assert "trajectory.json: unreadable (ValueError: not a JSON object)" in text and "no forecast trajectory" in text
    assert "calibration.csv: unreadable (ValueError" in text and "series.nc: unreadable (OSError" in text
    assert "recomputed from the store (series) with the settings of the products' config.json" in text
    assert rendered.products.series.sizes["time"] == N_FRAMES   # recomputed from the store's 28 frames
    names = {p.name for p in (rendered.index.parent / "figures").iterdir()}
    assert not {FIGURE_FILES[k] for k in ("calibration", "history", "trajectory", "skill")} & names
    assert set(rendered.figures) == {"series", "latitude_time", "diagnostics"}


def test_a_reader_bug_is_not_turned_into_an_unreadable_product(built, tmp_path, monkeypatch):
    """Only the errors of a bad file (OSError, ValueError, KeyError) leave a product out; any other exception
    is a bug and propagates, naming the product it was reading."""
    def broken(path):
        raise ZeroDivisionError("a bug in the reader")

    monkeypatch.setattr("pipeline.regression.read_calibration_csv", broken)
    with pytest.raises(ZeroDivisionError, match="a bug in the reader") as info:
        load_products(built["products"])
    assert info.value.__notes__ == [f"while reading the product {built['products'] / 'calibration.csv'}"]


@pytest.mark.parametrize("content, match", [
    ("{ not json", r"config.json: unreadable \(Expecting property name"),
    ("[1, 2]", r"config.json: got a JSON list; expected the object of Config.to_dict\(\)"),
    (json.dumps({"series": {"b0_method": "guess"}}), r"config.json \[series\]: series.b0_method: got 'guess'"),
    (json.dumps({"measure": {"cap_latitude_deg": "sixty"}}), r"config.json \[measure\]: measure.cap_latitude_deg"),
    (json.dumps({"reversals": [1]}), r"config.json \[reversals\]: got a JSON list"),
])
def test_an_invalid_config_json_is_an_error_with_its_reason_not_the_defaults(built, tmp_path, capsys, content,
                                                                             match):
    """Issue 17: the products' settings are never replaced by the defaults; the report stops with the reason
    (ConfigError in Python, one line and exit 2 from the command line)."""
    products = tmp_path / "p"
    shutil.copytree(built["products"], products)
    (products / "config.json").write_text(content)
    for name in ("series.nc", "latitude_time.nc", "reversals.json"):
        (products / name).unlink()  # the report would recompute these with the settings
    with pytest.raises(ConfigError, match=match):
        build_report(built["store"], tmp_path / "out", products)
    assert not (tmp_path / "out").exists()
    assert main(["report", str(built["store"]), "--out", str(tmp_path / "cli"), "--products", str(products)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and re.search(match, err[0]) and "configuration error" in err[0]


def test_the_store_is_read_under_the_settings_of_config_json_or_its_own(built, tmp_path, capsys):
    """The measure settings in force: config.json's [measure] (records measured otherwise are refused in one
    line, exit 2: pipeline.store.check_measure_settings); without config.json, the store's own."""
    products = tmp_path / "p"
    shutil.copytree(built["products"], products)
    cfg = json.loads((products / "config.json").read_text())
    cfg["measure"]["cap_latitude_deg"] = 70.0
    (products / "config.json").write_text(json.dumps(cfg))
    assert main(["report", str(built["store"]), "--out", str(tmp_path / "out"), "--products", str(products)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("polecast report: ") and "cap_latitude_deg" in err[0] and "70" in err[0]
    (products / "config.json").unlink()
    rendered = render_report(built["store"], tmp_path / "own", products)
    assert rendered.measure == MeasureSettings()   # what tests/_report_store.py measured with
    assert "config.json: not in the products directory" in rendered.products.notes


def test_a_failed_figure_write_leaves_the_previous_report_whole(built, tmp_path, monkeypatch, capsys):
    """Every report file goes through a temporary file and a rename: a save that fails half-way leaves the
    previous PNG and page byte for byte and no temporary file (regression only)."""
    from matplotlib.figure import Figure

    out = tmp_path / "out"
    shutil.copytree(built["index"].parent, out)
    before = {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()}

    def torn(self, fname, **kwargs):
        with open(fname, "wb") as fh:
            fh.write(PNG_SIGNATURE)
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(Figure, "savefig", torn)
    assert main(["report", str(built["store"]), "--out", str(out), "--products", str(built["products"])]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "cannot write the report" in err[0] and "No space left on device" in err[0]
    after = {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()}
    assert after == before


def test_cli_report_prints_the_page_and_exit_codes(built, tmp_path, capsys):
    out = tmp_path / "cli"
    assert main(["report", str(built["store"]), "--out", str(out), "--products", str(built["products"])]) == 0
    assert capsys.readouterr().out.strip() == f"report: {out / 'index.html'}"
    assert f"<title>{html.escape(ReportSettings().title)}</title>" in (out / "index.html").read_text()
    assert main(["report", str(tmp_path / "nope.polecast"), "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no such file" in err[0] and "polecast ingest" in err[0]
    assert main(["report", str(built["store"]), "--out", str(out), "--products", str(tmp_path / "none")]) == 2
    assert "--products" in capsys.readouterr().err
    bad = tmp_path / "bad.toml"
    bad.write_text("[report]\ndpi = 0\n")
    assert main(["report", str(built["store"]), "--out", str(out), "--config", str(bad)]) == 2
    assert "report.dpi" in capsys.readouterr().err


@pytest.mark.parametrize("kw, key", [({"dpi": 0}, "report.dpi"), ({"figure_width_in": 100.0}, "report.figure_width_in"),
                                     ({"title": " "}, "report.title"), ({"max_table_rows": 0}, "report.max_table_rows")])
def test_settings_validation_names_the_key(kw, key):
    with pytest.raises(ConfigError, match=key):
        ReportSettings(**kw)

# -- headless Chromium ------------------------------------------------------------------------------
# The report page in headless Chromium: it renders, every image loads, no console error, no script runs.
#
# A copy of the page gets a small checker script at the top of ``<head>`` (the
# copy's Content-Security-Policy allows inline scripts; the real page forbids
# all scripts).  On ``load`` the checker writes into the DOM how many images
# there are, how many failed (an image has loaded when ``complete &&
# naturalWidth > 0``, HTML Living Standard, "img" element), every error event,
# every CSP violation and any call of ``alert``; Chromium's ``--dump-dom``
# prints the DOM after load.  Console messages on stderr
# (``--enable-logging=stderr``) are scanned too.  Two negative controls show
# the checker catches a broken image and a name that was not escaped.

_CANDIDATES = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable", "headless_shell")
CHROMIUM = next((p for p in map(shutil.which, _CANDIDATES) if p), None)

needs_chromium = pytest.mark.skipif(CHROMIUM is None, reason="no chromium binary on PATH (Debian package 'chromium'; "
                                                         ".ci/run installs it)")

_CHECKER = """<script>
window.__problems = [];
window.alert = function (m) { window.__problems.push('alert called: ' + m); };
window.addEventListener('error', function (e) {
  var t = e.target;
  window.__problems.push(t && t.tagName ? 'resource failed: ' + t.tagName : 'error: ' + e.message);
}, true);
document.addEventListener('securitypolicyviolation', function (e) {
  window.__problems.push('csp violation: ' + e.violatedDirective);
});
(function () {
  var orig = console.error;
  console.error = function () { window.__problems.push('console.error: ' + Array.prototype.join.call(arguments, ' ')); };
})();
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var broken = imgs.filter(function (i) { return !(i.complete && i.naturalWidth > 0); }).length;
  var d = document.createElement('pre');
  d.id = 'polecast-check';
  d.textContent = 'CHECK images=' + imgs.length + ' broken=' + broken + ' problems=' +
                  window.__problems.length + ' :: ' + window.__problems.join(' | ');
  document.body.appendChild(d);
});
</script>"""

_MARK = re.compile(r"CHECK images=(\d+) broken=(\d+) problems=(\d+) :: ([^<]*)")


def _instrumented(page: str) -> str:
    page = page.replace("script-src 'none'", "script-src 'unsafe-inline'")
    return page.replace("<meta charset=\"utf-8\">", "<meta charset=\"utf-8\">\n" + _CHECKER, 1)


def _open_in_chromium(path, profile) -> tuple[dict, list]:
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0", "--virtual-time-budget=10000",
           "--dump-dom", path.resolve().as_uri()]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=180)
    m = _MARK.search(proc.stdout)
    assert m, f"the checker did not report (exit {proc.returncode}); stderr tail: {proc.stderr[-800:]}"
    # the page itself has no script, and the checker logs nothing: any console message is a problem
    console = [ln for ln in proc.stderr.splitlines() if ":CONSOLE" in ln]
    return ({"images": int(m.group(1)), "broken": int(m.group(2)), "problems": int(m.group(3)),
             "detail": m.group(4)}, console)


@needs_chromium
def test_report_renders_in_chromium_with_every_image_and_no_console_error(built, tmp_path):
    page = built["index"]
    probe = page.with_name("probe.html")
    probe.write_text(_instrumented(page.read_text(encoding="utf-8")), encoding="utf-8")
    result, console = _open_in_chromium(probe, tmp_path / "profile")
    assert result["images"] == len(FIGURE_FILES)
    assert result["broken"] == 0, result
    assert result["problems"] == 0, result["detail"]
    assert console == []


@needs_chromium
def test_chromium_checker_catches_a_broken_image_and_an_unescaped_name(built, tmp_path):
    page = built["index"]
    # negative control: the same page with one image's data corrupted and the hostile name left raw
    text = _instrumented(page.read_text(encoding="utf-8"))
    text = text.replace("data:image/png;base64,", "data:image/png;base64,AAAA", 1)
    text = text.replace("&lt;script&gt;alert(1)&lt;/script&gt;", "<script>alert(1)</script>", 1)
    probe = tmp_path / "broken.html"
    probe.write_text(text, encoding="utf-8")
    result, _ = _open_in_chromium(probe, tmp_path / "profile")
    assert result["broken"] == 1
    assert "alert called" in result["detail"]


def test_history_named_by_the_run_configuration_is_found(built, tmp_path):
    products = tmp_path / "p"
    shutil.copytree(built["products"], products)
    elsewhere = tmp_path / "history" / "kvm_forecasts.jsonl"
    elsewhere.parent.mkdir()
    shutil.move(products / "forecast_history.jsonl", elsewhere)
    cfg = json.loads((products / "config.json").read_text())
    cfg.setdefault("run", {})["history"] = str(elsewhere)
    (products / "config.json").write_text(json.dumps(cfg))
    loaded = load_products(products)
    assert [e["data_date"] for e in loaded.history] == [u[0] for u in HISTORY_UPDATES]


def test_calibration_figure_and_table_show_only_the_rows_of_the_forecast_phase(tmp_path):
    """A table of several phases: the report shows the rows that the forecast regressed (issue 10: only
    like is regressed on like), and says so; without a forecast phase every row is shown with a note
    (project convention, no outside source)."""
    from pipeline.report.page import calibration_rows_table

    lines = ["cycle,precursor,amplitude,precursor_error,phase,scale"]
    for k in range(6):
        lines.append(f"{k + 1},{2.0 + k},{80 + 20 * k},0.1,minimum,S")
        lines.append(f"{k + 1},{1.0 + 0.5 * k},{80 + 20 * k},0.1,reversal+3,S")
    (tmp_path / "calibration.csv").write_text("\n".join(lines) + "\n")
    (tmp_path / "forecast.json").write_text(json.dumps({"phase": "reversal+3", "amplitude": 120.0}))
    products = load_products(tmp_path)
    table = products.calibration
    assert table.n_cycles == 6 and set(table.phase) == {"reversal+3"}
    assert list(table.precursor) == [1.0 + 0.5 * k for k in range(6)]
    assert any("6 rows of the forecast's phase 'reversal+3' are shown (of 12 rows" in n for n in products.notes)
    page = calibration_rows_table(table)
    assert page.count("reversal+3") == 6 and "minimum" not in page and "amplitude error" not in page
    (tmp_path / "forecast.json").unlink()
    whole = load_products(tmp_path)
    assert whole.calibration.n_cycles == 12
    assert any("no forecast names one" in n for n in whole.notes)
