"""TOML configuration -> frozen, validated dataclasses.

Every stage takes its own small settings object; :func:`load_config` reads a
TOML file into a :class:`Config` that holds one of each.  Validation happens
once, on entry, in :func:`check_number` / :func:`check_choice`; every message
names the key, the bad value and what is allowed.

The documented default configuration lives in ``configs/default.toml``; the
values below are the same defaults, so a file may leave out any key.
"""

from __future__ import annotations

import dataclasses
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

__all__ = [
    "ConfigError",
    "MeasureSettings",
    "Config",
    "SECTION_CLASSES",
    "check_number",
    "check_choice",
    "load_config",
    "settings_from_mapping",
]


class ConfigError(ValueError):
    """A configuration value is missing, of the wrong type or out of range."""


def check_number(name: str, value: Any, *, lo: float | None = None, hi: float | None = None,
                 lo_open: bool = False, integer: bool = False) -> float | int:
    """Validate one numeric setting and return it.

    Parameters
    ----------
    name : str
        Dotted key, used in the message (``measure.mu_min``).
    value : object
        The value read from the file or the command line.
    lo, hi : float, optional
        Inclusive bounds (``lo`` exclusive when ``lo_open``).
    integer : bool
        Require a whole number.

    Raises
    ------
    ConfigError
        With the key, the bad value and the allowed range.
    """
    allowed = "a whole number" if integer else "a number"
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise ConfigError(f"{name}: got {value!r}; expected {allowed}")
    if integer and int(value) != value:
        raise ConfigError(f"{name}: got {value!r}; expected {allowed}")
    bad_lo = lo is not None and (value <= lo if lo_open else value < lo)
    bad_hi = hi is not None and value > hi
    if bad_lo or bad_hi:
        lo_txt = "-inf" if lo is None else f"{lo:g}"
        hi_txt = "inf" if hi is None else f"{hi:g}"
        bracket = "(" if lo_open else "["
        raise ConfigError(f"{name}: got {value!r}; allowed range is {bracket}{lo_txt}, {hi_txt}]")
    return int(value) if integer else float(value)


def check_choice(name: str, value: Any, choices) -> str:
    """Validate a named option against its valid choices and return it."""
    valid = sorted(choices)
    if value not in valid:
        raise ConfigError(f"{name}: got {value!r}; valid choices are {', '.join(map(repr, valid))}")
    return value


@dataclass(frozen=True)
class MeasureSettings:
    """How one frame is measured.

    Attributes
    ----------
    cap_latitude_deg : float
        A polar cap is ``|latitude| >= cap_latitude_deg`` (degrees).
    mu_min : float
        Pixels with mu below this are left out (dimensionless).
    max_image_pixels : int
        Refuse any header declaring more pixels than this (a guard against
        absurd or hostile headers).
    profile_min_latitude_deg : float
        Per-frame latitude profiles (for the latitude-time diagram and the
        B0 profile correction) cover ``|latitude| >= this``; 0 for the
        whole disk at the price of reading every row.
    profile_bin_deg : float
        Width of the latitude bins of the profile (degrees).
    hdu : int or None
        Index of the image HDU; ``None`` takes the first 2-D image.
    zero_offset : {"weak-field-mean", "none"}
        Zero-point offset treatment of the line-of-sight data
        (:mod:`pipeline.zero_offset`): ``"weak-field-mean"`` subtracts the
        offset estimated from the sigma-clipped weak-field pixels of the low-latitude disk
        from the cap and profile means (``Br = (Blos - delta) / mu``);
        ``"none"`` leaves the means as measured.  The estimate is made and
        recorded in every record whatever this setting, so either treatment
        can be had later without measuring again
        (:func:`pipeline.zero_offset.toggle_records`), and the reversal
        ensemble always re-runs the other treatment
        (:mod:`pipeline.systematics`).  Default ``"none"``: the weak-field
        mean also takes any real net low-latitude field for an offset, and
        at small image sizes its per-frame error (0.17 G at 96 px on the
        synthetic star) adds noise to every cap mean; turn it on for an
        instrument known to have an offset.  A store measured before this
        key existed has no estimate and means as measured (``"none"``).
    """

    cap_latitude_deg: float = 60.0
    mu_min: float = 0.1
    max_image_pixels: int = 16384 * 16384
    profile_min_latitude_deg: float = 55.0
    profile_bin_deg: float = 1.0
    hdu: int | None = None
    zero_offset: str = "none"

    def __post_init__(self):
        check_number("measure.cap_latitude_deg", self.cap_latitude_deg, lo=0.0, hi=90.0, lo_open=True)
        check_number("measure.mu_min", self.mu_min, lo=0.0, hi=1.0, lo_open=True)
        check_number("measure.max_image_pixels", self.max_image_pixels, lo=1, integer=True)
        check_number("measure.profile_min_latitude_deg", self.profile_min_latitude_deg, lo=0.0, hi=90.0)
        check_number("measure.profile_bin_deg", self.profile_bin_deg, lo=0.0, hi=90.0, lo_open=True)
        if abs(90.0 / self.profile_bin_deg - round(90.0 / self.profile_bin_deg)) > 1e-9:
            raise ConfigError(f"measure.profile_bin_deg: got {self.profile_bin_deg!r}; "
                              "it must divide 90 degrees (e.g. 0.5, 1, 2, 5)")
        if self.hdu is not None:
            check_number("measure.hdu", self.hdu, lo=0, integer=True)
        from pipeline.zero_offset import ZERO_OFFSET_METHODS

        check_choice("measure.zero_offset", self.zero_offset, ZERO_OFFSET_METHODS)

    @property
    def read_latitude_deg(self) -> float:
        """Lowest |latitude| any product of this measurement needs (degrees)."""
        return min(self.cap_latitude_deg, self.profile_min_latitude_deg)


#: Section name -> "module:Class" of its settings dataclass.  Each stage defines
#: its own frozen settings class beside its code; sections whose module is not
#: importable yet are simply absent.
SECTION_CLASSES: dict[str, str] = {
    "measure": "pipeline.config:MeasureSettings",
    "ingest": "pipeline.batch:IngestSettings",
    "series": "pipeline.aggregator:SeriesSettings",
    "reversals": "pipeline.reversal:ReversalSettings",
    "cycles": "pipeline.cycles:CycleSettings",
    "forecast": "pipeline.regression:ForecastSettings",
    "report": "pipeline.report:ReportSettings",
    "run": "pipeline.run:RunSettings",
}


def _section_classes() -> dict[str, type]:
    import importlib

    out = {}
    for name, target in SECTION_CLASSES.items():
        module, _, cls = target.partition(":")
        try:
            out[name] = getattr(importlib.import_module(module), cls)
        except (ImportError, AttributeError):
            continue
    return out


@dataclass(frozen=True)
class Config:
    """The whole configuration: one validated settings object per section.

    ``config.measure``, ``config.series``, ... return the section's frozen
    dataclass (its defaults when the file leaves the section out).
    """

    sections: dict = field(default_factory=dict)
    source_path: str | None = None

    def __getattr__(self, name):
        sections = object.__getattribute__(self, "sections")
        if name in sections:
            return sections[name]
        classes = _section_classes()
        if name in classes:
            return classes[name]()
        raise AttributeError(name)

    def to_dict(self) -> dict:
        """Plain nested dict of every section (for provenance in stores and reports)."""
        return {name: dataclasses.asdict(obj) for name, obj in sorted(self.sections.items())}


def settings_from_mapping(cls: type, section: str, mapping: dict) -> Any:
    """Build a settings dataclass from a TOML table, refusing unknown keys."""
    if not isinstance(mapping, dict):
        raise ConfigError(f"[{section}]: expected a table, got {mapping!r}")
    names = {f.name for f in dataclasses.fields(cls)}
    unknown = sorted(set(mapping) - names)
    if unknown:
        raise ConfigError(
            f"[{section}]: unknown key(s) {', '.join(unknown)}; valid keys are {', '.join(sorted(names))}")
    return cls(**mapping)


def load_config(path: str | Path | None = None, **overrides: dict) -> Config:
    """Read a TOML configuration file into a validated :class:`Config`.

    Parameters
    ----------
    path : str or Path, optional
        The TOML file; ``None`` gives the defaults.
    **overrides : dict
        Per-section overrides, e.g. ``measure={"mu_min": 0.2}`` (command-line
        options win over the file).

    Raises
    ------
    ConfigError
        For an unreadable file, invalid TOML, an unknown section or key, or a
        bad value.
    """
    raw: dict = {}
    if path is not None:
        try:
            raw = tomllib.loads(Path(path).read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ConfigError(f"configuration file {path}: not found") from None
        except (OSError, UnicodeDecodeError) as exc:
            raise ConfigError(f"configuration file {path}: cannot read ({exc})") from None
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"configuration file {path}: invalid TOML ({exc})") from None
    classes = _section_classes()
    unknown = sorted(set(raw) - set(classes))
    if unknown:
        raise ConfigError(
            f"unknown section(s) {', '.join(unknown)}; valid sections are {', '.join(sorted(classes))}")
    sections = {}
    for name, cls in classes.items():
        table = dict(raw.get(name, {}))
        table.update({k: v for k, v in overrides.get(name, {}).items() if v is not None})
        sections[name] = settings_from_mapping(cls, name, table)
    return Config(sections=sections, source_path=None if path is None else str(path))
