"""Shared fixtures."""

import io
import warnings
from contextlib import redirect_stderr, redirect_stdout
from dataclasses import dataclass
from pathlib import Path

import pytest

from tests._frames import write_frame

warnings.filterwarnings("ignore", message=".*dubious year.*")


@pytest.fixture

def frame_file(tmp_path):
    return write_frame(tmp_path / "frame.fits")


@dataclass(frozen=True)
class DemoRun:
    """``polecast demo`` run once per session: its output folder, exit code and what it printed."""

    out: Path
    exit_code: int
    stdout: str
    stderr: str

    @property
    def store(self) -> Path:
        return self.out / "store.sqlite"


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory) -> DemoRun:
    """The demo measured once per session, in-process (``pipeline.cli.main``); later tests copy its store.

    Measuring the 244 demo frames is the one expensive step of the run tests;
    every other run test seeds its store from this one
    (:func:`tests._demo_store.seed_store`).
    """
    from pipeline.cli import main

    out = tmp_path_factory.mktemp("demo")
    stdout, stderr = io.StringIO(), io.StringIO()
    with redirect_stdout(stdout), redirect_stderr(stderr):
        code = main(["demo", "--out", str(out), "--workers", "2"])
    return DemoRun(out, code, stdout.getvalue(), stderr.getvalue())
