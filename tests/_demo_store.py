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
                     report: bool = False) -> Path:
    """A ``polecast run`` TOML on ``archive`` with the demo's sunspots, calibration and analysis sections."""
    store = store or out / "store.sqlite"
    path.write_text(f"""
[run]
archive = ["{archive}"]
sunspots = "{DEMO / 'sunspots.csv'}"
calibration = "{DEMO / 'calibration.csv'}"
store = "{store}"
products_dir = "{out}"
report = {'true' if report else 'false'}
{extra}
{demo_sections_toml()}
""", encoding="utf-8")
    return path
