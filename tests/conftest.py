"""Shared fixtures."""

import warnings

import pytest

from tests._frames import write_frame

warnings.filterwarnings("ignore", message=".*dubious year.*")


@pytest.fixture

def frame_file(tmp_path):
    return write_frame(tmp_path / "frame.fits")
