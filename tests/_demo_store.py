"""Test helper: `polecast run` configurations on parts of the demo archive, seeded from the measured demo store.

The demo store is measured once per test session (the ``demo_run`` fixture of
``tests/conftest.py``, which runs ``polecast demo`` in-process).  Run tests
take a span of its frames, link them into an archive folder and start from a
store that already holds their records (:func:`seed_store`), so the run only
measures the files a test adds.
"""

from __future__ import annotations

import os
from pathlib import Path

from pipeline.config import load_config
from pipeline.store import MeasuredFile, file_digest, open_store

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "demo_fits"
DEMO_CONFIG = REPO / "configs" / "demo.toml"


def demo_sections_toml() -> str:
    """The sections of ``configs/demo.toml`` after its ``[run]`` (measure, series, forecast), as TOML text."""
    text = DEMO_CONFIG.read_text(encoding="utf-8")
    return text[text.index("[measure]"):]


def demo_measure():
    """The measure settings of the demo configuration (those the demo store was measured under)."""
    return load_config(DEMO_CONFIG).measure


def demo_files(first: str = "", last: str = "z") -> list[Path]:
    """Demo FITS files whose names sort within ``[first, last]`` (``kvm_YYYYMMDD_...``), in time order."""
    return [p for p in sorted(DEMO.glob("kvm_*.fits")) if first <= p.name <= last]


def link_archive(folder: Path, files) -> list[Path]:
    """Symbolic links to ``files`` in ``folder`` (created); the link paths."""
    folder.mkdir(parents=True, exist_ok=True)
    out = []
    for f in files:
        link = folder / Path(f).name
        link.symlink_to(f)
        out.append(link)
    return out


def seed_store(demo_store: Path, store: Path, paths) -> Path:
    """A new store at ``store`` holding the demo store's records of the files at ``paths`` (not re-measured).

    Each path (a link into the demo archive) is recorded with its stat and
    content digest, through the same :meth:`pipeline.store.Store.add` route
    as an ingest, under the demo's measure settings; an ingest of those paths
    then finds every one of them known.
    """
    paths = [Path(p) for p in paths]
    wanted = {os.path.realpath(p): p for p in paths}
    with open_store(demo_store, "r") as src:
        records = {os.path.realpath(r.file): r for r in src.iter_records(status=None)}
    missing = sorted(set(wanted) - set(records))
    if missing:
        raise ValueError(f"paths: {len(missing)} not in the demo store (e.g. {missing[0]}); link demo_fits/ files")
    results = []
    for real, path in wanted.items():
        st = os.stat(path)
        rec = records[real].to_dict()
        rec["file"] = str(path)
        results.append(MeasuredFile(str(path), st.st_size, st.st_mtime_ns, file_digest(path), rec))
    with open_store(store, "a") as st:
        st.add(results, st.register_config(demo_measure()))
        st.commit()
    return store


def write_run_config(path: Path, archive: Path, out: Path, *, store: Path | None = None, extra: str = "",
                     report: bool = False, sunspots: Path | None = None, calibration: Path | None = None,
                     forecast: str = "", allow_scale_mismatch: bool = True) -> Path:
    """A ``polecast run`` TOML on ``archive`` with the demo's sunspots, calibration and analysis sections.

    ``extra`` goes into ``[run]``; ``forecast`` (TOML lines such as ``as_of = "2054-01-01"``) is appended to
    the demo's ``[forecast]`` section.  ``allow_scale_mismatch`` is on by default, as in ``configs/demo.toml``
    (the demo's calibration declares the synthetic truth's scale).
    """
    store = store or out / "store.sqlite"
    sections = demo_sections_toml()
    if forecast:
        head, tail = sections.split("[forecast]", 1)
        if "\n[" in tail:
            raise ValueError("write_run_config: [forecast] is expected to be the last section of demo.toml")
        sections = head + "[forecast]" + tail.rstrip("\n") + "\n" + forecast + "\n"
    path.write_text(f"""
[run]
archive = ["{archive}"]
sunspots = "{sunspots or DEMO / 'sunspots.csv'}"
calibration = "{calibration or DEMO / 'calibration.csv'}"
store = "{store}"
products_dir = "{out}"
report = {'true' if report else 'false'}
allow_scale_mismatch = {'true' if allow_scale_mismatch else 'false'}
{extra}
{sections}
""", encoding="utf-8")
    return path


def write_calibration(path: Path, phases) -> Path:
    """The demo's calibration table keeping only the rows of ``phases`` (columns kept as they are)."""
    import csv

    with open(DEMO / "calibration.csv", newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        if "phase" not in (reader.fieldnames or []):
            raise ValueError("demo_fits/calibration.csv has no phase column; regenerate the demo (polecast synth)")
        rows = [r for r in reader if r["phase"].strip() in set(phases)]
        fields = reader.fieldnames
    with open(path, "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fields, lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
    return path


def write_sunspots_before(path: Path, as_of_decimal_year: float) -> Path:
    """The demo's sunspot file keeping only the months that ended before a date (decimal year)."""
    import numpy as np

    from pipeline.cycles import months_ended_before, read_sunspot_file

    months = read_sunspot_file(DEMO / "sunspots.csv", "plain-csv")
    keep = months_ended_before(months.time_decimal_year, as_of_decimal_year)
    lines = (DEMO / "sunspots.csv").read_text(encoding="utf-8").splitlines()
    if len(lines) - 1 != months.time_decimal_year.size:
        raise ValueError("demo_fits/sunspots.csv: expected one row per month with a header")
    path.write_text("\n".join([lines[0]] + [ln for ln, k in zip(lines[1:], keep) if k]) + "\n", encoding="utf-8")
    assert int(np.sum(keep)) == len(path.read_text().splitlines()) - 1
    return path
