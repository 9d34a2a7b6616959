"""pipeline.config: the documented defaults are the real ones; every error names key, value, fix."""

from __future__ import annotations

import dataclasses
import re
import tomllib
from pathlib import Path

import pytest

from pipeline.config import ConfigError, MeasureSettings, _section_classes, load_config

CONFIGS = Path(__file__).resolve().parent.parent / "configs"


def test_default_toml_documents_every_section_with_the_code_defaults():
    """configs/default.toml is the documentation: each value there equals the dataclass default, and
    every key without a value (None default) appears at least as a commented line."""
    text = (CONFIGS / "default.toml").read_text()
    raw = tomllib.loads(text)
    for name, cls in _section_classes().items():
        assert name in raw, name
        defaults = dataclasses.asdict(cls())
        for key, value in raw[name].items():
            want = list(defaults[key]) if isinstance(defaults[key], tuple) else defaults[key]
            assert value == want, (name, key)
        for key in set(defaults) - set(raw[name]):
            assert re.search(rf"^#\s*{key}\s*=", text, re.M), (name, key)


@pytest.mark.parametrize("name", ["default.toml", "example.toml", "demo.toml"])
def test_shipped_configurations_load(name):
    assert load_config(CONFIGS / name).measure.cap_latitude_deg == 60.0


@pytest.mark.parametrize("text, match", [
    ("[measure]\nmu_min = 2\n", r"measure.mu_min: got 2; allowed range is \(0, 1\]"),
    ("[measure]\ncap_latitude_deg = 'sixty'\n", r"measure.cap_latitude_deg: got 'sixty'; expected a number"),
    ("[measure]\nprofile_bin_deg = 7\n", r"measure.profile_bin_deg: got 7; it must divide 90"),
    ("[measure]\nmu = 0.1\n", r"\[measure\]: unknown key\(s\) mu; valid keys are"),
    ("[cap]\nx = 1\n", r"unknown section\(s\) cap; valid sections are"),
    ("[measure\n", r"invalid TOML"),
])
def test_errors_name_key_value_and_fix(tmp_path, text, match):
    path = tmp_path / "c.toml"
    path.write_text(text)
    with pytest.raises(ConfigError, match=match):
        load_config(path)


def test_missing_file_and_overrides(tmp_path):
    with pytest.raises(ConfigError, match="not found"):
        load_config(tmp_path / "absent.toml")
    cfg = load_config(None, measure={"mu_min": 0.3, "cap_latitude_deg": None})
    assert cfg.measure == MeasureSettings(mu_min=0.3)
    assert cfg.to_dict()["measure"]["mu_min"] == 0.3
