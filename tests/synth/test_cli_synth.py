"""``polecast synth``: exit codes, files, usage errors."""

import json
import warnings

from pipeline.cli import main

warnings.filterwarnings("ignore", message=".*dubious year.*")


def test_synth_writes_frames_and_truth(tmp_path, capsys):
    out = tmp_path / "arch"
    code = main(["synth", str(out), "--start", "2036-01-01", "--end", "2036-03-01", "--cadence", "30",
                 "--size", "48", "--seed", "1", "--quiet"])
    assert code == 0
    fits_files = sorted(p.name for p in out.glob("*.fits"))
    assert fits_files == ["kvm_20360101_000000.fits", "kvm_20360131_000000.fits", "kvm_20360301_000000.fits"]
    truth = json.loads((out / "truth.json").read_text())
    assert truth["generator"]["size"] == 48 and truth["generator"]["cadence_days"] == 30.0
    assert "wrote 3 frames" in capsys.readouterr().out


def test_synth_usage_error_names_the_argument(tmp_path, capsys):
    code = main(["synth", str(tmp_path / "x"), "--start", "2031-02-30"])
    assert code == 2
    err = capsys.readouterr().err
    assert "start: got '2031-02-30'; expected a date YYYY-MM-DD" in err
    assert not (tmp_path / "x").exists()
