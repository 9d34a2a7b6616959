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


# --- frames rendered without pipeline.projection: sunpy's coordinate frames per pixel ---------------------

def _unit_vectors(tx_deg, ty_deg):
    """Helioprojective (Tx, Ty) -> unit vectors (Thompson 2006, A&A 449, 791, eq. 15 with d = 1)."""
    tx, ty = np.deg2rad(tx_deg), np.deg2rad(ty_deg)
    return np.stack([np.cos(ty) * np.sin(tx), np.sin(ty), np.cos(ty) * np.cos(tx)])


def _triangle_solid_angle(a, b, c):
    """Solid angle of the spherical triangle of unit vectors a, b, c:
    tan(Omega / 2) = |a . (b x c)| / (1 + a.b + b.c + c.a) (Van Oosterom & Strackee 1983,
    IEEE Trans. Biomed. Eng. 30, 125)."""
    num = np.abs(np.einsum("i...,i...->...", a, np.cross(b, c, axis=0)))
    den = 1.0 + (a * b).sum(axis=0) + (b * c).sum(axis=0) + (c * a).sum(axis=0)
    return 2.0 * np.arctan2(num, den)


def sunpy_surface(header, shape):
    """Stonyhurst latitude, mu and midpoint area of every pixel, by a route that shares no code with
    pipeline.projection.

    Reference library: sunpy's frames (``all_coordinates_from_map`` then HeliographicStonyhurst, which
    intersects each pixel's ray with the sphere of radius RSUN_REF seen from the header's observer).  mu is
    the cosine between the outward normal ``P / |P|`` and the direction ``(O - P) / |O - P|`` to the
    observer, from the 3-D vectors.  A pixel's solid angle is that of the spherical quadrilateral of its
    four corners (astropy.wcs at pixel +-0.5, two triangles by Van Oosterom & Strackee 1983); its area on
    the sphere is solid angle x |O - P|^2 / mu (DESIGN.md).  Off-disk pixels hold NaN.

    Returns
    -------
    dict with ``latitude_deg``, ``mu``, ``area_m2`` (arrays of ``shape``).
    """
    import astropy.units as u
    import sunpy.map
    from sunpy.coordinates import HeliographicStonyhurst
    from sunpy.map import all_coordinates_from_map

    header = header.copy()
    header["NAXIS"], header["NAXIS1"], header["NAXIS2"] = 2, shape[1], shape[0]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        m = sunpy.map.Map(np.zeros(shape, dtype=np.float32), header)
        frame = HeliographicStonyhurst(obstime=m.reference_date)
        hgs = all_coordinates_from_map(m).transform_to(frame)
        obs = m.observer_coordinate.transform_to(frame)
        p = hgs.cartesian.xyz.to_value(u.m)
        o = obs.cartesian.xyz.to_value(u.m)[:, None, None]
        ny, nx = shape
        yy, xx = np.mgrid[0:ny, 0:nx].astype(float)
        corners = [_unit_vectors(*m.wcs.pixel_to_world_values(xx + dx, yy + dy))
                   for dx, dy in ((-0.5, -0.5), (0.5, -0.5), (0.5, 0.5), (-0.5, 0.5))]
    normal = p / np.linalg.norm(p, axis=0)
    view = o - p
    dist = np.linalg.norm(view, axis=0)
    mu = (normal * view).sum(axis=0) / dist
    omega = (_triangle_solid_angle(corners[0], corners[1], corners[2])
             + _triangle_solid_angle(corners[0], corners[2], corners[3]))
    return {"latitude_deg": hgs.lat.to_value(u.deg), "mu": mu, "area_m2": omega * dist ** 2 / mu}


def write_sunpy_frame(path, br_of_lat, *, observer=None, size=128, rotation_deg=0.0, compression=None,
                      offset=(1.5, -2.5), bscale=1e-4, noise_gauss=0.0, seed=0):
    """Write Blos = Br(latitude) x mu with latitude and mu from :func:`sunpy_surface` (not from
    pipeline.projection); returns ``(path, surface)`` with the surface dict used."""
    observer = observer or make_observer()
    geom = geometry_for(ObservingSetup(size=size, rotation_deg=rotation_deg, offset_pixels=offset), observer)
    hdr = frame_header(geom, observer, "2031-03-04T05:06:07")
    surface = sunpy_surface(hdr, (size, size))
    on = np.isfinite(surface["mu"])
    blos = np.full((size, size), np.nan)
    blos[on] = br_of_lat(surface["latitude_deg"][on]) * surface["mu"][on]
    if noise_gauss:
        blos = blos + np.random.default_rng(seed).normal(0.0, noise_gauss, blos.shape)
    write_magnetogram(path, blos, hdr, compression=compression, bscale=bscale)
    return path, surface
