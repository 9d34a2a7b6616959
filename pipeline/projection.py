"""Pixel -> point on the solar sphere, with exact finite-distance geometry.

For every pixel of a full-disk image this module computes the Stonyhurst
latitude and longitude, the Carrington longitude, mu and the area on the
sphere the pixel covers, vectorised over blocks of pixels with numpy (no
per-pixel ``SkyCoord``).  The chain is

1. pixel -> intermediate world coordinates (CRPIX, CDELT x PC) and, for the
   gnomonic (TAN) projection, the native direction of the ray
   (Calabretta & Greisen 2002, A&A 395, 1077, eqs. 1, 12-14, 54);
2. native -> helioprojective (Tx, Ty) by the spherical rotation of
   Calabretta & Greisen 2002 eq. 2, written as one 3x3 matrix;
3. helioprojective -> heliocentric-Cartesian (Thompson 2006, A&A 449, 791,
   eq. 15) by intersecting the ray with the sphere of radius RSUN_REF seen
   from distance DSUN_OBS (the near root of the ray-sphere quadratic);
4. heliocentric-Cartesian -> Stonyhurst (Thompson 2006, eq. 11) for an
   observer at latitude B0 and Stonyhurst longitude HGLN_OBS, and
   Carrington longitude = Stonyhurst longitude + (CRLN_OBS - HGLN_OBS).

mu is the cosine of the angle between the outward normal at the surface
point and the direction from that point to the observer.  A pixel's area on
the sphere is its solid angle times the squared observer distance divided by
mu (DESIGN.md).  Angles are degrees at the interface, radians inside.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "Observer",
    "ImageGeometry",
    "Window",
    "SurfaceBlock",
    "ray_directions",
    "surface_points",
    "plan_windows",
    "grow_mask",
    "cap_area_m2",
    "visible_area_m2",
]


@dataclass(frozen=True)
class Observer:
    """Where the image was taken from.

    Attributes
    ----------
    distance_m : float
        Observer - Sun-centre distance (DSUN_OBS), metres.
    b0_deg : float
        Heliographic (Stonyhurst) latitude of the observer (HGLT_OBS), degrees.
    hgln_deg : float
        Stonyhurst longitude of the observer (HGLN_OBS), degrees.
    crln_deg : float
        Carrington longitude of the observer (CRLN_OBS), degrees.
    rsun_m : float
        Radius of the sphere the data are projected onto (RSUN_REF), metres.
    source : str
        Where the observer came from: ``"header"`` (the file's observer
        keywords), ``"ephemeris"`` (none present: the Earth's position for
        the time), ``"header+ephemeris"`` (some keywords present, the
        missing coordinates from the Earth's ephemeris; the record's notes
        name which) or ``"instrument default"`` (sunpy's rule for that
        instrument's map source).
    """

    distance_m: float
    b0_deg: float
    hgln_deg: float
    crln_deg: float
    rsun_m: float
    source: str = "header"


@dataclass(frozen=True)
class ImageGeometry:
    """The celestial WCS of a 2-D helioprojective image, as plain numbers.

    Attributes
    ----------
    shape : tuple of int
        ``(ny, nx)``: rows, columns.
    crpix : tuple of float
        Reference pixel ``(x, y)``, **0-based** (FITS CRPIX minus one).
    cd_deg : tuple
        2x2 matrix CDELT_i x PC_ij, degrees per pixel, row-major.
    crval_deg : tuple of float
        Helioprojective (Tx, Ty) of the reference pixel, degrees.
    lonpole_deg : float
        Native longitude of the celestial pole (LONPOLE), degrees.
    projection : str
        Three-letter WCS projection code; ``"TAN"`` has the fast path.
    wcs : object, optional
        The full ``astropy.wcs.WCS`` used for any other projection.
    """

    shape: tuple
    crpix: tuple
    cd_deg: tuple
    crval_deg: tuple
    lonpole_deg: float = 180.0
    projection: str = "TAN"
    wcs: object = None

    @property
    def pixel_solid_angle_sr(self) -> float:
        """Solid angle of a pixel at the reference point, steradians."""
        return abs(np.linalg.det(np.asarray(self.cd_deg, dtype=float))) * np.deg2rad(1.0) ** 2


@dataclass(frozen=True)
class Window:
    """A rectangle of pixels: rows ``row0:row1``, columns ``col0:col1``."""

    row0: int
    row1: int
    col0: int
    col1: int


@dataclass(frozen=True)
class SurfaceBlock:
    """Surface quantities for the pixels of one :class:`Window`.

    Arrays have the window's shape; off-disk pixels hold NaN and
    ``on_disk`` is False there.
    """

    window: Window
    on_disk: np.ndarray
    latitude_deg: np.ndarray
    stonyhurst_longitude_deg: np.ndarray
    carrington_longitude_deg: np.ndarray
    mu: np.ndarray
    area_m2: np.ndarray


def _native_to_helioprojective_matrix(geometry: ImageGeometry) -> np.ndarray:
    """3x3 rotation: native Cartesian ray -> observer-centred (x west, y north, z to observer).

    The spherical rotation of Calabretta & Greisen (2002), eq. 2, with the
    native pole at the reference point (zenithal projections, their
    section 2.3), evaluated on the three native basis vectors.
    """
    a0, d0 = np.deg2rad(geometry.crval_deg)
    phip = np.deg2rad(geometry.lonpole_deg)

    def celestial(phi, theta):
        # Calabretta & Greisen 2002, eq. 2
        x = np.sin(theta) * np.cos(d0) - np.cos(theta) * np.sin(d0) * np.cos(phi - phip)
        y = -np.cos(theta) * np.sin(phi - phip)
        lon = a0 + np.arctan2(y, x)
        lat = np.arcsin(np.sin(theta) * np.sin(d0) + np.cos(theta) * np.cos(d0) * np.cos(phi - phip))
        # helioprojective direction from the observer (Thompson 2006, eq. 15 with d = 1):
        # x = cos Ty sin Tx, y = sin Ty, z = -cos Ty cos Tx  (z points back to the observer)
        return np.array([np.cos(lat) * np.sin(lon), np.sin(lat), -np.cos(lat) * np.cos(lon)])

    half = np.pi / 2
    return np.column_stack([celestial(0.0, 0.0), celestial(half, 0.0), celestial(0.0, half)])


def ray_directions(geometry: ImageGeometry, window: Window):
    """Unit ray vectors and solid angles of the pixels of a window.

    Parameters
    ----------
    geometry : ImageGeometry
    window : Window

    Returns
    -------
    ux, uy, uz : ndarray
        Components of the unit vector from the observer along each pixel's
        line of sight, in the frame x = solar west, y = solar north,
        z = from Sun centre to the observer.
    solid_angle_sr : ndarray
        Solid angle of each pixel, steradians.

    Notes
    -----
    For the gnomonic projection the native direction of intermediate world
    coordinates (x, y) (radians) is proportional to (-y, x, 1) and the solid
    angle element is ``|det CD| dx dy / (1 + x^2 + y^2)^(3/2)``
    (Calabretta & Greisen 2002, eqs. 12-14 and 54).
    """
    rows = np.arange(window.row0, window.row1, dtype=np.float64)[:, None]
    cols = np.arange(window.col0, window.col1, dtype=np.float64)[None, :]
    return rays_at(geometry, rows, cols)


def rays_at(geometry: ImageGeometry, rows, cols):
    """:func:`ray_directions` at arbitrary (fractional, 0-based) pixel coordinates.

    ``rows`` and ``cols`` broadcast against each other.
    """
    rows = np.asarray(rows, dtype=np.float64)
    cols = np.asarray(cols, dtype=np.float64)
    if geometry.projection != "TAN":
        return _ray_directions_wcs(geometry, rows, cols)
    (c11, c12), (c21, c22) = np.deg2rad(np.asarray(geometry.cd_deg, dtype=float))
    dx = cols - geometry.crpix[0]
    dy = rows - geometry.crpix[1]
    x = c11 * dx + c12 * dy
    y = c21 * dx + c22 * dy
    inv_norm = 1.0 / np.sqrt(1.0 + x * x + y * y)
    m = _native_to_helioprojective_matrix(geometry)
    nx, ny = -y * inv_norm, x * inv_norm
    ux = m[0, 0] * nx + m[0, 1] * ny + m[0, 2] * inv_norm
    uy = m[1, 0] * nx + m[1, 1] * ny + m[1, 2] * inv_norm
    uz = m[2, 0] * nx + m[2, 1] * ny + m[2, 2] * inv_norm
    solid = geometry.pixel_solid_angle_sr * inv_norm ** 3
    return ux, uy, uz, solid


def _hpc_unit_vectors(wcs, cols, rows):
    tx, ty = wcs.pixel_to_world_values(cols, rows)
    tx, ty = np.deg2rad(tx), np.deg2rad(ty)
    return np.stack([np.cos(ty) * np.sin(tx), np.sin(ty), -np.cos(ty) * np.cos(tx)])


def _ray_directions_wcs(geometry, rows, cols):
    """Any projection wcslib knows: rays from WCS, solid angle from the Jacobian."""
    rows, cols = np.broadcast_arrays(rows, cols)
    w = geometry.wcs
    u = _hpc_unit_vectors(w, cols, rows)
    di = _hpc_unit_vectors(w, cols + 0.5, rows) - _hpc_unit_vectors(w, cols - 0.5, rows)
    dj = _hpc_unit_vectors(w, cols, rows + 0.5) - _hpc_unit_vectors(w, cols, rows - 0.5)
    solid = np.linalg.norm(np.cross(di, dj, axis=0), axis=0)
    return u[0], u[1], u[2], solid


def surface_points(geometry: ImageGeometry, observer: Observer, window: Window,
                   mu_floor: float = 0.0, longitudes: bool = True) -> SurfaceBlock:
    """Latitude, longitudes, mu and area for every pixel of a window.

    Parameters
    ----------
    geometry : ImageGeometry
    observer : Observer
    window : Window
    mu_floor : float
        Pixels within a pixel of the limb get their exact footprint area
        (see Notes) unless their centre's mu is below ``mu_floor`` (a caller
        that drops ``mu < mu_min`` passes ``mu_min`` and skips the work).
    longitudes : bool
        False skips the Stonyhurst and Carrington longitudes (returned as None),
        which a cap measurement does not need.

    Returns
    -------
    SurfaceBlock
        ``area_m2`` is the area of the sphere seen through each pixel; its sum
        over all pixels is the visible area ``2 pi R^2 (1 - R/D)``.  Pixels whose
        centre lies off the disk but whose footprint reaches it have an area
        and NaN for the other quantities.

    Notes
    -----
    A ray ``P = O + d u`` from the observer ``O = (0, 0, D)`` meets the sphere
    ``|P| = R`` at ``d = D c - sqrt(R^2 - D^2 (1 - c^2))`` with ``c = -u_z``
    (the near root).  Then ``mu = (D P_z - R^2) / (R d)`` and the area is
    ``dOmega d^2 / mu``.  That midpoint rule fails at the limb, where
    ``1/mu`` is singular, so pixels within one pixel of the limb are split into
    8 x 8 sub-pixels whose area is integrated exactly in the radial direction:
    a ray at angle ``rho`` from disk centre meets the sphere at angle ``t`` from
    the sub-observer point with
    ``cos t = (D sin^2 rho + cos rho sqrt(R^2 - D^2 sin^2 rho)) / R``, and the
    sphere area per ring ``2 pi R^2 sin t dt`` integrates to
    ``R^2 dphi [cos t(rho_1) - cos t(rho_2)]`` (``rho_2`` clipped at the limb).
    The rotation to Stonyhurst coordinates for an
    observer at latitude B0 and longitude L follows Thompson (2006), eq. 11:
    ``Z = P_y cos B0 + P_z sin B0``,
    ``X = -P_x sin L - P_y sin B0 cos L + P_z cos B0 cos L``,
    ``Y = P_x cos L - P_y sin B0 sin L + P_z cos B0 sin L``.
    """
    ux, uy, uz, solid = ray_directions(geometry, window)
    big_d, r = float(observer.distance_m), float(observer.rsun_m)
    c = -uz
    disc = r * r - big_d * big_d * (1.0 - c * c)
    on_disk = (disc >= 0.0) & (c > 0.0)
    with np.errstate(invalid="ignore"):
        d = np.where(on_disk, big_d * c - np.sqrt(np.where(on_disk, disc, 0.0)), np.nan)
    px, py, pz = d * ux, d * uy, big_d + d * uz
    mu = (big_d * pz - r * r) / (r * d)
    area = solid * d * d / mu
    b0, lobs = np.deg2rad(observer.b0_deg), np.deg2rad(observer.hgln_deg)
    sb, cb, sl, cl = np.sin(b0), np.cos(b0), np.sin(lobs), np.cos(lobs)
    z_hgs = py * cb + pz * sb
    lat = np.rad2deg(np.arcsin(np.clip(z_hgs / r, -1.0, 1.0)))
    lon = carr = None
    if longitudes:
        x_hgs = -px * sl - py * sb * cl + pz * cb * cl
        y_hgs = px * cl - py * sb * sl + pz * cb * sl
        lon = np.rad2deg(np.arctan2(y_hgs, x_hgs))
        carr = np.mod(lon + (observer.crln_deg - observer.hgln_deg), 360.0)
    area = _refine_limb_area(geometry, observer, window, ux, uy, uz, np.where(on_disk, area, 0.0), mu,
                             on_disk, mu_floor)
    return SurfaceBlock(window, on_disk, lat, lon, carr, mu, area)


_LIMB_SUBPIXELS = 8


def _cos_t(sin_rho, cos_rho, big_d, r):
    """cos of the angle from the sub-observer point of the sphere point seen at angle rho."""
    root = np.sqrt(np.maximum(r * r - big_d * big_d * sin_rho * sin_rho, 0.0))
    return (big_d * sin_rho * sin_rho + cos_rho * root) / r


def _refine_limb_area(geometry, observer, window, ux, uy, uz, area, mu, on_disk, mu_floor):
    big_d, r = float(observer.distance_m), float(observer.rsun_m)
    rho_limb = np.arcsin(r / big_d)
    h = np.sqrt(geometry.pixel_solid_angle_sr)
    if mu_floor > 0.0:
        with np.errstate(invalid="ignore"):
            candidates = on_disk & (mu >= mu_floor)
        # a pixel within one pixel of the limb has mu below about sqrt(2 h / rho_limb) (twice, for margin)
        if not candidates.any() or mu_floor > 2.0 * np.sqrt(2.0 * h / rho_limb):
            return area
        jj, ii = np.nonzero(candidates)
    else:
        jj, ii = np.indices(ux.shape).reshape(2, -1)
    rho = np.arctan2(np.hypot(ux[jj, ii], uy[jj, ii]), -uz[jj, ii])
    near = np.abs(rho - rho_limb) < 1.0 * h
    if not near.any():
        return area
    jj, ii = jj[near], ii[near]
    k = _LIMB_SUBPIXELS
    off = (np.arange(k) + 0.5) / k - 0.5
    sub_r = (jj + window.row0)[:, None, None] + off[None, :, None]
    sub_c = (ii + window.col0)[:, None, None] + off[None, None, :]
    sx, sy, sz, s_solid = rays_at(geometry, sub_r, sub_c)
    s_solid = s_solid / (k * k)
    s_rho = np.arctan2(np.hypot(sx, sy), -sz)
    a = h / k
    rho1 = s_rho - a / 2.0
    rho2 = np.minimum(s_rho + a / 2.0, rho_limb)
    ring = _cos_t(np.sin(rho1), np.cos(rho1), big_d, r) - _cos_t(np.sin(rho2), np.cos(rho2), big_d, r)
    sub_area = np.where(rho1 < rho_limb, r * r * s_solid / (a * np.sin(s_rho)) * ring, 0.0)
    area = area.copy()
    area[jj, ii] = sub_area.sum(axis=(1, 2))
    return area


def _clamped_latitude_deg(ux, uy, uz, observer):
    """Latitude of each ray's point on the sphere, or of its nearest limb point off the disk.

    Returns the latitude (deg), sin of the ray's angle from disk centre, and sin of the limb's.
    """
    big_d, r = float(observer.distance_m), float(observer.rsun_m)
    c = -uz
    disc = np.maximum(r * r - big_d * big_d * (1.0 - c * c), 0.0)
    d = big_d * c - np.sqrt(disc)
    px, py, pz = d * ux, d * uy, big_d + d * uz
    norm = np.sqrt(px * px + py * py + pz * pz)
    b0 = np.deg2rad(observer.b0_deg)
    z = (py * np.cos(b0) + pz * np.sin(b0)) / norm
    sin_rho = np.sqrt(np.maximum(1.0 - c * c, 0.0))
    return np.rad2deg(np.arcsin(np.clip(z, -1, 1))), sin_rho, r / big_d


def grow_mask(mask: np.ndarray) -> np.ndarray:
    """A boolean 2-D mask grown by one cell into its 8 neighbours (a margin for coarse-grid planning)."""
    grown = mask.copy()
    grown[1:, :] |= mask[:-1, :]
    grown[:-1, :] |= mask[1:, :]
    out = grown.copy()
    out[:, 1:] |= grown[:, :-1]
    out[:, :-1] |= grown[:, 1:]
    return out


def plan_windows(geometry: ImageGeometry, observer: Observer, min_abs_latitude_deg: float,
                 coarse_pixels: int | None = None) -> list[Window]:
    """Windows that together hold every on-disk pixel with |latitude| >= a limit.

    A coarse grid of samples (about 256 on the longer side) is classified by
    latitude, off-disk samples taking the latitude of the nearest limb
    point, then dilated by one coarse cell; each coarse row of cells gives
    one window spanning its flagged columns.  Only these rows need to be read
    or decompressed.

    Parameters
    ----------
    geometry : ImageGeometry
    observer : Observer
    min_abs_latitude_deg : float
        0 selects the whole disk.
    coarse_pixels : int, optional
        Size of a coarse cell in pixels (default: longer side / 256, at least 1).

    Returns
    -------
    list of Window
        Ordered by row, non-overlapping.
    """
    ny, nx = geometry.shape
    step = coarse_pixels or max(1, int(np.ceil(max(ny, nx) / 256)))
    n_rows, n_cols = int(np.ceil(ny / step)), int(np.ceil(nx / step))
    cy = np.minimum(np.arange(n_rows) * step + (step - 1) / 2.0, ny - 1)
    cx = np.minimum(np.arange(n_cols) * step + (step - 1) / 2.0, nx - 1)
    cd = np.asarray(geometry.cd_deg, dtype=float)
    ux, uy, uz, _ = rays_at(geometry, cy[:, None], cx[None, :])  # any projection
    lat, sin_rho, sin_limb = _clamped_latitude_deg(ux, uy, uz, observer)
    cell_rad = np.deg2rad(np.sqrt(abs(np.linalg.det(cd)))) * step
    near = sin_rho <= sin_limb + 2.0 * cell_rad
    flagged = near & (np.abs(lat) >= min_abs_latitude_deg)
    g2 = grow_mask(flagged)
    windows = []
    for k in np.flatnonzero(g2.any(axis=1)):
        cols = np.flatnonzero(g2[k])
        windows.append(Window(int(k * step), int(min((k + 1) * step, ny)),
                              int(cols[0] * step), int(min((cols[-1] + 1) * step, nx))))
    return windows


def cap_area_m2(rsun_m: float, cap_latitude_deg: float) -> float:
    """Area of one polar cap ``|latitude| >= cap_latitude_deg``: ``2 pi R^2 (1 - sin lat)``."""
    return 2.0 * np.pi * rsun_m ** 2 * (1.0 - np.sin(np.deg2rad(cap_latitude_deg)))


def visible_area_m2(rsun_m: float, distance_m: float, mu_min: float = 0.0) -> float:
    """Area of the sphere seen from a finite distance with mu >= mu_min.

    Notes
    -----
    A surface point at angle ``t`` from the sub-observer point has
    ``mu = (D cos t - R) / sqrt(D^2 + R^2 - 2 D R cos t)``; it is visible for
    ``cos t > R / D``.  The visible area with ``mu >= m`` is the spherical cap
    ``2 pi R^2 (1 - cos t_m)`` where ``cos t_m`` solves ``mu(t_m) = m``
    (a quadratic; for m = 0 this is ``2 pi R^2 (1 - R / D)``).
    """
    big_d, r, m = float(distance_m), float(rsun_m), float(mu_min)
    if m <= 0.0:
        cos_t = r / big_d
    else:
        # (D c - R)^2 = m^2 (D^2 + R^2 - 2 D R c), root with D c > R
        a = big_d ** 2
        b = -2.0 * big_d * r + 2.0 * m * m * big_d * r
        cc = r * r - m * m * (big_d ** 2 + r * r)
        cos_t = (-b + np.sqrt(b * b - 4 * a * cc)) / (2 * a)
    return 2.0 * np.pi * r * r * (1.0 - cos_t)
