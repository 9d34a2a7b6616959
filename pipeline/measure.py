"""Frame -> FrameRecord: per-cap mean radial field, flux, coverage and error.

Radial-field assumption: ``Br = Blos / mu`` (DESIGN.md; e.g. Svalgaard,
Duvall & Scherrer 1978, Solar Physics 58, 225).  A polar cap is
``|latitude| >= cap_latitude_deg``; pixels with ``mu < mu_min`` or missing
data are left out.  Each cap's mean estimates the area-weighted mean of Br
over its measured part: within each latitude bin (``profile_bin_deg`` wide,
aligned on the poles; the bin at the cap boundary holds only its part inside
the cap) the pixels are weighted by their inverse noise variance
``area * mu^2`` (the noise of ``Blos / mu`` grows as ``1 / mu``), and the
bins are combined by their measured areas (:func:`stratified_cap_statistics`).
Its flux is ``sum(Br * area)`` and its coverage is the measured area over the
whole cap's area ``2 pi R^2 (1 - sin cap_latitude)``.

The record also carries a latitude profile (noise-weighted mean Br, area and
mean of ``1/mu`` per latitude bin) for the latitude-time diagram and the B0
profile correction of later stages, and the magnetogram's zero-point offset
estimated from the low-latitude disk (:mod:`pipeline.zero_offset`), made
whatever ``[measure] zero_offset`` says; that setting only decides whether
the stored means are corrected (``zero_offset_applied``), and
:func:`pipeline.zero_offset.toggle_zero_offset` switches it afterwards.

Version 2 (issue 11): noise-weighted cap and profile means, the zero-offset
estimate and its optional correction, the means of ``1/mu`` and the Kish
effective pixel numbers.

Measurement-code version
------------------------
:data:`MEASUREMENT_VERSION` names the numbers this code gives.  The store
keeps it beside every record; records of another version are re-measured by
``polecast ingest --remeasure`` and refused by every command that reads a
store, just like records of other measure settings.  Bump it by hand (by
one) in the same commit as any change to ``pipeline.reader``,
``pipeline.projection`` or this module that changes a measured value, a skip
decision or a skip reason; a change that leaves every number the same
(speed, refactoring, wording of docs) keeps it.
"""

from __future__ import annotations

import math
import os
import warnings
from dataclasses import asdict, dataclass, field

import numpy as np

from pipeline.config import MeasureSettings
from pipeline.projection import cap_area_m2, surface_points
from pipeline.reader import Frame, FrameError, read_frame
from pipeline.timeutil import iso_time
from pipeline.zero_offset import estimate_zero_offset_gauss

__all__ = ["CapStats", "FrameRecord", "JSON_KEYS", "MEASUREMENT_VERSION", "cap_statistics", "measure_frame",
           "measure_file", "skipped_record", "error_record", "profile_edges_deg", "stratified_cap_statistics",
           "kish_effective_number"]

#: Version of the numbers the measurement code (reader, projection, measure) gives; an integer bumped by hand
#: whenever a change to those modules changes a measured value or a skip decision (see the module docstring).
MEASUREMENT_VERSION = 2

#: The keys of ``polecast measure --format json``, in order.
JSON_KEYS = (
    "file", "status", "reason", "time", "b0_deg",
    "north_br_gauss", "south_br_gauss", "north_flux_mx", "south_flux_mx",
    "north_coverage", "south_coverage", "north_pixels", "south_pixels",
    "north_br_error_gauss", "south_br_error_gauss",
)

_M2_TO_CM2 = 1.0e4  # 1 G = 1 Mx cm^-2, so flux in Mx = Br [G] * area [cm^2]


@dataclass(frozen=True)
class CapStats:
    """Statistics of one polar cap; None where no pixel was measured."""

    br_gauss: float | None
    flux_mx: float | None
    coverage: float
    pixels: int
    br_error_gauss: float | None
    area_m2: float = 0.0
    inv_mu: float | None = None
    effective_pixels: float | None = None


def cap_statistics(br_gauss: np.ndarray, area_m2: np.ndarray, whole_cap_area_m2: float) -> CapStats:
    """Area-weighted mean, flux, coverage and standard error of one cap.

    Parameters
    ----------
    br_gauss : ndarray
        Radial field of the measured pixels, gauss.
    area_m2 : ndarray
        Their areas on the sphere, m^2.
    whole_cap_area_m2 : float
        Area of the whole cap, m^2.

    Notes
    -----
    With weights ``w_i`` (areas) the mean is ``m = sum(w x) / sum(w)`` and its
    standard error from the pixel scatter is
    ``SE^2 = n / (n - 1) * sum(w^2 (x - m)^2) / (sum w)^2``
    (the linearised variance of a weighted mean; Gatz & Smith 1995,
    Atmospheric Environment 29, 1185, eq. 2).  Pixels are treated as
    independent, so SE is a lower bound where the field is spatially
    correlated.
    """
    n = int(br_gauss.size)
    if n == 0:
        return CapStats(None, None, 0.0, 0, None, 0.0)
    w = area_m2.astype(np.float64)
    x = br_gauss.astype(np.float64)
    sw = float(w.sum())
    mean = float((w * x).sum() / sw)
    flux = float((w * x).sum() * _M2_TO_CM2)
    if n > 1:
        se = math.sqrt(n / (n - 1) * float((w * w * (x - mean) ** 2).sum()) / sw ** 2)
    else:
        se = None
    return CapStats(mean, flux, sw / whole_cap_area_m2, n, se, sw)


def kish_effective_number(weights) -> float:
    """Kish's effective number of observations ``(sum w)^2 / sum w^2`` of a weighted mean.

    Kish (1965), Survey Sampling, Wiley, section 11.7 (from memory); equal
    weights give the number of observations.  0 for no weight.
    """
    w = np.asarray(weights, dtype=np.float64)
    ww = float((w * w).sum())
    return float(w.sum()) ** 2 / ww if ww > 0 else 0.0


def stratified_cap_statistics(br_gauss: np.ndarray, area_m2: np.ndarray, mu: np.ndarray, bin_index: np.ndarray,
                              whole_cap_area_m2: float) -> CapStats:
    """Noise-weighted within latitude bins, area-weighted across them: the cap mean of the measurement.

    Parameters
    ----------
    br_gauss : ndarray
        Radial field of the cap's measured pixels, gauss.
    area_m2 : ndarray
        Their areas on the sphere, m^2.
    mu : ndarray
        Their cosines of the viewing angle.
    bin_index : ndarray of int
        Their latitude bins (any integer labels).
    whole_cap_area_m2 : float
        Area of the whole cap, m^2.

    Returns
    -------
    CapStats
        ``br_gauss`` the mean, ``flux_mx`` the unweighted ``sum(Br area)``,
        ``coverage``, ``pixels``, ``br_error_gauss`` (None with no more
        pixels than bins), ``area_m2`` the measured area, ``inv_mu`` the mean
        of ``1/mu`` under the same weights and ``effective_pixels`` Kish's
        number.

    Notes
    -----
    In bin ``b`` the pixels ``i`` get inverse-noise-variance weights
    ``w_i = a_i mu_i^2`` (instrument noise ``sigma`` in Blos is ``sigma / mu``
    in Br) and the bin mean is ``m_b = sum(w x) / sum(w)``.  The cap mean is
    ``M = sum_b A_b m_b / sum_b A_b`` with ``A_b`` the bin's measured area,
    so its estimand stays the area-weighted mean over the measured part of
    the cap (weighting across latitudes by ``mu^2`` would tilt it toward the
    lower latitudes, seen at higher mu).  ``M = sum_i W_i x_i`` with pixel
    weights ``W_i = (A_b / A) w_i / W_b``, ``sum W_i = 1``.  The standard
    error linearises each bin's ratio mean (Gatz & Smith 1995, Atmospheric
    Environment 29, 1185, eq. 2) and adds the bins with their fixed weights
    ``A_b / A`` (stratified sampling, e.g. Cochran 1977, Sampling
    Techniques, 3rd ed., Wiley, eq. 5.6, from memory), with a pooled
    small-sample factor ``n / (n - B)`` for ``B`` occupied bins (common
    practice, no source)::

        SE^2 = n / (n - B) * sum_i W_i^2 (x_i - m_b(i))^2

    Pixels are treated as independent, so SE is a lower bound where the
    field is spatially correlated.  The effective number of pixels is
    ``(sum W)^2 / sum W^2`` (Kish 1965, Survey Sampling, Wiley).
    """
    n = int(br_gauss.size)
    if n == 0:
        return CapStats(None, None, 0.0, 0, None, 0.0, None, None)
    x = br_gauss.astype(np.float64)
    a = area_m2.astype(np.float64)
    m = mu.astype(np.float64)
    _, b = np.unique(np.asarray(bin_index), return_inverse=True)
    nb = int(b.max()) + 1
    w = a * m * m                                  # inverse noise variance of Br = Blos / mu, times area
    a_b = np.bincount(b, weights=a, minlength=nb)
    w_b = np.bincount(b, weights=w, minlength=nb)
    m_b = np.bincount(b, weights=w * x, minlength=nb) / w_b
    inv_b = np.bincount(b, weights=w / m, minlength=nb) / w_b
    total = float(a_b.sum())
    mean = float((a_b * m_b).sum() / total)
    inv_mu = float((a_b * inv_b).sum() / total)
    big_w = (a_b[b] / total) * w / w_b[b]          # each pixel's weight in the cap mean
    if n > nb:                                     # Gatz & Smith 1995 eq. 2 per bin, bins added (stratified)
        se = math.sqrt(n / (n - nb) * float((big_w * big_w * (x - m_b[b]) ** 2).sum()))
    else:
        se = None
    flux = float((a * x).sum() * _M2_TO_CM2)
    return CapStats(mean, flux, total / whole_cap_area_m2, n, se, total, inv_mu, kish_effective_number(big_w))


def profile_edges_deg(settings: MeasureSettings) -> np.ndarray:
    """Latitude bin edges of the per-frame profile (degrees, south to north).

    Bins are ``profile_bin_deg`` wide, aligned on the poles, and cover
    ``|latitude| >= profile_min_latitude_deg`` in each hemisphere; when that
    limit is above 0 the one bin spanning the equator between the two
    hemispheres' ranges is a gap and is always left empty.  With a limit of 0
    the bins cover the whole sphere.
    """
    step = settings.profile_bin_deg
    k = int(np.floor((90.0 - settings.profile_min_latitude_deg) / step + 1e-9))
    north = 90.0 - step * np.arange(k, -1, -1)
    if north[0] <= 1e-9:
        return np.concatenate([-north[::-1], north[1:]])
    return np.concatenate([-north[::-1], north])


def _gap_bin(edges: np.ndarray, settings: MeasureSettings) -> int | None:
    """Index of the equatorial gap bin: the bin holding latitude 0 when the profile skips it."""
    if settings.profile_min_latitude_deg <= 0.0:
        return None
    i = int(np.searchsorted(edges, 0.0, side="right")) - 1
    return i if 0 <= i < edges.size - 1 else None


def _bin_lookup(edges: np.ndarray, step: float):
    """Map uniform bins of width ``step`` from -90 deg onto the profile's bins (-1: not a bin)."""
    n = int(np.ceil(180.0 / step - 1e-9))
    centres = -90.0 + step * (np.arange(n) + 0.5)
    idx = np.searchsorted(edges, centres, side="right") - 1
    idx[(idx < 0) | (idx >= edges.size - 1)] = -1
    return idx, step


@dataclass(frozen=True)
class FrameRecord:
    """What one file gave: the ``polecast measure`` keys plus provenance and a profile.

    Field values are plain Python (str, float, int, None, list) so that a
    record serialises to JSON or a database row without conversion.
    """

    file: str
    status: str
    reason: str | None = None
    time: str | None = None
    b0_deg: float | None = None
    north_br_gauss: float | None = None
    south_br_gauss: float | None = None
    north_flux_mx: float | None = None
    south_flux_mx: float | None = None
    north_coverage: float | None = None
    south_coverage: float | None = None
    north_pixels: int | None = None
    south_pixels: int | None = None
    north_br_error_gauss: float | None = None
    south_br_error_gauss: float | None = None
    # provenance and geometry
    distance_m: float | None = None
    hgln_deg: float | None = None
    crln_deg: float | None = None
    rsun_m: float | None = None
    carrington_rotation: float | None = None
    observer_source: str | None = None
    instrument: str | None = None
    cap_latitude_deg: float | None = None
    mu_min: float | None = None
    notes: tuple = ()
    # latitude profile: bin edges (deg), noise-weighted mean Br (G, None if empty) and area (m^2)
    profile_edges_deg: tuple = field(default_factory=tuple)
    profile_br_gauss: tuple = field(default_factory=tuple)
    profile_area_m2: tuple = field(default_factory=tuple)
    # zero-point offset (measurement version 2; None in older records): the estimate (G, line of sight),
    # its standard error, the pixels it used, and whether the stored cap and profile means are corrected
    zero_offset_gauss: float | None = None
    zero_offset_error_gauss: float | None = None
    zero_offset_pixels: int | None = None
    zero_offset_applied: bool | None = None
    # means of 1/mu with the weights of each cap mean and profile bin (for pipeline.zero_offset.toggle_zero_offset)
    north_inv_mu: float | None = None
    south_inv_mu: float | None = None
    profile_inv_mu: tuple = field(default_factory=tuple)
    # Kish effective number of pixels of each cap mean, (sum W)^2 / sum W^2
    north_effective_pixels: float | None = None
    south_effective_pixels: float | None = None

    def to_json(self) -> dict:
        """The ``polecast measure`` JSON object: exactly :data:`JSON_KEYS`."""
        return {k: getattr(self, k) for k in JSON_KEYS}

    def to_dict(self) -> dict:
        """Every field, lists for tuples (for the store)."""
        d = asdict(self)
        for k, v in d.items():
            if isinstance(v, tuple):
                d[k] = list(v)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "FrameRecord":
        """Inverse of :meth:`to_dict` (unknown keys are ignored)."""
        names = cls.__dataclass_fields__
        kw = {k: (tuple(v) if isinstance(v, list) else v) for k, v in d.items() if k in names}
        return cls(**kw)


def skipped_record(path, reason: str, time: str | None = None) -> FrameRecord:
    """A record for a file that cannot be measured (bad input): permanent, stored with its reason."""
    return FrameRecord(file=str(path), status="skipped", reason=" ".join(str(reason).split()), time=time)


def error_record(path, reason: str) -> FrameRecord:
    """A record for a file whose measurement failed for a reason outside the file (a bug, memory).

    ``status="error"``: not a result.  The store never keeps it (the file is
    tried again on the next ingest), the ingest counts it as an error and
    the exit code says so.
    """
    return FrameRecord(file=str(path), status="error", reason=" ".join(str(reason).split()))


def _carrington_rotation(t: np.datetime64) -> float:
    from astropy.time import Time
    from sunpy.coordinates.sun import carrington_rotation_number

    with warnings.catch_warnings():  # erfa's "dubious year" for dates past the leap-second table
        warnings.simplefilter("ignore")
        return float(carrington_rotation_number(Time(t.astype("datetime64[ms]").astype(str), scale="utc")))


def _offset_estimate(frame: Frame) -> tuple:
    """:func:`pipeline.zero_offset.estimate_zero_offset_gauss` on the frame's offset rows."""
    hdr = frame.header
    blos, lat, mu, rows = [], [], [], []
    for block in frame.offset_blocks:
        s = surface_points(hdr.geometry, hdr.observer, block.window, mu_floor=2.0, longitudes=False)
        blos.append(block.data.ravel()); lat.append(s.latitude_deg.ravel()); mu.append(s.mu.ravel())
        w = block.window
        rows.append(np.repeat(np.arange(w.row0, w.row1), w.col1 - w.col0))
    if not blos:
        return math.nan, math.nan, 0
    return estimate_zero_offset_gauss(np.concatenate(blos), np.concatenate(lat), np.concatenate(mu),
                                      row_index=np.concatenate(rows))


def _none_if_nan(v):
    return None if v is None or not math.isfinite(v) else float(v)


def measure_frame(frame: Frame, settings: MeasureSettings | None = None) -> FrameRecord:
    """Measure both polar caps, the latitude profile and the zero-point offset of one frame.

    Parameters
    ----------
    frame : Frame
        As read by :func:`pipeline.reader.read_frame` (``region="caps"`` is
        enough; its ``offset_blocks`` give the zero-offset estimate).
    settings : MeasureSettings, optional

    Returns
    -------
    FrameRecord
        ``status="ok"``.  With ``settings.zero_offset == "weak-field-mean"``
        and an estimate, the cap and profile means are of
        ``(Blos - delta) / mu`` (``zero_offset_applied=True``); otherwise of
        ``Blos / mu``.  The estimate is recorded either way.
    """
    settings = settings or MeasureSettings()
    hdr = frame.header
    obs = hdr.observer
    cap = settings.cap_latitude_deg
    edges = profile_edges_deg(settings)
    nbins = edges.size - 1
    lookup, step = _bin_lookup(edges, settings.profile_bin_deg)
    n_uniform = lookup.size
    # per uniform bin (width step from -90 deg): area, noise weight, weight x Br, weight / mu
    u_a, u_w, u_wb, u_wi = (np.zeros(n_uniform) for _ in range(4))
    caps = {"north": [], "south": []}
    lo = settings.read_latitude_deg
    for block in frame.blocks:
        s = surface_points(hdr.geometry, obs, block.window, mu_floor=settings.mu_min, longitudes=False)
        with np.errstate(invalid="ignore"):
            # mu is NaN off the disk, so the mu cut also drops off-disk pixels
            good = (s.mu >= settings.mu_min) & (np.abs(s.latitude_deg) >= lo) & np.isfinite(block.data)
        lat = s.latitude_deg[good]
        area = s.area_m2[good]
        mu = s.mu[good]
        br = block.data[good] / mu                  # radial-field assumption Br = Blos / mu
        w = area * mu * mu                           # inverse noise variance of Br, times area
        ub = np.minimum(((lat + 90.0) / step).astype(np.intp), n_uniform - 1)
        u_a += np.bincount(ub, weights=area, minlength=n_uniform)
        u_w += np.bincount(ub, weights=w, minlength=n_uniform)
        u_wb += np.bincount(ub, weights=w * br, minlength=n_uniform)
        u_wi += np.bincount(ub, weights=w / mu, minlength=n_uniform)
        for pole, sel in (("north", lat >= cap), ("south", lat <= -cap)):
            caps[pole].append((br[sel], area[sel], mu[sel], ub[sel]))
    # profile bins: unions of uniform bins (the equatorial gap bin is left empty)
    inb = lookup >= 0
    prof_a = np.bincount(lookup[inb], weights=u_a[inb], minlength=nbins)
    prof_w = np.bincount(lookup[inb], weights=u_w[inb], minlength=nbins)
    prof_wb = np.bincount(lookup[inb], weights=u_wb[inb], minlength=nbins)
    prof_wi = np.bincount(lookup[inb], weights=u_wi[inb], minlength=nbins)
    gap = _gap_bin(edges, settings)
    if gap is not None:
        prof_a[gap] = prof_w[gap] = prof_wb[gap] = prof_wi[gap] = 0.0
    whole = cap_area_m2(obs.rsun_m, cap)
    stats = {}
    for pole, parts in caps.items():
        br, area, mu, ub = (np.concatenate([p[j] for p in parts]) for j in range(4))
        stats[pole] = stratified_cap_statistics(br, area, mu, ub, whole)
    with np.errstate(invalid="ignore", divide="ignore"):
        ok = prof_w > 0
        prof_mean = np.where(ok, prof_wb / np.where(ok, prof_w, 1.0), np.nan)
        prof_inv = np.where(ok, prof_wi / np.where(ok, prof_w, 1.0), np.nan)
    offset, offset_error, offset_n = _offset_estimate(frame)
    north, south = stats["north"], stats["south"]
    record = FrameRecord(
        file=hdr.path, status="ok", reason=None, time=iso_time(hdr.time), b0_deg=obs.b0_deg,
        north_br_gauss=north.br_gauss, south_br_gauss=south.br_gauss,
        north_flux_mx=north.flux_mx, south_flux_mx=south.flux_mx,
        north_coverage=north.coverage, south_coverage=south.coverage,
        north_pixels=north.pixels, south_pixels=south.pixels,
        north_br_error_gauss=north.br_error_gauss, south_br_error_gauss=south.br_error_gauss,
        distance_m=obs.distance_m, hgln_deg=obs.hgln_deg, crln_deg=obs.crln_deg, rsun_m=obs.rsun_m,
        carrington_rotation=_carrington_rotation(hdr.time), observer_source=obs.source,
        instrument=hdr.instrument, cap_latitude_deg=cap, mu_min=settings.mu_min, notes=tuple(hdr.notes),
        profile_edges_deg=tuple(float(e) for e in edges),
        profile_br_gauss=tuple(_none_if_nan(v) for v in prof_mean),
        profile_area_m2=tuple(float(v) for v in prof_a),
        zero_offset_gauss=_none_if_nan(offset), zero_offset_error_gauss=_none_if_nan(offset_error),
        zero_offset_pixels=int(offset_n), zero_offset_applied=False,
        north_inv_mu=north.inv_mu, south_inv_mu=south.inv_mu,
        profile_inv_mu=tuple(_none_if_nan(v) for v in prof_inv),
        north_effective_pixels=north.effective_pixels, south_effective_pixels=south.effective_pixels,
    )
    if settings.zero_offset != "none":
        from pipeline.zero_offset import toggle_zero_offset

        record = toggle_zero_offset(record, True)
    return record


def measure_file(path: str | os.PathLike, settings: MeasureSettings | None = None) -> FrameRecord:
    """Read and measure one file; never raises for one file's trouble, and tells bad input from errors.

    Parameters
    ----------
    path : str or path-like
    settings : MeasureSettings, optional

    Returns
    -------
    FrameRecord
        ``status="ok"``; ``status="skipped"`` with a one-line ``reason``
        when the file is bad input (:class:`~pipeline.reader.FrameError`:
        permanent, the store keeps it); or ``status="error"``
        (:func:`error_record`) when the measurement failed for a reason
        outside the file: out of memory, or an unexpected exception (a bug),
        which is not the file's fault, so it is not a permanent skip; an
        ingest does not store it and tries the file again next run.
    """
    settings = settings or MeasureSettings()
    try:
        frame = read_frame(path, settings, region="caps")
        return measure_frame(frame, settings)
    except FrameError as exc:
        return skipped_record(path, str(exc))
    except MemoryError:
        return error_record(path, "out of memory while measuring")
    except Exception as exc:  # not bad input: reported and retried, never a permanent skip nor a crash of the batch
        msg = " ".join(str(exc).split())[:300]
        return error_record(path, f"unexpected {type(exc).__name__} while measuring{': ' + msg if msg else ''}")
