"""`polecast measure` and `pipeline.measure.measure_file`: bad input versus errors (issue 17).

Bad input (a FrameError from the reader) is a permanent skip with its reason; anything else raised while
measuring (a bug, MemoryError) is an error: status "error", a one-line reason, a nonzero exit, never a
traceback.  The rule is the project's own (issue 17); reason wording regression only.
"""

from __future__ import annotations

import json

import pytest

import pipeline.measure as measure
from pipeline.cli import main
from pipeline.measure import measure_file
from pipeline.reader import FrameError
from tests._frames import write_frame


def _raising(exc):
    def read_frame(*args, **kwargs):
        raise exc
    return read_frame


@pytest.mark.parametrize("exc, status, reason", [
    (FrameError("not a FITS file (no SIMPLE card)"), "skipped", "not a FITS file (no SIMPLE card)"),
    (RuntimeError("a bug\nover two lines"), "error", "unexpected RuntimeError while measuring: a bug over two lines"),
    (MemoryError(), "error", "out of memory while measuring"),
    (KeyError("CRPIX1"), "error", "unexpected KeyError while measuring: 'CRPIX1'"),
])
def test_measure_file_keeps_bad_input_apart_from_errors(monkeypatch, tmp_path, exc, status, reason):
    monkeypatch.setattr(measure, "read_frame", _raising(exc))
    rec = measure_file(tmp_path / "f.fits")
    assert (rec.status, rec.reason, rec.file) == (status, reason, str(tmp_path / "f.fits"))


def test_measure_command_reports_an_error_in_one_line(monkeypatch, tmp_path, capsys):
    good = write_frame(tmp_path / "good.fits", size=64)
    real = measure.read_frame

    def read_frame(path, *args, **kwargs):
        if str(path).endswith("bad.fits"):
            raise RuntimeError("injected fault")
        return real(path, *args, **kwargs)

    monkeypatch.setattr(measure, "read_frame", read_frame)
    rc = main(["measure", str(good), str(tmp_path / "bad.fits")])
    cap = capsys.readouterr()
    # exit codes shared by every sub-command (pipeline.cli docstring): 1 = some input not measured
    assert rc == 1 and "Traceback" not in cap.err
    assert cap.err.strip().splitlines() == [
        f"polecast measure: failed {tmp_path / 'bad.fits'}: unexpected RuntimeError while measuring: injected fault"]
    rows = json.loads(cap.out)
    assert [r["status"] for r in rows] == ["ok", "error"]
