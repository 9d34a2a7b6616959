"""Small synthetic archives (good and hostile files) for the store and ingest tests."""

from __future__ import annotations

import numpy as np
from astropy.io import fits

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
