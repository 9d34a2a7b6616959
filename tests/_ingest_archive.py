"""Small synthetic archives (good and hostile files) for the store and ingest tests."""

from __future__ import annotations

import dataclasses
import os

import numpy as np
from astropy.io import fits

from pipeline.config import MeasureSettings

from tests._frames import declare_size, make_observer, write_frame

#: name -> regular expression of the reason `pipeline.reader` gives (its own wording: regression only)
HOSTILE_REASONS = {
    "empty.fits": "empty file",
    "truncated.fits": "truncated",
    "text.fits": "not a FITS file",
    "kelvin.fits": "BUNIT",
    "notime.fits": "no observation time",
    "absurd.fits": "exceeds the ceiling",
    "allnan.fits": "no valid pixels",
}


def polar_field(north_gauss: float, south_gauss: float):
    """Radial field growing towards each pole: ``B sin^8(latitude)`` with the hemisphere's sign."""
    def br(lat, lon):
        s = np.sin(np.deg2rad(lat))
        return np.where(lat >= 0, north_gauss, -south_gauss) * s ** 8 * np.sign(lat)
    return br


def write_good(path, k: int, size: int = 64):
    """The k-th good frame: distinct date, B0, longitude and field strengths."""
    obs = make_observer(b0_deg=7.0 * np.sin(k / 3.0), crln_deg=(13.2 * k) % 360.0)
    day = 1 + k % 28
    month = 1 + (k // 28) % 12
    return write_frame(path, polar_field(6.0 + 0.25 * k, -5.0 - 0.1 * k), observer=obs, size=size,
                       date_obs=f"2032-{month:02d}-{day:02d}T{k % 24:02d}:30:00", bscale=0.01)


def good_archive(root, n: int, size: int = 64) -> list:
    """n good frames, alternately at the top level and in a sub-directory; returns their paths."""
    (root / "deep" / "er").mkdir(parents=True, exist_ok=True)
    paths = []
    for k in range(n):
        where = root if k % 2 == 0 else root / "deep" / "er"
        paths.append(write_good(where / f"kvm_{k:04d}.fits", k, size))
    return paths


def hostile_files(root) -> dict:
    """One file of each kind of bad input (FITS Standard 4.0 violations or unusable content); name -> path."""
    root.mkdir(parents=True, exist_ok=True)
    out = {}
    out["empty.fits"] = root / "empty.fits"
    out["empty.fits"].write_bytes(b"")
    plain = write_frame(root / "plain.tmp", size=64, compression=None, noise_gauss=3.0)
    raw = plain.read_bytes()
    out["truncated.fits"] = root / "truncated.fits"
    out["truncated.fits"].write_bytes(raw[: len(raw) - 4000])
    out["text.fits"] = root / "text.fits"
    out["text.fits"].write_text("these are not the bytes you are looking for\n" * 100)

    def kelvin(h):
        h["BUNIT"] = "K"

    out["kelvin.fits"] = write_frame(root / "kelvin.fits", size=64, header_edit=kelvin)

    def notime(h):
        del h["DATE-OBS"]

    out["notime.fits"] = write_frame(root / "notime.fits", size=64, header_edit=notime)
    out["absurd.fits"] = declare_size(write_frame(root / "absurd.fits", size=64, compression=None), 1_000_000)
    out["allnan.fits"] = write_frame(root / "allnan.fits", br=lambda lat, lon: np.full(lat.shape, np.nan), size=64)
    plain.unlink()
    return out


def distinct_copy(src, dst, k: int):
    """Copy a FITS file, changing only its OBJECT card, so the bytes (and digest) differ."""
    with fits.open(src) as hdul:
        hdul[-1].header["OBJECT"] = f"Tessaly copy {k}"
        hdul.writeto(dst, overwrite=True)
    return dst


def record_store(path, settings=None, n: int = 40, start: int = 0, measure_version=None, t0_year: float = 2030.0):
    """Add ``n`` simple ok records measured "under" ``settings`` to the store at ``path``; returns ``path``.

    The records are plain FrameRecords (no FITS file behind them), dipole ``6 sin(2 pi (t - 2033) / 22)`` G,
    one every 0.04 yr from ``t0_year`` (invented demo data), with digests ``start .. start + n - 1`` so that
    several calls add distinct contents.  ``measure_version`` None takes the code's
    :data:`pipeline.measure.MEASUREMENT_VERSION`.  Series of them need ``[series] b0_method = "visible"``
    (they carry no latitude profile).
    """
    from pipeline.measure import MEASUREMENT_VERSION, FrameRecord
    from pipeline.store import MeasuredFile, open_store
    from pipeline.timeutil import from_decimal_year, iso_time

    settings = settings or MeasureSettings()
    mv = MEASUREMENT_VERSION if measure_version is None else measure_version
    results = []
    for k in range(start, start + n):
        t = t0_year + 0.04 * k
        d = 6.0 * np.sin(2 * np.pi * (t - 2033.0) / 22.0)
        rec = FrameRecord(file=f"kvm_{k:04d}.fits", status="ok", time=iso_time(from_decimal_year(t)), b0_deg=0.0,
                          north_br_gauss=d, south_br_gauss=-d, north_br_error_gauss=0.2, south_br_error_gauss=0.2,
                          north_coverage=0.5, south_coverage=0.5, north_pixels=100, south_pixels=100,
                          cap_latitude_deg=settings.cap_latitude_deg, mu_min=settings.mu_min)
        results.append(MeasuredFile(rec.file, 1, 1, f"{k:064x}", rec.to_dict(), mv))
    with open_store(path, "a") as store:
        store.add(results, store.register_config(settings))
        store.commit()
    return path


# --- injected faults inside whichever process measures a file ------------------------------------------------
# Local workers are separate processes (forkserver), so a monkeypatch in the test process does not reach them.
# The settings object travels to the worker with every measure task; FaultySettings carries its faults with it
# and, when it is unpickled there, wraps pipeline.measure.read_frame in that process so that the named files
# fail the way asked.  It has no extra dataclass field, so its configuration id is that of plain
# MeasureSettings with the same values: a second ingest with plain settings tries the files again.

#: fault -> what reading the file does: the worker process dies (os._exit), RuntimeError, MemoryError, or
#: ("replace", NEW) the file is read and then replaced by the file NEW (before its reading ends)
FAULTS = ("exit", "runtime", "memory", "replace")


def _faulty_read_frame(real):
    def read_frame(path, settings=None, *args, **kwargs):
        fault = getattr(settings, "_faults", {}).get(os.path.basename(os.fspath(path)))
        kind = fault[0] if isinstance(fault, tuple) else fault
        if kind == "exit":
            os._exit(70)  # the worker process dies at once, as on a segfault or the OOM killer
        if kind == "runtime":
            raise RuntimeError("injected fault")
        if kind == "memory":
            raise MemoryError()
        frame = real(path, settings, *args, **kwargs)
        if kind == "replace":
            os.replace(fault[1], path)
        return frame
    read_frame.faulty = True
    return read_frame


def _install_faults() -> None:
    import pipeline.measure as measure

    if not getattr(measure.read_frame, "faulty", False):
        measure.read_frame = _faulty_read_frame(measure.read_frame)


def _rebuild_faulty(values: dict, faults: dict):
    _install_faults()  # runs in the process that unpickles the settings: the worker
    return faulty_settings(faults, MeasureSettings(**values))


class FaultySettings(MeasureSettings):
    """MeasureSettings whose files named in ``_faults`` (base name -> one of :data:`FAULTS`) fail when read."""

    def __reduce__(self):
        return _rebuild_faulty, (dataclasses.asdict(self), dict(self._faults))


def faulty_settings(faults: dict, base: MeasureSettings | None = None) -> FaultySettings:
    """``base`` (default MeasureSettings()) with injected faults, e.g. ``{"kvm_0003.fits": "exit"}``.

    ``("replace", NEW)`` needs NEW on the same file system (``os.replace``) and outside the ingested paths.
    """
    unknown = sorted({str(f[0] if isinstance(f, tuple) else f) for f in faults.values()} - set(FAULTS))
    if unknown:
        raise ValueError(f"faults: got {unknown}; valid faults are {FAULTS}")
    obj = FaultySettings(**dataclasses.asdict(base or MeasureSettings()))
    object.__setattr__(obj, "_faults", dict(faults))
    return obj


def committed_rows(store) -> int:
    """Rows of the store's ``files`` table as another process sees them now (0 while it cannot be read)."""
    import sqlite3

    try:
        con = sqlite3.connect(f"file:{store}?mode=ro", uri=True, timeout=1)
        try:
            return con.execute("SELECT COUNT(*) FROM files").fetchone()[0]
        finally:
            con.close()
    except sqlite3.Error:
        return 0
