"""The fictional magnetograph: render a radial field to a line-of-sight FITS frame.

``Blos = Br * mu`` with the exact finite-distance geometry of
:mod:`pipeline.projection` (the same code the measurement inverts, so a
closed loop isolates the measurement from the geometry, which is checked
against sunpy separately).  Files carry the standard solar WCS keywords
(Thompson 2006, A&A 449, 791) and are written as scaled int32 with BLANK,
plain or tile-compressed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.projection import ImageGeometry, Observer, Window, surface_points

__all__ = ["ObservingSetup", "geometry_for", "render_los", "frame_header", "write_magnetogram",
           "INSTRUMENT", "OBSERVATORY", "BLANK_INT32"]

OBSERVATORY = "Halden Ridge Observatory"
INSTRUMENT = "KVM"  # Kestrel Vector Magnetograph (fictional)
BLANK_INT32 = -2147483648


@dataclass(frozen=True)
class ObservingSetup:
    """Pointing of one synthetic image.

    Attributes
    ----------
    size : int
        Image side in pixels.
    radius_fraction : float
        Apparent solar radius as a fraction of the half-width of the image.
    rotation_deg : float
        Image rotation CROTA2 (degrees; solar north is rotated by this
        angle counter-clockwise from the image's +y axis... as FITS defines it).
    offset_pixels : tuple of float
        Sun centre offset from the image centre, (x, y) pixels.
    """

    size: int = 256
    radius_fraction: float = 0.9
    rotation_deg: float = 0.0
    offset_pixels: tuple = (0.0, 0.0)


def geometry_for(setup: ObservingSetup, observer: Observer) -> ImageGeometry:
    """TAN geometry with the Sun centre near the image centre (CRVAL = 0, 0)."""
    n = setup.size
    half = n / 2.0
    angular_radius_deg = np.rad2deg(np.arcsin(observer.rsun_m / observer.distance_m))
    cdelt = angular_radius_deg / (setup.radius_fraction * half)
    t = np.deg2rad(setup.rotation_deg)
    pc = np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])
    cd = pc * cdelt
    crpix = (half - 0.5 + setup.offset_pixels[0], half - 0.5 + setup.offset_pixels[1])
    return ImageGeometry(shape=(n, n), crpix=crpix, cd_deg=tuple(map(tuple, cd)), crval_deg=(0.0, 0.0))


def render_los(br_gauss, geometry: ImageGeometry, observer: Observer) -> np.ndarray:
    """Line-of-sight field of a radial surface field, NaN off the disk.

    Parameters
    ----------
    br_gauss : callable
        ``br_gauss(latitude_deg, carrington_longitude_deg) -> ndarray`` (gauss).
    geometry, observer
        Where the image is taken from.

    Returns
    -------
    ndarray
        ``Br * mu`` (gauss), float64, shape ``geometry.shape``.
    """
    ny, nx = geometry.shape
    s = surface_points(geometry, observer, Window(0, ny, 0, nx))
    out = np.full((ny, nx), np.nan)
    on = s.on_disk
    out[on] = br_gauss(s.latitude_deg[on], s.carrington_longitude_deg[on]) * s.mu[on]
    return out


def frame_header(geometry: ImageGeometry, observer: Observer, date_obs: str, *, bunit: str = "Gauss"):
    """Standard solar WCS header for a synthetic frame (astropy Header)."""
    from astropy.io import fits

    h = fits.Header()
    (c11, c12), (c21, c22) = np.asarray(geometry.cd_deg, dtype=float) * 3600.0
    cdelt1 = float(np.hypot(c11, c21))
    cdelt2 = float(np.hypot(c12, c22))
    crota = float(np.rad2deg(np.arctan2(c21, c11)))
    cards = [
        ("TELESCOP", OBSERVATORY, "fictional observatory (synthetic data)"),
        ("INSTRUME", INSTRUMENT, "fictional magnetograph (synthetic data)"),
        ("OBJECT", "Tessaly", "synthetic star"),
        ("DATE-OBS", date_obs, "[UTC] observation time"),
        ("WCSNAME", "Helioprojective-cartesian", ""),
        ("CTYPE1", "HPLN-TAN", ""), ("CTYPE2", "HPLT-TAN", ""),
        ("CUNIT1", "arcsec", ""), ("CUNIT2", "arcsec", ""),
        ("CRPIX1", geometry.crpix[0] + 1.0, "[pix] 1-based reference pixel"),
        ("CRPIX2", geometry.crpix[1] + 1.0, "[pix] 1-based reference pixel"),
        ("CRVAL1", geometry.crval_deg[0] * 3600.0, "[arcsec]"), ("CRVAL2", geometry.crval_deg[1] * 3600.0, "[arcsec]"),
        ("CDELT1", cdelt1, "[arcsec/pix]"), ("CDELT2", cdelt2, "[arcsec/pix]"),
        ("CROTA2", crota, "[deg] image rotation"),
        ("DSUN_OBS", observer.distance_m, "[m] observer-Sun distance"),
        ("HGLT_OBS", observer.b0_deg, "[deg] Stonyhurst latitude of observer (B0)"),
        ("HGLN_OBS", observer.hgln_deg, "[deg] Stonyhurst longitude of observer"),
        ("CRLT_OBS", observer.b0_deg, "[deg] Carrington latitude of observer"),
        ("CRLN_OBS", observer.crln_deg, "[deg] Carrington longitude of observer"),
        ("RSUN_REF", observer.rsun_m, "[m] radius of the sphere"),
        ("RSUN_OBS", float(np.rad2deg(np.arcsin(observer.rsun_m / observer.distance_m)) * 3600.0), "[arcsec]"),
        ("BUNIT", bunit, "line-of-sight field"),
    ]
    for key, value, comment in cards:
        h[key] = (value, comment)
    return h


def write_magnetogram(path, blos_gauss: np.ndarray, header, *, compression: str | None = "RICE_1",
                      bscale: float = 0.1, quantize_level: float | None = None,
                      blank: int = BLANK_INT32) -> None:
    """Write a line-of-sight image as scaled int32 with BLANK for NaN.

    Parameters
    ----------
    path : str or path-like
    blos_gauss : ndarray
        Image in gauss; NaN is written as BLANK.
    header : astropy.io.fits.Header
    compression : str or None
        ``"RICE_1"``, ``"GZIP_1"``, ``"GZIP_2"``, ``"HCOMPRESS_1"``, or None for a
        plain primary-HDU image.
    bscale : float
        Gauss per integer step (quantisation of the stored values).
    blank : int
        Integer written for NaN (BLANK).  The default is the int32 minimum; a
        value just outside the data range (e.g. -32768) compresses far better
        with RICE, whose blocks that straddle a huge jump are stored raw.  Data
        are clipped to ``+-(|blank| - 1)`` when ``blank`` is not the int32 minimum.
    """
    from astropy.io import fits

    ints = np.where(np.isfinite(blos_gauss), np.round(np.nan_to_num(blos_gauss) / bscale), 0.0)
    lim = 2147483647 if blank == BLANK_INT32 else abs(int(blank)) - 1
    ints = np.clip(ints, -lim, lim).astype(np.int32)
    ints[~np.isfinite(blos_gauss)] = blank
    h = header.copy()
    if compression is None:
        hdu = fits.PrimaryHDU(data=ints, header=h, do_not_scale_image_data=True)
    else:
        hdu = fits.CompImageHDU(data=ints, header=h, compression_type=compression,
                                do_not_scale_image_data=True)
    hdu.header["BSCALE"] = bscale
    hdu.header["BZERO"] = 0.0
    hdu.header["BLANK"] = int(blank)
    hdus = [hdu] if compression is None else [fits.PrimaryHDU(), hdu]
    fits.HDUList(hdus).writeto(path, overwrite=True, checksum=False)


# --- additions for the synthetic archive (issue 3) -------------------------------------------------

__all__ += ["earth_observers", "pole_pixels", "disk_centre_pixel", "world_direction_to_pixel",
            "RSUN_REF_M", "NOISE_METHODS", "instrument_noise"]

RSUN_REF_M = 6.957e8  # IAU 2015 Resolution B3 nominal solar radius (sunpy's RSUN_REF)


def earth_observers(times, rsun_m: float = RSUN_REF_M) -> list:
    """The Earth as observer at each time, from sunpy's ephemeris.

    Parameters
    ----------
    times : array_like of datetime64 or ISO strings (UTC)
    rsun_m : float
        Radius of the sphere written as RSUN_REF, metres.

    Returns
    -------
    list of :class:`pipeline.projection.Observer`
        Distance and Stonyhurst latitude/longitude from
        ``sunpy.coordinates.get_earth``; Carrington longitude ``L0`` from
        ``sunpy.coordinates.sun.L0`` (apparent, with light-travel time).
    """
    import warnings

    from astropy.time import Time
    from sunpy.coordinates import get_earth, sun

    from pipeline.timeutil import to_datetime64

    iso = np.datetime_as_string(np.atleast_1d(to_datetime64(times)).astype("datetime64[ms]"), unit="ms")
    with warnings.catch_warnings():  # erfa "dubious year" for dates past the leap-second table
        warnings.simplefilter("ignore")
        t = Time(list(iso), scale="utc")
        earth = get_earth(t)
        l0 = sun.L0(t)
    dist = np.atleast_1d(earth.radius.to_value("m"))
    lat = np.atleast_1d(earth.lat.to_value("deg"))
    lon = np.atleast_1d(earth.lon.to_value("deg"))
    crln = np.atleast_1d(l0.to_value("deg"))
    return [Observer(float(d), float(b), float(ln), float(c), float(rsun_m), "ephemeris")
            for d, b, ln, c in zip(dist, lat, lon, crln)]


def world_direction_to_pixel(geometry: ImageGeometry, u) -> tuple:
    """0-based pixel ``(x, y)`` of a line-of-sight direction, for the TAN geometries of :func:`geometry_for`.

    Parameters
    ----------
    geometry : ImageGeometry
        With ``crval_deg == (0, 0)`` (what :func:`geometry_for` writes).
    u : array_like, shape (3,)
        Direction from the observer, frame x = solar west, y = solar north,
        z = from Sun centre toward the observer.

    Notes
    -----
    With the reference point at disk centre the gnomonic intermediate
    coordinates are ``(x, y) = (u_x, u_y) / (-u_z)`` radians (Calabretta &
    Greisen 2002, A&A 395, 1077, eq. 54 inverted); pixel = CRPIX + CD^-1 (x, y).
    """
    if tuple(geometry.crval_deg) != (0.0, 0.0) or geometry.projection != "TAN":
        raise ValueError("geometry: only TAN images with CRVAL = (0, 0) (as geometry_for writes) are supported")
    ux, uy, uz = (float(v) for v in u)
    xy_deg = np.rad2deg(np.array([ux / -uz, uy / -uz]))
    dx, dy = np.linalg.solve(np.asarray(geometry.cd_deg, dtype=float), xy_deg)
    return float(geometry.crpix[0] + dx), float(geometry.crpix[1] + dy)


def disk_centre_pixel(geometry: ImageGeometry) -> tuple:
    """0-based pixel of the Sun's centre (the direction straight at it)."""
    return world_direction_to_pixel(geometry, (0.0, 0.0, -1.0))


def pole_pixels(geometry: ImageGeometry, observer: Observer) -> tuple:
    """0-based pixels ``((x_n, y_n), (x_s, y_s))`` of the north and south rotation poles.

    Notes
    -----
    The poles are at heliocentric-Cartesian ``(0, +-R cos B0, +-R sin B0)``
    (Thompson 2006, A&A 449, 791, eq. 11 inverted at latitude +-90 deg); the
    ray from the observer at ``(0, 0, D)`` is ``P - O``.
    """
    r, big_d = observer.rsun_m, observer.distance_m
    b0 = np.deg2rad(observer.b0_deg)
    out = []
    for s in (1.0, -1.0):
        v = np.array([0.0, s * r * np.cos(b0), s * r * np.sin(b0) - big_d])
        out.append(world_direction_to_pixel(geometry, v / np.linalg.norm(v)))
    return tuple(out)


def _gaussian_noise(shape, sigma_gauss, rng):
    return rng.normal(0.0, sigma_gauss, shape)


def _no_noise(shape, sigma_gauss, rng):
    return np.zeros(shape)


#: instrument noise models by name: ``f(shape, sigma_gauss, rng) -> ndarray`` (gauss)
NOISE_METHODS = {"gaussian": _gaussian_noise, "none": _no_noise}


def instrument_noise(shape, sigma_gauss: float, rng, method: str = "gaussian") -> np.ndarray:
    """Photon/readout noise of the line-of-sight signal (white, gauss).

    Parameters
    ----------
    shape : tuple
    sigma_gauss : float
        Standard deviation per pixel, gauss.
    rng : numpy.random.Generator
    method : str
        One of :data:`NOISE_METHODS`.
    """
    try:
        f = NOISE_METHODS[method]
    except KeyError:
        raise ValueError(f"method: got {method!r}; valid choices are {', '.join(sorted(NOISE_METHODS))}") from None
    return f(shape, float(sigma_gauss), rng)
