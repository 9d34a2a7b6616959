"""Zero-point offset of a line-of-sight magnetogram: estimate, and toggle its correction on records.

A magnetogram whose zero point is off by ``delta`` (gauss, line of sight)
biases every radial-field value ``Br = Blos / mu`` by ``delta / mu``, so a
polar-cap mean of Br is biased by ``delta <1/mu>`` (with the cap mean's own
weights), several times ``delta`` near the limb.  This module

* estimates ``delta`` from the weak-field pixels of the low-latitude disk
  (:func:`estimate_zero_offset_gauss`), on a sparse set of image rows chosen
  from the header alone (:func:`plan_offset_windows`) so that reading them
  costs little;
* switches the correction on or off on measured records without measuring
  again (:func:`toggle_zero_offset`, :func:`toggle_records`): the correction
  is exactly linear, ``corrected = raw - delta * mean(1/mu)``, with the mean
  of ``1/mu`` taken with the same weights as the corrected mean, which every
  record of measurement version 2 carries.

The method names of ``[measure] zero_offset`` are :data:`ZERO_OFFSET_METHODS`.
Whatever the setting, the estimate is always made and recorded, so that the
other treatment can be had later by :func:`toggle_records`.
"""

from __future__ import annotations

import dataclasses
import math
from typing import TYPE_CHECKING, Iterable

import numpy as np

from pipeline.projection import ImageGeometry, Observer, Window, grow_mask, rays_at

if TYPE_CHECKING:  # pragma: no cover
    from pipeline.measure import FrameRecord

__all__ = ["ZERO_OFFSET_METHODS", "OFFSET_MAX_ABS_LATITUDE_DEG", "OFFSET_MIN_MU", "OFFSET_CLIP_SIGMA",
           "OFFSET_MIN_PIXELS", "OFFSET_TARGET_PIXELS", "OFFSET_ERROR_BANDS", "estimate_zero_offset_gauss",
           "plan_offset_windows", "toggle_zero_offset", "toggle_records"]

#: ``[measure] zero_offset`` choices: no correction, or the clipped weak-field mean of the low-latitude disk.
ZERO_OFFSET_METHODS = ("none", "weak-field-mean")

#: Pixels used for the estimate: |latitude| <= this (degrees) ...
OFFSET_MAX_ABS_LATITUDE_DEG = 40.0
#: ... and mu >= this.
OFFSET_MIN_MU = 0.5
#: Iterative clipping at this many standard deviations about the median.
OFFSET_CLIP_SIGMA = 3.0
#: At most this many clipping passes.
OFFSET_MAX_ITERATIONS = 10
#: Fewer pixels than this after clipping: no estimate (NaN).
OFFSET_MIN_PIXELS = 50
#: Bands of rows for the correlated-field error of the estimate.
OFFSET_ERROR_BANDS = 16
#: About this many pixels are read for the estimate at any image size.
OFFSET_TARGET_PIXELS = 30000


def estimate_zero_offset_gauss(blos_gauss, latitude_deg, mu, *,
                               max_abs_latitude_deg: float = OFFSET_MAX_ABS_LATITUDE_DEG,
                               min_mu: float = OFFSET_MIN_MU, clip_sigma: float = OFFSET_CLIP_SIGMA,
                               max_iterations: int = OFFSET_MAX_ITERATIONS,
                               min_pixels: int = OFFSET_MIN_PIXELS, row_index=None,
                               n_bands: int = OFFSET_ERROR_BANDS) -> tuple:
    """Zero-point offset of a magnetogram from the weak-field pixels of the low-latitude disk.

    Parameters
    ----------
    blos_gauss : array_like
        Line-of-sight field of the candidate pixels, gauss (NaN: missing).
    latitude_deg : array_like
        Their heliographic latitudes, degrees (NaN off the disk).
    mu : array_like
        Their cosines of the viewing angle (NaN off the disk).
    max_abs_latitude_deg : float
        Use pixels with ``|latitude| <= this`` (degrees).
    min_mu : float
        ... and ``mu >= this``.
    clip_sigma : float
        Clip pixels farther than this many standard deviations from the median.
    max_iterations : int
        At most this many clipping passes (it stops earlier when nothing more is clipped).
    min_pixels : int
        Fewer pixels left than this gives no estimate.
    row_index : array_like of int, optional
        Image row of each pixel.  When given, the error also allows for
        spatially correlated field (see Notes).
    n_bands : int
        Number of bands of rows for that error.

    Returns
    -------
    offset_gauss : float
        Mean of the kept ``Blos``, gauss; NaN when there are too few pixels.
    error_gauss : float
        Its standard error ``s / sqrt(n)``, gauss (NaN likewise).
    n_pixels : int
        Pixels kept after clipping (0 when there is no estimate).

    Notes
    -----
    Away from the activity belts and the poles the quiet photosphere's
    line-of-sight field is a mixed-polarity network whose large-scale mean is
    small, so the mean of the weak-field pixels near disk centre measures
    the instrument's zero point (common practice, no source).  The cuts:
    ``|latitude| <= 40 deg`` keeps out the polar fields and (with the
    clipping) most active-region flux; ``mu >= 0.5`` (within 60 deg of disk
    centre) keeps out the limb, where the line of sight sees horizontal
    fields and the pixels' Blos is no longer a weak projection of a mostly
    radial field (choices of this module, common practice, no source).
    Strong fields are removed by iterative sigma clipping about the median:
    keep ``|x - median| <= clip_sigma * std`` and repeat until no pixel
    leaves (the scheme of astropy's ``sigma_clip`` with ``cenfunc="median"``,
    written out here; astropy's ``sigma_clipped_stats`` gives the same
    clipped mean).  The offset is the *mean* of the kept values, with the
    standard error of a mean ``s / sqrt(n)`` (``s`` their standard deviation,
    ddof 1).  Not their median: stored magnetograms are quantised (BSCALE),
    and the median of quantised values sticks to the lattice (at a 0.5 G step
    and 0.7 G noise it jumps between -0.5, 0 and 0.5 G, measured on the demo
    archive), whereas the mean of values quantised with a step ``h`` below
    about the noise ``sigma`` is that of the unquantised values to a relative
    ``exp(-2 pi^2 sigma^2 / h^2)`` (Widrow's quantisation theorem; Widrow &
    Kollar 2008, Quantization Noise, Cambridge University Press, from
    memory).  ``s / sqrt(n)`` takes the pixels as independent, which the
    network and active-region remnants are not (the solar field is
    correlated over many pixels): with ``row_index`` the kept pixels are also
    split into ``n_bands`` bands of whole rows of about equal counts, and the
    error is the larger of ``s / sqrt(n)`` and the band-means error
    ``SE^2 = G / (G - 1) sum_g (n_g / n)^2 (m_g - m)^2`` (the linearised
    variance of a ratio mean over clusters; Cochran 1977, Sampling
    Techniques, 3rd ed., Wiley, section 9.4 on cluster sampling, from
    memory), which sees correlations shorter than a band.  Bad input (no
    finite pixel, empty arrays, arrays of unequal size) gives NaN, never an
    exception.
    """
    x = np.asarray(blos_gauss, dtype=np.float64).ravel()
    lat = np.asarray(latitude_deg, dtype=np.float64).ravel()
    m = np.asarray(mu, dtype=np.float64).ravel()
    rows = None if row_index is None else np.asarray(row_index).ravel()
    if not (x.size == lat.size == m.size) or (rows is not None and rows.size != x.size):
        return math.nan, math.nan, 0
    with np.errstate(invalid="ignore"):
        keep = np.isfinite(x) & (np.abs(lat) <= max_abs_latitude_deg) & (m >= min_mu)
    x = x[keep]
    rows = None if rows is None else rows[keep]
    if x.size < max(int(min_pixels), 2):
        return math.nan, math.nan, 0
    for _ in range(int(max_iterations)):
        centre = float(np.median(x))
        s = float(np.std(x))
        inside = np.abs(x - centre) <= clip_sigma * s
        if inside.all() or inside.sum() < 2:
            break
        x = x[inside]
        rows = None if rows is None else rows[inside]
    if x.size < max(int(min_pixels), 2):
        return math.nan, math.nan, 0
    n = int(x.size)
    offset = float(np.mean(x))
    error = float(np.std(x, ddof=1)) / math.sqrt(n)  # standard error of a mean
    if rows is not None:
        error = max(error, _band_error(x, rows, offset, int(n_bands)))
    return offset, error, n


def _band_error(x: np.ndarray, rows: np.ndarray, mean: float, n_bands: int) -> float:
    """Standard error of the mean from the means of ``n_bands`` bands of whole rows of about equal counts
    (Cochran 1977, section 9.4, from memory); 0 when fewer than two bands can be made."""
    order = np.argsort(rows, kind="stable")
    r = rows[order]
    # band g holds the rows whose first pixel falls in the g-th equal-count slice
    first = np.searchsorted(r, r, side="left")
    band = np.minimum((first * n_bands) // r.size, n_bands - 1)
    _, g = np.unique(band, return_inverse=True)
    ng = int(g.max()) + 1
    if ng < 2:
        return 0.0
    cnt = np.bincount(g, minlength=ng).astype(np.float64)
    means = np.bincount(g, weights=x[order], minlength=ng) / cnt
    frac = cnt / r.size
    return math.sqrt(ng / (ng - 1) * float((frac * frac * (means - mean) ** 2).sum()))


def _coarse_surface(geometry: ImageGeometry, observer: Observer, rows, cols):
    """Latitude (deg) and mu at pixel positions (NaN off the disk).

    The near intersection of the ray ``P = O + d u`` from ``O = (0, 0, D)``
    with the sphere and ``mu = -(P . u) / R`` (the outward normal ``P / R``
    against the direction ``-u`` to the observer); latitude from
    ``Z = P_y cos B0 + P_z sin B0`` (Thompson 2006, A&A 449, 791, eq. 11), as
    in :func:`pipeline.projection.surface_points`.
    """
    ux, uy, uz, _ = rays_at(geometry, rows, cols)
    big_d, r = float(observer.distance_m), float(observer.rsun_m)
    c = -uz
    disc = r * r - big_d * big_d * (1.0 - c * c)
    on = (disc >= 0.0) & (c > 0.0)
    d = np.where(on, big_d * c - np.sqrt(np.where(on, disc, 0.0)), np.nan)
    px, py, pz = d * ux, d * uy, big_d + d * uz
    mu = -(px * ux + py * uy + pz * uz) / r
    b0 = np.deg2rad(observer.b0_deg)
    lat = np.rad2deg(np.arcsin(np.clip((py * np.cos(b0) + pz * np.sin(b0)) / r, -1.0, 1.0)))
    return np.where(on, lat, np.nan), np.where(on, mu, np.nan)


def plan_offset_windows(geometry: ImageGeometry, observer: Observer, *,
                        max_abs_latitude_deg: float = OFFSET_MAX_ABS_LATITUDE_DEG,
                        min_mu: float = OFFSET_MIN_MU, target_pixels: int = OFFSET_TARGET_PIXELS) -> list:
    """One-row windows holding about ``target_pixels`` pixels of the offset zone, from the header alone.

    The zone is ``|latitude| <= max_abs_latitude_deg`` and ``mu >= min_mu``.
    A coarse grid (about 256 samples on the longer side) is classified,
    flagged cells are grown by one cell, and every ``k``-th image row through
    the zone is taken, ``k`` chosen so that the rows hold about
    ``target_pixels`` zone pixels (all rows of a small image); each window
    spans the flagged columns of its row.  The exact per-pixel cuts are made
    by the caller (:func:`estimate_zero_offset_gauss`).

    Returns
    -------
    list of Window
        Ordered by row, one row each, non-overlapping.
    """
    ny, nx = geometry.shape
    step = max(1, int(np.ceil(max(ny, nx) / 256)))
    n_rows, n_cols = int(np.ceil(ny / step)), int(np.ceil(nx / step))
    cy = np.minimum(np.arange(n_rows) * step + (step - 1) / 2.0, ny - 1)
    cx = np.minimum(np.arange(n_cols) * step + (step - 1) / 2.0, nx - 1)
    lat, mu = _coarse_surface(geometry, observer, cy[:, None], cx[None, :])
    with np.errstate(invalid="ignore"):
        flagged = (np.abs(lat) <= max_abs_latitude_deg) & (mu >= min_mu)
    if not flagged.any():
        return []
    zone_pixels = float(flagged.sum()) * step * step
    g2 = grow_mask(flagged)
    k = max(1, int(np.ceil(zone_pixels / max(int(target_pixels), 1))))
    coarse_rows = np.flatnonzero(flagged.any(axis=1))
    r_first = int(coarse_rows[0]) * step
    r_last = min((int(coarse_rows[-1]) + 1) * step, ny)
    windows = []
    for r in range(r_first + k // 2, r_last, k):
        cols = np.flatnonzero(g2[r // step])
        if cols.size:
            windows.append(Window(r, r + 1, int(cols[0] * step), int(min((cols[-1] + 1) * step, nx))))
    return windows


# -- toggling the correction on measured records -----------------------------------------------------

def _shift(value, inv_mu, delta: float, sign: float):
    """``value + sign * delta * inv_mu``; None stays None."""
    if value is None or inv_mu is None:
        return value
    return float(value + sign * delta * inv_mu)


def toggle_zero_offset(record: "FrameRecord", apply: bool) -> "FrameRecord":
    """The record with its zero-offset correction applied (``apply=True``) or taken off (``False``).

    Parameters
    ----------
    record : FrameRecord
        A measured record (measurement version 2 or later).
    apply : bool
        Whether the returned record's cap means and profile means are corrected.

    Returns
    -------
    FrameRecord
        A new record (the input is not changed) with ``north_br_gauss``,
        ``south_br_gauss`` and ``profile_br_gauss`` corrected or uncorrected
        and ``zero_offset_applied`` set to ``apply``.  The record itself is
        returned unchanged when it is already in that state, when it is not
        ``status="ok"``, or when it cannot be corrected: no offset estimate
        (``zero_offset_gauss`` None or NaN) or no recorded means of ``1/mu``
        (a record of measurement version 1).  A caller asking for ``apply=True``
        tells that case by ``result.zero_offset_applied`` still being False
        (or None for a version-1 record): that field is the flag.

    Notes
    -----
    Every mean a record holds is linear in the data with fixed weights, so a
    constant ``delta`` added to every Blos pixel (``delta / mu`` to Br) moves
    it by ``delta * <1/mu>`` with ``<1/mu>`` the mean of ``1/mu`` under the
    same weights (recorded as ``north_inv_mu``, ``south_inv_mu``,
    ``profile_inv_mu``): ``corrected = raw - delta <1/mu>``, exactly.
    Fluxes (unweighted sums) and standard errors are left as measured: the
    errors describe the pixel scatter, which a constant shift of Blos changes
    only through the spread of ``1/mu`` within a latitude bin, and the
    offset's own error (``zero_offset_error_gauss``) is common to both caps
    and is kept apart for later stages to propagate.
    """
    apply = bool(apply)
    if record.status != "ok" or record.zero_offset_applied is None or record.zero_offset_applied == apply:
        return record
    delta = record.zero_offset_gauss
    if delta is None or not math.isfinite(delta):
        return record
    sign = -1.0 if apply else 1.0
    prof_inv = record.profile_inv_mu
    profile = record.profile_br_gauss
    if prof_inv and len(prof_inv) == len(profile):
        profile = tuple(_shift(v, im, delta, sign) for v, im in zip(profile, prof_inv))
    return dataclasses.replace(
        record,
        north_br_gauss=_shift(record.north_br_gauss, record.north_inv_mu, delta, sign),
        south_br_gauss=_shift(record.south_br_gauss, record.south_inv_mu, delta, sign),
        profile_br_gauss=profile, zero_offset_applied=apply)


def toggle_records(records: Iterable["FrameRecord"], apply: bool) -> list:
    """:func:`toggle_zero_offset` of every record (a list, in order)."""
    return [toggle_zero_offset(r, apply) for r in records]
