"""Frame -> FrameRecord: per-cap mean radial field, flux, coverage and error.

Radial-field assumption: ``Br = Blos / mu`` (DESIGN.md; e.g. Svalgaard,
Duvall & Scherrer 1978, Solar Physics 58, 225).  A polar cap is
``|latitude| >= cap_latitude_deg``; pixels with ``mu < mu_min`` or missing
data are left out.  Each cap's mean is area weighted, its flux is
``sum(Br * area)`` and its coverage is the measured area over the whole cap's
area ``2 pi R^2 (1 - sin cap_latitude)``.

The record also carries a latitude profile (area-weighted mean Br and area
per latitude bin) for the latitude-time diagram and the B0 profile
correction of later stages.

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

__all__ = ["CapStats", "FrameRecord", "JSON_KEYS", "MEASUREMENT_VERSION", "cap_statistics", "measure_frame",
           "measure_file", "skipped_record", "error_record", "profile_edges_deg"]

#: Version of the numbers the measurement code (reader, projection, measure) gives; an integer bumped by hand
#: whenever a change to those modules changes a measured value or a skip decision (see the module docstring).
MEASUREMENT_VERSION = 1

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
    # latitude profile: bin edges (deg), area-weighted mean Br (G, None if empty) and area (m^2)
    profile_edges_deg: tuple = field(default_factory=tuple)
    profile_br_gauss: tuple = field(default_factory=tuple)
    profile_area_m2: tuple = field(default_factory=tuple)

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


def measure_frame(frame: Frame, settings: MeasureSettings | None = None) -> FrameRecord:
    """Measure both polar caps and the latitude profile of one frame.

    Parameters
    ----------
    frame : Frame
        As read by :func:`pipeline.reader.read_frame` (``region="caps"`` is
        enough).
    settings : MeasureSettings, optional

    Returns
    -------
    FrameRecord
        ``status="ok"``.
    """
    settings = settings or MeasureSettings()
    hdr = frame.header
    obs = hdr.observer
    cap = settings.cap_latitude_deg
    edges = profile_edges_deg(settings)
    nbins = edges.size - 1
    lookup, step = _bin_lookup(edges, settings.profile_bin_deg)
    prof_w = np.zeros(nbins)
    prof_wb = np.zeros(nbins)
    north_b, north_a, south_b, south_a = [], [], [], []
    lo = settings.read_latitude_deg
    for block in frame.blocks:
        s = surface_points(hdr.geometry, obs, block.window, mu_floor=settings.mu_min, longitudes=False)
        with np.errstate(invalid="ignore"):
            # mu is NaN off the disk, so the mu cut also drops off-disk pixels
            good = (s.mu >= settings.mu_min) & (np.abs(s.latitude_deg) >= lo) & np.isfinite(block.data)
        lat = s.latitude_deg[good]
        area = s.area_m2[good]
        br = block.data[good] / s.mu[good]          # radial-field assumption Br = Blos / mu
        n_sel = lat >= cap
        s_sel = lat <= -cap
        north_b.append(br[n_sel]); north_a.append(area[n_sel])
        south_b.append(br[s_sel]); south_a.append(area[s_sel])
        idx = lookup[np.minimum(((lat + 90.0) / step).astype(np.intp), lookup.size - 1)]
        inb = idx >= 0
        prof_w += np.bincount(idx[inb], weights=area[inb], minlength=nbins)
        prof_wb += np.bincount(idx[inb], weights=(area * br)[inb], minlength=nbins)
    gap = _gap_bin(edges, settings)
    if gap is not None:
        prof_w[gap] = prof_wb[gap] = 0.0
    whole = cap_area_m2(obs.rsun_m, cap)
    north = cap_statistics(np.concatenate(north_b), np.concatenate(north_a), whole)
    south = cap_statistics(np.concatenate(south_b), np.concatenate(south_a), whole)
    with np.errstate(invalid="ignore", divide="ignore"):
        prof_mean = np.where(prof_w > 0, prof_wb / np.where(prof_w > 0, prof_w, 1.0), np.nan)
    return FrameRecord(
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
        profile_br_gauss=tuple(None if not np.isfinite(v) else float(v) for v in prof_mean),
        profile_area_m2=tuple(float(v) for v in prof_w),
    )


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
