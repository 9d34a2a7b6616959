"""Report: figures written as valid PNGs, the self-contained page, escaping, tolerance of missing products, CLI."""

from __future__ import annotations

import base64
import html
import json
import re
import shutil
import struct
import subprocess
from html.parser import HTMLParser

import pytest

from pipeline.cli import main
from pipeline.config import ConfigError
from pipeline.report import FIGURE_FILES, VERSION_PACKAGES, ReportSettings, build_report, load_products
from pipeline.report.html import table_html
from tests._report_store import HOSTILE_NAME, NORTH_REVERSAL_YR, SOUTH_REVERSAL_YR, build_store, write_products

#: PNG file signature, PNG specification (ISO/IEC 15948:2004 / W3C PNG 2nd ed., sec. 5.2)
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    root = tmp_path_factory.mktemp("report")
    store = build_store(root)
    products = write_products(root / "products", store)
    index = build_report(store, root / "out", products)
    return {"root": root, "store": store, "products": products, "index": index}


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


def test_every_figure_is_a_png_of_the_configured_size(built):
    settings = ReportSettings()
    fig_dir = built["index"].parent / "figures"
    for name in FIGURE_FILES.values():
        data = (fig_dir / name).read_bytes()
        assert data[:8] == PNG_SIGNATURE, name           # PNG spec sec. 5.2
        assert len(data) > 8000, name                     # a drawn figure, not an empty canvas (regression only)
        width, height = _png_size(data)
        # pixel width = width in inches x dots per inch (matplotlib savefig; common practice, no source)
        assert width == round(settings.figure_width_in * settings.dpi), name
        assert height > 200, name


def test_page_is_self_contained_and_embeds_every_figure(built):
    page = _parse(built["index"])
    tags = [t for t, _ in page.tags]
    assert "script" not in tags and "link" not in tags and "iframe" not in tags
    metas = [a for t, a in page.tags if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"]
    assert metas and "script-src 'none'" in metas[0]["content"] and "img-src data:" in metas[0]["content"]
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
    assert "recomputed from the store" in text
    assert "calibration figure left out" in text and "no forecast history" in text
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
    (products / "calibration.csv").write_text("cycle,amplitude\n1,2\n")
    loaded = load_products(products)
    assert loaded.cycles is None and loaded.history is None and loaded.calibration is None
    index = build_report(built["store"], tmp_path / "out", products)
    text = " ".join(_parse(index).text)
    assert "cycles.json: unreadable" in text and "forecast_history.jsonl: not in the products directory" in text
    assert "calibration.csv: unreadable" in text
    names = {p.name for p in (index.parent / "figures").iterdir()}
    assert FIGURE_FILES["calibration"] not in names and FIGURE_FILES["history"] not in names


def test_cli_report_prints_the_page_and_exit_codes(built, tmp_path, capsys):
    out = tmp_path / "cli"
    assert main(["report", str(built["store"]), "--out", str(out), "--products", str(built["products"])]) == 0
    assert capsys.readouterr().out.strip() == f"report: {out / 'index.html'}"
    assert (out / "index.html").is_file()
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
    assert [e["data_date"] for e in loaded.history] == ["2033-04-01", "2033-05-01", "2033-06-01"]
