"""Small synthetic magnetograms written with standard solar WCS headers, for tests."""

from __future__ import annotations

import warnings

import numpy as np

from pipeline.projection import Observer
from pipeline.synth.instrument import ObservingSetup, frame_header, geometry_for, render_los, write_magnetogram

warnings.filterwarnings("ignore", message=".*dubious year.*")

AU_M = 1.495978707e11  # IAU 2012 Resolution B2 (astronomical unit)
RSUN_M = 6.96e8        # common RSUN_REF of magnetograph headers (common practice, no source)


def make_observer(b0_deg=5.0, hgln_deg=0.0, crln_deg=200.0, distance_m=AU_M, rsun_m=RSUN_M):
    return Observer(distance_m, b0_deg, hgln_deg, crln_deg, rsun_m)


def uniform_caps(north_gauss=10.0, south_gauss=-7.0, cap_deg=60.0, elsewhere_gauss=0.5):
    """Radial field: one value in each cap, another elsewhere."""
    def br(lat, lon):
        return np.where(lat >= cap_deg, north_gauss, np.where(lat <= -cap_deg, south_gauss, elsewhere_gauss))
    return br


def write_frame(path, br=None, *, observer=None, size=128, rotation_deg=0.0, compression="RICE_1",
                date_obs="2031-03-04T05:06:07", bscale=0.001, offset=(0.0, 0.0), header_edit=None,
                noise_gauss=0.0, seed=0):
    """Render ``br`` to line of sight and write it; returns the path."""
    observer = observer or make_observer()
    geom = geometry_for(ObservingSetup(size=size, rotation_deg=rotation_deg, offset_pixels=offset), observer)
    img = render_los(br or uniform_caps(), geom, observer)
    if noise_gauss:
        img = img + np.random.default_rng(seed).normal(0.0, noise_gauss, img.shape)
    hdr = frame_header(geom, observer, date_obs)
    if header_edit:
        header_edit(hdr)
    write_magnetogram(path, img, hdr, compression=compression, bscale=bscale)
    return path


def declare_size(path, n):
    """Rewrite the NAXIS1/NAXIS2 cards in place (bytes), leaving the data as written (a hostile header)."""
    raw = bytearray(path.read_bytes())
    for key in (b"NAXIS1  =", b"NAXIS2  ="):
        i = raw.index(key)
        raw[i:i + 80] = (key.decode() + f"{n:>21d}").ljust(80).encode()
    path.write_bytes(bytes(raw))
    return path
