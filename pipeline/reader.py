"""FITS magnetogram -> :class:`Frame`: data in gauss, observer geometry, time.

Any instrument writing the standard solar WCS keywords (Thompson 2006,
A&A 449, 791) is read, plain or tile-compressed (RICE, GZIP, HCOMPRESS, via
astropy).  Header normalisation goes through sunpy's map sources, which know
many instruments' quirks, built on a zero-stride dummy array so that no image
memory is touched.  Only the rows that can hold the requested latitudes are
read (for tile-compressed files only their tiles are decompressed).

Every way a file can be unusable raises :class:`FrameError` with a one-line
reason; nothing else escapes :func:`read_frame` for bad input.
"""

from __future__ import annotations

import contextlib
import os
import warnings
from dataclasses import dataclass, field

import numpy as np

from pipeline.config import MeasureSettings
from pipeline.projection import ImageGeometry, Observer, Window, plan_windows

__all__ = ["FrameError", "Block", "Frame", "FrameHeader", "read_header", "read_frame", "gauss_per_unit"]

_TIME_KEYS = ("date-obs", "date_obs", "t_obs", "date-avg", "date-beg", "date_avg")


class FrameError(ValueError):
    """A file cannot be measured; ``str(exc)`` is the one-line reason."""


@dataclass(frozen=True)
class Block:
    """Pixels ``data`` (gauss, float32, NaN where missing) of one window."""

    window: Window
    data: np.ndarray


@dataclass(frozen=True)
class FrameHeader:
    """Everything a header says that measuring needs.

    Attributes
    ----------
    path : str
    time : numpy.datetime64
        Observation time, UTC (nanoseconds).
    observer : Observer
    geometry : ImageGeometry
    gauss_per_unit : float
        Factor from the file's BUNIT to gauss.
    instrument : str
        TELESCOP / INSTRUME as normalised by sunpy (free text).
    notes : tuple of str
        Provenance remarks (e.g. the observer came from the ephemeris).
    """

    path: str
    time: np.datetime64
    observer: Observer
    geometry: ImageGeometry
    gauss_per_unit: float
    instrument: str = ""
    notes: tuple = ()
    hdu_index: int = 0


@dataclass(frozen=True)
class Frame:
    """One magnetogram, as far as it was read.

    ``blocks`` cover the windows that were read; :attr:`full` builds the
    whole image (NaN where not read) for interactive use.
    """

    header: FrameHeader
    blocks: tuple = field(default_factory=tuple)

    @property
    def time(self):
        return self.header.time

    @property
    def observer(self) -> Observer:
        return self.header.observer

    @property
    def geometry(self) -> ImageGeometry:
        return self.header.geometry

    @property
    def full(self) -> np.ndarray:
        """The image (gauss) with NaN wherever no block was read."""
        out = np.full(self.geometry.shape, np.nan, dtype=np.float32)
        for b in self.blocks:
            w = b.window
            out[w.row0:w.row1, w.col0:w.col1] = b.data
        return out


def gauss_per_unit(unit) -> float:
    """Factor converting a magnetogram's unit to gauss, or FrameError.

    Accepts gauss in its usual spellings and Mx/cm^2 (sunpy parses BUNIT);
    refuses anything not equivalent to a magnetic flux density.
    """
    import astropy.units as u

    if unit is None:
        raise FrameError("no BUNIT: the data unit is unknown (need gauss or Mx/cm^2)")
    try:
        return float(u.Unit(unit).to(u.G))
    except (u.UnitConversionError, ValueError, TypeError):
        raise FrameError(f"BUNIT {str(unit)!r} is not a magnetic field (need gauss or Mx/cm^2)") from None


def _parse_bunit(header):
    """BUNIT -> astropy unit, accepting the usual gauss spellings."""
    import astropy.units as u

    raw = header.get("BUNIT")
    if raw is None or not str(raw).strip():
        return None
    text = str(raw).strip()
    fixed = {"gauss": "G", "mx/cm^2": "Mx / cm2", "mx/cm2": "Mx / cm2", "mx cm^-2": "Mx / cm2",
             "mx cm-2": "Mx / cm2", "g": "G"}.get(text.lower(), text)
    try:
        return u.Unit(fixed)
    except ValueError:
        return u.Unit(fixed, parse_strict="silent")


def _open(path: str):
    from astropy.io import fits

    try:
        size = os.path.getsize(path)
    except OSError as exc:
        raise FrameError(f"cannot read file: {exc.strerror or exc}") from None
    if size == 0:
        raise FrameError("empty file")
    with open(path, "rb") as fh:
        start = fh.read(30)
    if not start.startswith(b"SIMPLE  =") and not start.startswith(b"\x1f\x8b"):
        raise FrameError("not a FITS file (no SIMPLE card at the start)")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            hdul = fits.open(path, memmap=False, lazy_load_hdus=False)
    except Exception as exc:  # astropy raises many types for corrupt files
        raise FrameError(f"not a readable FITS file ({_one_line(exc)})") from None
    return hdul, (None if start.startswith(b"\x1f\x8b") else size)


def _one_line(exc) -> str:
    text = " ".join(str(exc).split())
    return (text[:200] + "...") if len(text) > 200 else text or type(exc).__name__


def _pick_hdu(hdul, index):
    from astropy.io.fits import CompImageHDU, ImageHDU, PrimaryHDU

    def is_image(h):
        return isinstance(h, (PrimaryHDU, ImageHDU, CompImageHDU)) and h.header.get("NAXIS", 0) >= 2

    if index is not None:
        if index >= len(hdul):
            raise FrameError(f"HDU {index} requested but the file has {len(hdul)}")
        if not is_image(hdul[index]):
            raise FrameError(f"HDU {index} is not a 2-D image")
        return index, hdul[index]
    for i, h in enumerate(hdul):
        if is_image(h):
            return i, h
    raise FrameError("no image HDU (no HDU with a 2-D image)")


def _check_size(hdu, file_size: int | None, max_pixels: int) -> tuple:
    """Refuse absurd or truncated declarations before any data is touched."""
    from astropy.io.fits import CompImageHDU

    h = hdu.header
    naxis = int(h.get("NAXIS", 0))
    dims = [int(h.get(f"NAXIS{i}", 0)) for i in range(1, naxis + 1)]
    if naxis != 2:
        if naxis > 2 and all(d == 1 for d in dims[2:]):
            pass
        else:
            raise FrameError(f"not a 2-D image (NAXIS = {naxis}, shape {dims})")
    nx, ny = dims[0], dims[1]
    if nx <= 0 or ny <= 0:
        raise FrameError(f"image has no pixels (NAXIS1 = {nx}, NAXIS2 = {ny})")
    if nx * ny > max_pixels:
        raise FrameError(
            f"image {nx} x {ny} exceeds the ceiling of {max_pixels} pixels (measure.max_image_pixels)")
    if file_size is None:  # gzip-wrapped file: sizes are of the compressed stream
        return ny, nx
    if isinstance(hdu, CompImageHDU):
        needed = hdu._data_offset + hdu._data_size
    else:
        bitpix = abs(int(h.get("BITPIX", 0)))
        needed = hdu._data_offset + nx * ny * bitpix // 8
    if needed > file_size:
        raise FrameError(f"truncated file: header declares {needed} bytes, file has {file_size}")
    return ny, nx


def _header_meta(header) -> dict:
    return {k.lower(): v for k, v in header.items() if k not in ("COMMENT", "HISTORY", "")}


def _sunpy_map(header, shape):
    """A sunpy map over a zero-stride dummy array: header normalisation only."""
    import sunpy.map

    dummy = np.broadcast_to(np.float32(0.0), shape)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return sunpy.map.Map(dummy, header)
    except Exception as exc:
        raise FrameError(f"incomplete solar WCS header ({_one_line(exc).split(' See ')[0]})") from None


def _observer(smap) -> tuple[Observer, tuple]:
    """Observer position from sunpy's normalised metadata.

    sunpy reads HGLN/HGLT, CRLN/CRLT, HEEQ or an instrument's own keywords
    (e.g. GONG's B0/L0); when none is present it warns and places the
    observer at the Earth for the observation time, which we record.
    """
    import astropy.units as u
    from sunpy.coordinates import HeliographicCarrington

    rsun_m = float(smap.rsun_meters.to_value(u.m))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        obs = smap.observer_coordinate
    fallback = any("observer" in str(w.message).lower() for w in caught)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        carr = obs.transform_to(HeliographicCarrington(observer=obs, obstime=obs.obstime))
    observer = Observer(float(obs.radius.to_value(u.m)), float(obs.lat.to_value(u.deg)),
                        float(obs.lon.to_value(u.deg)), float(carr.lon.to_value(u.deg)), rsun_m,
                        "ephemeris" if fallback else "header")
    return observer, (("observer keywords missing: Earth ephemeris used",) if fallback else ())


def _to_deg(unit) -> float:
    import astropy.units as u

    try:
        return float(u.Unit(unit or "deg").to(u.deg))
    except (u.UnitConversionError, ValueError, TypeError):
        raise FrameError(f"WCS axis unit {str(unit)!r} is not an angle") from None


def _geometry(smap, shape) -> ImageGeometry:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        w = smap.wcs
    wc = w.wcs
    wc.set()
    ctype = [str(c) for c in wc.ctype]
    if not (ctype[0].startswith("HPLN") and ctype[1].startswith("HPLT")):
        raise FrameError(f"not a helioprojective image (CTYPE {ctype[0]!r}, {ctype[1]!r})")
    scale = [_to_deg(cu) for cu in (wc.cunit[0], wc.cunit[1])]
    cd = np.asarray(wc.get_pc(), dtype=float) * (np.asarray(wc.get_cdelt(), dtype=float) * scale)[:, None]
    crval = (float(wc.crval[0]) * scale[0], float(wc.crval[1]) * scale[1])
    proj = ctype[0][5:8] if len(ctype[0]) >= 8 else "TAN"
    if not np.all(np.isfinite(cd)) or abs(np.linalg.det(cd)) == 0:
        raise FrameError("degenerate WCS: pixel scale matrix is singular or not finite")
    return ImageGeometry(shape=tuple(shape), crpix=(float(wc.crpix[0]) - 1.0, float(wc.crpix[1]) - 1.0),
                         cd_deg=tuple(map(tuple, cd)), crval_deg=crval, lonpole_deg=float(wc.lonpole),
                         projection=proj, wcs=w)


def _header_from_hdu(path, hdu, index, shape) -> FrameHeader:
    with warnings.catch_warnings():  # erfa "dubious year" past the leap-second table, sunpy metadata notes
        warnings.simplefilter("ignore")
        return _header_from_hdu_quiet(path, hdu, index, shape)


def _header_from_hdu_quiet(path, hdu, index, shape) -> FrameHeader:
    header = hdu.header
    if not any(k in _header_meta(header) for k in _TIME_KEYS):
        raise FrameError("no observation time (DATE-OBS, DATE_OBS or T_OBS)")
    unit = _parse_bunit(header)
    factor = gauss_per_unit(unit)
    smap = _sunpy_map(header, shape)
    meta = smap.meta
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            time = smap.date
        iso = time.utc.isot
    except Exception as exc:
        raise FrameError(f"unreadable observation time ({_one_line(exc)})") from None
    observer, notes = _observer(smap)
    for name in ("distance_m", "rsun_m", "b0_deg", "crln_deg"):
        if not np.isfinite(getattr(observer, name)):
            raise FrameError(f"observer geometry not finite ({name})")
    if observer.distance_m <= observer.rsun_m:
        raise FrameError("observer distance DSUN_OBS is inside the Sun")
    geometry = _geometry(smap, shape)
    instrument = " ".join(str(x) for x in (meta.get("telescop", ""), meta.get("instrume", "")) if x).strip()
    return FrameHeader(str(path), np.datetime64(iso, "ns"), observer, geometry, factor, instrument,
                       notes, index)


@contextlib.contextmanager
def _opened_image(path, settings: MeasureSettings):
    """Open, pick the image HDU, check its declared size and read its header; yields (hdu, FrameHeader)."""
    hdul, size = _open(os.fspath(path))
    with hdul:
        index, hdu = _pick_hdu(hdul, settings.hdu)
        shape = _check_size(hdu, size, settings.max_image_pixels)
        yield hdu, _header_from_hdu(path, hdu, index, shape)


def read_header(path: str | os.PathLike, settings: MeasureSettings | None = None) -> FrameHeader:
    """Read and validate only the header of a magnetogram.

    Raises
    ------
    FrameError
        With a one-line reason for any unusable file.
    """
    settings = settings or MeasureSettings()
    with _opened_image(path, settings) as (_hdu, header):
        return header


def _read_rows(hdu, r0, r1, c0, c1, squeeze_axes) -> np.ndarray:
    sec = hdu.section
    index = (slice(r0, r1), slice(c0, c1))
    if squeeze_axes:
        index = (0,) * squeeze_axes + index
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(sec[index])


def read_frame(path: str | os.PathLike, settings: MeasureSettings | None = None,
               region: str = "full") -> Frame:
    """Read one magnetogram.

    Parameters
    ----------
    path : str or path-like
    settings : MeasureSettings, optional
        Cap latitude, profile latitude, HDU choice and the size ceiling.
    region : {"full", "caps"}
        ``"full"`` reads the whole image; ``"caps"`` reads only the rows
        (and columns) that can hold ``|latitude| >= settings.read_latitude_deg``.

    Returns
    -------
    Frame

    Raises
    ------
    FrameError
        One-line reason: empty, truncated, not FITS, no image HDU, wrong
        units, no time, absurd dimensions, all pixels missing.
    """
    if region not in ("full", "caps"):
        raise ValueError(f"region: got {region!r}; valid choices are 'caps', 'full'")
    settings = settings or MeasureSettings()
    with _opened_image(path, settings) as (hdu, header):
        ny, nx = header.geometry.shape
        if region == "full":
            windows = [Window(0, ny, 0, nx)]
        else:
            windows = plan_windows(header.geometry, header.observer, settings.read_latitude_deg)
        squeeze = int(hdu.header.get("NAXIS", 2)) - 2
        blocks = []
        try:
            for group in _contiguous(windows):
                r0, r1 = group[0].row0, group[-1].row1
                c0, c1 = min(w.col0 for w in group), max(w.col1 for w in group)
                rows = _read_rows(hdu, r0, r1, c0, c1, squeeze)
                for w in group:
                    part = rows[w.row0 - r0:w.row1 - r0, w.col0 - c0:w.col1 - c0]
                    blocks.append(Block(w, (part * header.gauss_per_unit).astype(np.float32)))
        except FrameError:
            raise
        except Exception as exc:
            raise FrameError(f"cannot decode image data ({_one_line(exc)})") from None
    if not blocks or all(not np.isfinite(b.data).any() for b in blocks):
        raise FrameError("no valid pixels: every pixel is missing (NaN or BLANK)")
    return Frame(header, tuple(blocks))


def _contiguous(windows):
    group = []
    for w in windows:
        if group and w.row0 != group[-1].row1:
            yield group
            group = []
        group.append(w)
    if group:
        yield group
