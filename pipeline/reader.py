"""FITS magnetogram -> :class:`Frame`: data in gauss, observer geometry, time.

Any instrument writing the standard solar WCS keywords (Thompson 2006,
A&A 449, 791) is read, plain or tile-compressed (RICE, GZIP, HCOMPRESS, via
astropy).  Header normalisation goes through sunpy's map sources, which know
many instruments' quirks, built on a zero-stride dummy array so that no image
memory is touched.  Only the rows that can hold the requested latitudes are
read (for tile-compressed files only their tiles are decompressed).

Every way a file can be unusable raises :class:`FrameError` with a one-line
reason; nothing else escapes :func:`read_frame` for bad input.  Only the
exception types that corrupt input was found to raise are turned into
FrameError (:func:`_corrupt_file_errors` and its kin); any other
error propagates with its traceback (it is a fault, not a property of the file).

Where a header lacks observer keywords the reader decides from the keywords
themselves, with sunpy's own list of keyword sets per map source, what sunpy
would use; missing pieces come from the Earth's ephemeris for the time, each
named in ``FrameHeader.notes`` and in ``Observer.source``.
"""

from __future__ import annotations

import contextlib
import functools
import math
import numbers
import os
import warnings
import zlib
from dataclasses import dataclass, field

import numpy as np

from pipeline.config import MeasureSettings
from pipeline.projection import ImageGeometry, Observer, Window, plan_windows

__all__ = ["FrameError", "Block", "Frame", "FrameHeader", "read_header", "read_frame", "gauss_per_unit"]

_TIME_KEYS = ("date-obs", "date_obs", "t_obs", "date-avg", "date-beg", "date_avg")

#: The standard observer keywords (Thompson 2006, A&A 449, 791, section 9.1), lower case as in sunpy's meta.
_OBSERVER_KEYS = ("hgln_obs", "hglt_obs", "crln_obs", "crlt_obs", "dsun_obs")
_STANDARD_OBSERVER_SETS = (("hgln_obs", "hglt_obs", "dsun_obs"), ("crln_obs", "crlt_obs", "dsun_obs"))


def _astropy_verify_error():
    from astropy.io.fits.verify import VerifyError

    return VerifyError


def _cfitsio_error() -> tuple:
    """astropy's tile-decompression error (a private class; empty if this astropy has none by that name)."""
    try:
        from astropy.io.fits.hdu.compressed._compression import CfitsioException
    except ImportError:
        return ()
    return (CfitsioException,)


@functools.lru_cache(maxsize=None)
def _corrupt_file_errors() -> tuple:
    """What astropy raises for a corrupt file, found by fuzzing truncated, byte-flipped and zeroed files,
    plain and tile-compressed (built on first use: importing astropy.io.fits is slow)."""
    return (OSError, EOFError, ValueError, TypeError, KeyError, IndexError, OverflowError, zlib.error,
            _astropy_verify_error()) + _cfitsio_error()


def _open_errors() -> tuple:
    """:func:`_corrupt_file_errors` and AttributeError: astropy's open calls string methods on values it
    expects to be strings (a ZNAMEn = T card)."""
    return _corrupt_file_errors() + (AttributeError,)


def _decode_errors() -> tuple:
    """:func:`_open_errors`, and what decompressing a damaged tile-compressed HDU raises besides:
    astropy's column validator's AssertionError (a junk TTYPEn), its header check's RuntimeError (a junk
    TFORMn)."""
    return _open_errors() + (AssertionError, RuntimeError)


#: Keywords the FITS standard defines as strings and that sunpy calls string methods on.
_STRING_KEYS = ("ctype1", "ctype2", "cunit1", "cunit2", "timesys", "telescop", "instrume", "detector",
                "obsrvtry")


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
    whole image (NaN where not read) for interactive use.  ``offset_blocks``
    are the sparse one-row windows of the low-latitude disk that the
    zero-offset estimate uses (:func:`pipeline.zero_offset.plan_offset_windows`):
    the same pixels whatever the region read, sliced from ``blocks`` where
    those hold them; they are not part of ``blocks`` (a pixel in both is
    measured once).
    """

    header: FrameHeader
    blocks: tuple = field(default_factory=tuple)
    offset_blocks: tuple = field(default_factory=tuple)

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


def _open(path: str, max_pixels: int):
    """Open a FITS file, plain or gzip-wrapped; returns ``(HDUList, size in bytes)``.

    A gzip-wrapped file is decompressed here, into memory, with a ceiling of
    :func:`_gunzip_limit_bytes`: astropy's own gzip reading exhausts the
    memory on some damaged streams (found by fuzzing), and this way a cut or
    damaged stream is named as such.
    """
    import io

    from astropy.io import fits

    try:
        size = os.path.getsize(path)
    except OSError as exc:
        raise FrameError(f"cannot read file: {exc.strerror or exc}") from None
    if size == 0:
        raise FrameError("empty file")
    try:
        with open(path, "rb") as fh:
            start = fh.read(30)
            source = path
            if start.startswith(b"\x1f\x8b"):
                data = _gunzip(fh, _gunzip_limit_bytes(max_pixels))
                start, size, source = data[:30], len(data), io.BytesIO(data)
    except OSError as exc:  # a directory, no permission
        raise FrameError(f"cannot read file: {exc.strerror or exc}") from None
    if not start.startswith(b"SIMPLE  ="):
        raise FrameError("not a FITS file (no SIMPLE card at the start)")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            hdul = fits.open(source, memmap=False, lazy_load_hdus=False)
    except _open_errors() as exc:
        raise FrameError(f"not a readable FITS file ({_one_line(exc)})") from None
    return hdul, size


def _gunzip_limit_bytes(max_pixels: int) -> int:
    """Largest decompressed gzip-wrapped file accepted: two float64 images at the ceiling plus 16 MiB."""
    return 2 * 8 * int(max_pixels) + (16 << 20)


def _gunzip(fh, limit_bytes: int) -> bytes:
    """Decompress a whole gzip stream (every member, RFC 1952), or FrameError naming what is wrong.

    Zero bytes after the last member are padding (as the gzip tool allows).
    """
    fh.seek(0)
    out = bytearray()
    inflater = zlib.decompressobj(16 + zlib.MAX_WBITS)
    data = fh.read(1 << 16)
    try:
        while data:
            out += inflater.decompress(data)  # a 64 KiB chunk inflates to at most about 66 MB
            if len(out) > limit_bytes:
                raise FrameError(f"gzip stream expands beyond {limit_bytes} bytes (measure.max_image_pixels)")
            if not inflater.eof:
                data = fh.read(1 << 16)
                continue
            data = inflater.unused_data + fh.read(1 << 16)
            while data and not data.strip(b"\x00"):
                data = fh.read(1 << 16)
            if data:
                inflater = zlib.decompressobj(16 + zlib.MAX_WBITS)
    except zlib.error as exc:
        raise FrameError(f"corrupt gzip stream ({_one_line(exc)})") from None
    if not inflater.eof:
        raise FrameError("truncated gzip stream: the file ends before the end of the compressed data")
    return bytes(out)


def _one_line(exc) -> str:
    text = " ".join(str(exc).split())
    return (text[:200] + "...") if len(text) > 200 else text or type(exc).__name__


def _pick_hdu(hdul, index):
    from astropy.io.fits import CompImageHDU, ImageHDU, PrimaryHDU

    def is_image(h):
        with _parsable_cards():
            naxis = h.header.get("NAXIS", 0)
        return (isinstance(h, (PrimaryHDU, ImageHDU, CompImageHDU)) and isinstance(naxis, numbers.Integral)
                and naxis >= 2)

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


def _check_size(hdu, file_size: int, max_pixels: int) -> tuple:
    """Refuse absurd or truncated declarations before any data is touched."""
    from astropy.io.fits import CompImageHDU

    h = hdu.header
    naxis = int(h.get("NAXIS", 0))
    dims = [h.get(f"NAXIS{i}", 0) for i in range(1, naxis + 1)]
    if not all(isinstance(d, numbers.Integral) and not isinstance(d, bool) for d in dims):
        raise FrameError(f"image dimensions are not integers (NAXISn = {dims})")
    dims = [int(d) for d in dims]
    # degenerate axes beyond the second (NAXIS3 = 1, ...) leave a 2-D image (FITS Standard 4.0, section 4.4.1)
    if naxis < 2 or any(d != 1 for d in dims[2:]):
        raise FrameError(f"not a 2-D image (NAXIS = {naxis}, shape {dims})")
    nx, ny = dims[0], dims[1]
    if nx <= 0 or ny <= 0:
        raise FrameError(f"image has no pixels (NAXIS1 = {nx}, NAXIS2 = {ny})")
    if nx * ny > max_pixels:
        raise FrameError(
            f"image {nx} x {ny} exceeds the ceiling of {max_pixels} pixels (measure.max_image_pixels)")
    if isinstance(hdu, CompImageHDU):
        _check_rice_parameters(hdu)
        needed = hdu._data_offset + hdu._data_size
    else:
        bitpix = abs(int(h.get("BITPIX", 0)))
        needed = hdu._data_offset + nx * ny * bitpix // 8
    if needed > file_size:
        raise FrameError(f"truncated file: header declares {needed} bytes, file has {file_size}")
    return ny, nx


def _check_rice_parameters(hdu) -> None:
    """Refuse RICE_1 parameters outside the standard before the decoder sees them.

    FITS Standard 4.0, section 10.4.1 (from memory): BYTEPIX is 1, 2, 4 or 8 and BLOCKSIZE is
    positive.  astropy's decoder crashes the process (SIGSEGV) on a negative BYTEPIX, so this
    cannot be left to an exception.
    """
    bintable = getattr(hdu, "_bintable", None)  # astropy's raw compressed-table header
    if bintable is None or str(bintable.header.get("ZCMPTYPE", "")).strip() != "RICE_1":
        return
    zh = bintable.header
    params = {str(zh[f"ZNAME{i}"]).strip().upper(): zh.get(f"ZVAL{i}") for i in range(1, 10) if f"ZNAME{i}" in zh}
    for name, ok in (("BYTEPIX", lambda v: v in (1, 2, 4, 8)), ("BLOCKSIZE", lambda v: v > 0)):
        value = params.get(name)
        if name in params and (isinstance(value, bool) or not isinstance(value, numbers.Integral) or not ok(value)):
            raise FrameError(f"corrupt RICE_1 parameters: {name} = {value!r} "
                             "(BYTEPIX must be 1, 2, 4 or 8, BLOCKSIZE a positive integer)")


@contextlib.contextmanager
def _parsable_cards():
    """Header cards are parsed when first read: an unparsable one (astropy's VerifyError) is FrameError."""
    try:
        yield
    except _astropy_verify_error() as exc:
        raise FrameError(f"unparsable header card ({_one_line(exc).split(', fix it')[0]})") from None


def _header_meta(header) -> dict:
    """Lower-case keyword -> value; an unparsable card or a number where a string belongs is FrameError."""
    with _parsable_cards():
        meta = {k.lower(): v for k, v in header.items() if k not in ("COMMENT", "HISTORY", "")}
    for key in _STRING_KEYS:
        if key in meta and not isinstance(meta[key], str):
            raise FrameError(f"header keyword {key.upper()} = {meta[key]!r} is not a string")
    return meta


def _bad_header_errors() -> tuple:
    """What sunpy and astropy.wcs raise for a malformed solar WCS header (found by trying: junk
    CDELT/CRPIX/CRVAL/PC/CROTA values, non-angular CUNIT, unknown CTYPE, zero CDELT)."""
    from sunpy.map.mapbase import MapMetaValidationError
    from sunpy.util.datatype_factory_base import MultipleMatchError, NoMatchError

    # ValueError covers astropy.units' UnitsError and astropy.wcs' WcsError family
    return (ValueError, TypeError, KeyError, MapMetaValidationError, NoMatchError, MultipleMatchError)


def _sunpy_map(header, shape):
    """A sunpy map over a zero-stride dummy array: header normalisation only."""
    import sunpy.map

    dummy = np.broadcast_to(np.float32(0.0), shape)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return sunpy.map.Map(dummy, header)
    except _bad_header_errors() as exc:
        raise FrameError(f"incomplete solar WCS header ({_one_line(exc).split(' See ')[0]})") from None


def _finite_number(meta, key: str, what: str = "observer keyword") -> float:
    """The header value of a keyword as a float, or FrameError naming it."""
    value = meta[key]
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not math.isfinite(value):
        raise FrameError(f"{what} {key.upper()} = {value!r} is not a finite number "
                         "(fix it or remove it from the header)")
    return float(value)


def _keys_text(keys) -> str:
    return ", ".join(k.upper() for k in keys)


def _observer(smap) -> tuple[Observer, tuple]:
    """Observer position from the header's keywords, deciding from the keywords which route applies.

    Parameters
    ----------
    smap : sunpy.map.GenericMap
        The header's map (its ``meta`` and map source class).

    Returns
    -------
    observer : Observer
        ``source`` is ``"header"`` (a complete keyword set, or the map
        source's own rule), ``"header+ephemeris"`` (standard keywords partly
        missing: the missing ones from the Earth's ephemeris), ``"ephemeris"``
        (no observer keyword: the Earth for the time) or ``"instrument default"``
        (no observer keyword, the map source's default observer).
    notes : tuple of str
        One remark for every route but the plain standard one, naming the
        keywords missing, ignored or used and the values taken from elsewhere.

    Notes
    -----
    sunpy (``GenericMap.observer_coordinate``) uses the first complete keyword
    set of its map source's ``_supported_observer_coordinates`` (for a plain
    file HGLN/HGLT/DSUN_OBS, then CRLN/CRLT/DSUN_OBS; Thompson 2006, A&A 449,
    791, section 9.1), else the source's default observer, else the Earth
    with a warning, discarding any keyword of an incomplete set.  This
    function finds that set from the keywords (never from warning text); for
    an incomplete standard set it keeps the header's values and takes only the
    missing quantities (latitude, longitude, distance) from the Earth's
    ephemeris (``sunpy.coordinates.get_earth``), saying which.
    """
    from sunpy.map import GenericMap

    meta = smap.meta
    cls = type(smap).__name__
    if type(smap).observer_coordinate is not GenericMap.observer_coordinate:
        # a map source with its own observer rule (e.g. a ground network's site keywords)
        obs = _sunpy_observer(smap)
        return _finish_observer(smap, obs, "header",
                                [f"observer by sunpy's {cls} rule for this instrument"])
    sets = [tuple(keys) for keys, _kw in smap._supported_observer_coordinates]
    skipped = []  # (present, missing) of the incomplete sets sunpy passes over
    for keys in sets:
        missing = [k for k in keys if k not in meta]
        if not missing:
            for k in keys:
                _finite_number(meta, k)
            notes = []
            unused = [k for p, _m in skipped for k in p if k not in keys]
            if keys not in _STANDARD_OBSERVER_SETS or unused:
                why = "; ".join(f"{_keys_text([k for k in p if k not in keys])} not used "
                                f"({_keys_text(m)} missing)" for p, m in skipped if set(p) - set(keys))
                notes.append(f"observer from {_keys_text(keys)}" + (f" (sunpy's {cls} rule)"
                             if keys not in _STANDARD_OBSERVER_SETS else "") + (f"; {why}" if why else ""))
            return _finish_observer(smap, _sunpy_observer(smap), "header", notes)
        if len(missing) < len(keys):
            skipped.append(([k for k in keys if k in meta], missing))
    present = [k for k in _OBSERVER_KEYS if k in meta]
    if present:
        return _partial_observer(smap, present)
    default = getattr(smap, "_default_observer_coordinate", None)
    if default is not None:
        return _finish_observer(smap, default, "instrument default",
                                [f"observer keywords missing ({_keys_text(_OBSERVER_KEYS)}): "
                                 f"sunpy's {cls} default observer used"])
    return _finish_observer(smap, _earth(smap), "ephemeris",
                            [f"observer keywords missing ({_keys_text(_OBSERVER_KEYS)}): "
                             "Earth ephemeris used for latitude, longitude and distance"])


def _sunpy_observer(smap):
    """sunpy's observer coordinate, with a bad keyword value as FrameError."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return smap.observer_coordinate
    except _bad_header_errors() as exc:
        raise FrameError(f"unreadable observer keywords ({_one_line(exc)})") from None


def _earth(smap):
    from sunpy.coordinates import get_earth

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return get_earth(smap.reference_date)


def _partial_observer(smap, present) -> tuple[Observer, tuple]:
    """Standard observer keywords partly present: the header's values, the missing ones from the Earth.

    Latitude is HGLT_OBS, else CRLT_OBS (the two frames share the rotation
    axis, so their latitudes are the same; Thompson 2006, section 3); the
    Stonyhurst longitude is HGLN_OBS, else CRLN_OBS converted by sunpy's
    Carrington frame with the observer as its own reference; the distance is
    DSUN_OBS.  Whatever is missing is the Earth's for the observation time.
    """
    import astropy.units as u
    from astropy.coordinates import SkyCoord
    from sunpy.coordinates import HeliographicCarrington, HeliographicStonyhurst

    meta = smap.meta
    values = {k: _finite_number(meta, k) for k in present}
    earth = _earth(smap)
    t = smap.reference_date
    used, from_earth = [], []
    if "dsun_obs" in values:
        distance = values["dsun_obs"] * u.m
        used.append("DSUN_OBS")
    else:
        distance = earth.radius.to(u.m)
        from_earth.append(f"distance {distance.to_value(u.m):.6e} m")
    lat_key = next((k for k in ("hglt_obs", "crlt_obs") if k in values), None)
    if lat_key:
        lat = values[lat_key] * u.deg
        used.append(lat_key.upper())
    else:
        lat = earth.lat.to(u.deg)
        from_earth.append(f"latitude B0 {lat.to_value(u.deg):.4f} deg")
    if "hgln_obs" in values:
        lon = values["hgln_obs"] * u.deg
        used.append("HGLN_OBS")
    elif "crln_obs" in values:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            hgc = HeliographicCarrington(values["crln_obs"] * u.deg, lat, distance, observer="self", obstime=t)
            lon = hgc.transform_to(HeliographicStonyhurst(obstime=t)).lon.to(u.deg)
        used.append("CRLN_OBS")
    else:
        lon = earth.lon.to(u.deg)
        from_earth.append(f"Stonyhurst longitude {lon.to_value(u.deg):.4f} deg")
    obs = SkyCoord(HeliographicStonyhurst(lon, lat, distance, obstime=t))
    missing = [k.upper() for k in _OBSERVER_KEYS if k not in values]
    note = (f"observer keywords partly missing ({', '.join(missing)}): {', '.join(used)} from the header; "
            + (f"{', '.join(from_earth)} from the Earth ephemeris" if from_earth else "nothing from the ephemeris"))
    return _finish_observer(smap, obs, "header+ephemeris" if from_earth else "header", [note])


def _solar_radius_m(smap, distance_m: float, notes: list) -> float:
    """RSUN_REF, else sunpy's radius from RSUN_OBS (R = D sin RSUN_OBS), else its photospheric default."""
    import astropy.units as u

    meta = smap.meta
    if "rsun_ref" in meta:
        return _finite_number(meta, "rsun_ref", "solar radius keyword")
    rsun = float(smap._rsun_meters(distance_m * u.m).to_value(u.m))
    if smap._rsun_obs_no_default is not None:
        notes.append(f"RSUN_REF missing: solar radius {rsun:.6e} m from the angular radius and the distance")
    else:
        notes.append(f"RSUN_REF and RSUN_OBS missing: standard photospheric radius {rsun:.6e} m used")
    return rsun


def _finish_observer(smap, obs, source: str, notes: list) -> tuple[Observer, tuple]:
    """The :class:`Observer` of a Stonyhurst coordinate: Carrington longitude seen by that observer."""
    import astropy.units as u
    from sunpy.coordinates import HeliographicCarrington, HeliographicStonyhurst

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        hgs = obs.transform_to(HeliographicStonyhurst(obstime=obs.obstime))
        carr = hgs.transform_to(HeliographicCarrington(observer=hgs, obstime=hgs.obstime))
    distance_m = float(hgs.radius.to_value(u.m))
    rsun_m = _solar_radius_m(smap, distance_m, notes)
    observer = Observer(distance_m, float(hgs.lat.to_value(u.deg)), float(hgs.lon.to_value(u.deg)),
                        float(carr.lon.to_value(u.deg)), rsun_m, source)
    return observer, tuple(notes)


def _to_deg(unit) -> float:
    import astropy.units as u

    try:
        return float(u.Unit(unit or "deg").to(u.deg))
    except (u.UnitConversionError, ValueError, TypeError):
        raise FrameError(f"WCS axis unit {str(unit)!r} is not an angle") from None


def _geometry(smap, shape) -> ImageGeometry:
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            w = smap.wcs
        wc = w.wcs
        wc.set()
    except _bad_header_errors() as exc:  # junk CDELT/CRPIX/PC values, unknown CTYPE, singular matrix
        raise FrameError(f"invalid solar WCS header ({_one_line(exc)})") from None
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


def _observation_time(smap) -> str:
    """The observation time (ISO 8601, UTC) sunpy reads, refused where sunpy would use the current time.

    sunpy's ``GenericMap.date`` takes DATE-OBS/DATE_OBS if ``sunpy.time.is_time``
    accepts it, else DATE-BEG, DATE-AVG, DATE-END, and otherwise silently the
    current time; map sources may prefer their own key (T_OBS).  A time that
    datetime64[ns] cannot hold (years outside 1678-2261) is refused too, not wrapped.
    """
    from sunpy.time import is_time

    meta = smap.meta
    given = ", ".join(f"{k.upper()} = {meta[k]!r}" for k in _TIME_KEYS if k in meta)
    if not any(isinstance(meta[k], str) and is_time(meta[k]) for k in _TIME_KEYS if k in meta):
        raise FrameError(f"unreadable observation time ({given}; need ISO 8601 such as 2031-03-04T05:06:07)")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            time = smap.date
            iso = time.utc.isot
    except (ValueError, TypeError) as exc:  # sunpy.time.parse_time on a malformed key
        raise FrameError(f"unreadable observation time ({_one_line(exc)})") from None
    if getattr(smap, "_default_time", None) is not None:  # sunpy fell back to the current time
        raise FrameError(f"unreadable observation time ({given}: none is a date sunpy uses)")
    if not 1678 <= int(iso[:4]) <= 2261:
        raise FrameError(f"observation time {iso} is outside 1678-2261 (the range of datetime64[ns])")
    return iso


def _header_from_hdu(path, hdu, index, shape) -> FrameHeader:
    with warnings.catch_warnings():  # erfa "dubious year" past the leap-second table, sunpy metadata notes
        warnings.simplefilter("ignore")
        return _header_from_hdu_quiet(path, hdu, index, shape)


def _header_from_hdu_quiet(path, hdu, index, shape) -> FrameHeader:
    header = hdu.header
    keys = _header_meta(header)
    if not any(k in keys for k in _TIME_KEYS):
        raise FrameError("no observation time (DATE-OBS, DATE_OBS or T_OBS)")
    unit = _parse_bunit(header)
    factor = gauss_per_unit(unit)
    smap = _sunpy_map(header, shape)
    meta = smap.meta
    iso = _observation_time(smap)
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
    """Open, pick the image HDU, check its declared size and read its header.

    Yields ``(hdu, FrameHeader)``.
    """
    hdul, size = _open(os.fspath(path), settings.max_image_pixels)
    with hdul:
        index, hdu = _pick_hdu(hdul, settings.hdu)
        with _parsable_cards():
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
        Either way the sparse rows of the zero-offset estimate are in
        ``Frame.offset_blocks`` (read only where no block already holds them).

    Returns
    -------
    Frame

    Raises
    ------
    FrameError
        One-line reason: empty, truncated, not FITS, no image HDU, wrong
        units, no time, absurd dimensions, all pixels missing.  Any other
        exception is a fault, not bad input, and propagates.
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
        blocks = _read_windows(hdu, windows, squeeze, header.gauss_per_unit)
        offset_blocks = _offset_blocks(hdu, header, blocks, squeeze)
    if not blocks or all(not np.isfinite(b.data).any() for b in blocks):
        raise FrameError("no valid pixels: every pixel is missing (NaN or BLANK)")
    return Frame(header, tuple(blocks), tuple(offset_blocks))


def _read_windows(hdu, windows, squeeze: int, gauss_per_unit: float) -> list:
    """Blocks of ``windows`` (ordered by row), one section read per run of contiguous rows."""
    blocks = []
    for group in _contiguous(windows):
        r0, r1 = group[0].row0, group[-1].row1
        c0, c1 = min(w.col0 for w in group), max(w.col1 for w in group)
        try:
            rows = _read_rows(hdu, r0, r1, c0, c1, squeeze)
        except _decode_errors() as exc:
            raise FrameError(f"cannot decode image data ({_one_line(exc)})") from None
        for w in group:
            part = rows[w.row0 - r0:w.row1 - r0, w.col0 - c0:w.col1 - c0]
            blocks.append(Block(w, (part * gauss_per_unit).astype(np.float32)))
    return blocks


def _offset_blocks(hdu, header: FrameHeader, blocks: list, squeeze: int) -> list:
    """The zero-offset rows (:func:`pipeline.zero_offset.plan_offset_windows`): sliced from ``blocks``
    where one holds the whole window, read from the file otherwise."""
    from pipeline.zero_offset import plan_offset_windows

    out, missing = {}, []
    for w in plan_offset_windows(header.geometry, header.observer):
        holder = next((b for b in blocks if b.window.row0 <= w.row0 and w.row1 <= b.window.row1
                       and b.window.col0 <= w.col0 and w.col1 <= b.window.col1), None)
        if holder is None:
            missing.append(w)
            continue
        h = holder.window
        out[w] = Block(w, holder.data[w.row0 - h.row0:w.row1 - h.row0, w.col0 - h.col0:w.col1 - h.col0])
    for b in _read_windows(hdu, missing, squeeze, header.gauss_per_unit):
        out[b.window] = b
    return [out[w] for w in sorted(out, key=lambda w: w.row0)]


def _contiguous(windows):
    group = []
    for w in windows:
        if group and w.row0 != group[-1].row1:
            yield group
            group = []
        group.append(w)
    if group:
        yield group
