"""Frame records -> the PolarSeries Dataset and the latitude-time diagram.

:func:`polar_series` turns the per-frame records of the store into one
:class:`xarray.Dataset` holding the north, south and axial-dipole
``(north - south) / 2`` polar-field series

- per frame (dimension ``time``), by the chosen B0 method (:mod:`pipeline.b0`);
- per Carrington rotation (dimension ``rotation``, integer rotation number,
  coordinate ``rotation_time`` = mid-time of the rotation): mean, error,
  coverage and number of frames; a rotation without frames is NaN;
- smoothed on the rotation grid by a named smoother (:mod:`pipeline.smoothing`).

:func:`latitude_time_diagram` gives the longitude-averaged Br per latitude bin
and rotation (area weighted, from the records' latitude profiles), and
:func:`band_cap_means` the whole-cap means above each band boundary from it.

Default B0 method: ``"fill"``, the best-tested option.  On frames rendered
from a constant ``Br = B sin^8(lat)`` field seen from the Earth's true B0
through a year it cuts the annual modulation of the per-frame cap mean
many-fold against ``"visible"`` and returns the whole-cap mean, as
``"profile"`` does (tests/test_b0.py, tests/test_b0_fill.py); unlike
``"profile"`` it assumes no shape in latitude, so on a reversal that proceeds
poleward it recovers the whole-cap epoch within two rotations where the
visible-part and fitted-shape means reverse early (tests/test_b0_fill.py,
and the demo's closed loop against the synthetic star's truth); unlike
``"season"`` it keeps both poles in every frame, so the axial dipole is
defined per frame.  It needs latitude profiles that reach the cap boundary
(``measure.profile_min_latitude_deg <= cap latitude``, the default).  Default smoothing: Gaussian with FWHM 6 rotations
(0.45 yr): a polarity episode lasting six months keeps its sign and about its
length after smoothing, while the annual ripple is damped to about half and
rotation-to-rotation noise by ~4.
"""

from __future__ import annotations

import functools
import math
import warnings
from dataclasses import dataclass

import numpy as np
import xarray as xr

from pipeline.b0 import (B0_METHODS, SERIES_METHODS, common_cap_latitude, common_profile_edges, fill_estimates,
                         fill_hidden_bins, fill_hidden_bins_with_error, pole_estimates)
from pipeline.config import ConfigError, check_choice, check_number
from pipeline.smoothing import SMOOTHING_METHODS, WIDTH_UNITS, Smoother, smooth
from pipeline.timeutil import decimal_year, to_datetime64

__all__ = ["SeriesSettings", "polar_series", "latitude_time_diagram", "filled_diagram", "filled_diagram_error",
           "band_cap_means", "band_cap_fill_errors",
           "rotation_mid_time", "rotation_number", "BAND_BOUNDARIES_DEG"]

#: Cap boundaries of the per-band reversal analysis (|latitude|, degrees).
BAND_BOUNDARIES_DEG = (55.0, 60.0, 65.0, 70.0, 75.0, 80.0, 85.0)


@dataclass(frozen=True)
class SeriesSettings:
    """How records become the PolarSeries (configuration section ``[series]``).

    Attributes
    ----------
    b0_method : str
        ``"fill"`` (default), ``"profile"``, ``"visible"`` or ``"season"`` (:mod:`pipeline.b0`).
    season_threshold_deg : float
        ``"season"``: keep north only when ``B0 > threshold``, south when
        ``B0 < -threshold`` (degrees).
    profile_exponent : float
        ``"profile"``: the exponent n of ``Br = B_pole sin^n(lat)`` when not
        fitted (default 8, Svalgaard, Duvall & Scherrer 1978, from memory).
    profile_fit_exponent : bool
        ``"profile"``: fit n per frame and pole instead.
    fit_min_latitude_deg : float
        ``"profile"``: fit the bins with ``|lat| >= this`` (degrees).
    profile_min_bins : int
        ``"profile"``: fewer usable bins in a hemisphere give NaN.
    cap_latitude_deg : float or None
        Whole-cap boundary of ``"profile"`` (degrees); None uses each record's.
    smoothing : str
        ``"gaussian"`` (default), ``"running"`` or ``"none"``.
    smoothing_width : float
        FWHM (gaussian) or window (running), in ``smoothing_width_unit``.
    smoothing_width_unit : str
        ``"rotations"`` or ``"years"``.
    max_gap_years : float
        Smoothed values more than half this from any rotation with data are NaN.
    fill_max_gap_years : float
        ``"fill"``: a hidden latitude bin is filled only between frames that saw
        it at most this far apart (years).
    """

    b0_method: str = "fill"
    season_threshold_deg: float = 0.0
    profile_exponent: float = 8.0
    profile_fit_exponent: bool = False
    fit_min_latitude_deg: float = 50.0
    profile_min_bins: int = 3
    cap_latitude_deg: float | None = None
    smoothing: str = "gaussian"
    smoothing_width: float = 6.0
    smoothing_width_unit: str = "rotations"
    max_gap_years: float = 2.0
    fill_max_gap_years: float = 1.5

    def __post_init__(self):
        check_choice("series.b0_method", self.b0_method, B0_METHODS)
        check_number("series.season_threshold_deg", self.season_threshold_deg, lo=0.0, hi=7.5)
        check_number("series.profile_exponent", self.profile_exponent, lo=0.0, hi=50.0, lo_open=True)
        if not isinstance(self.profile_fit_exponent, bool):
            raise ConfigError(f"series.profile_fit_exponent: got {self.profile_fit_exponent!r}; "
                              "expected true or false")
        check_number("series.fit_min_latitude_deg", self.fit_min_latitude_deg, lo=0.0, hi=89.0)
        check_number("series.profile_min_bins", self.profile_min_bins, lo=2, integer=True)
        if self.cap_latitude_deg is not None:
            check_number("series.cap_latitude_deg", self.cap_latitude_deg, lo=0.0, hi=90.0, lo_open=True)
        check_choice("series.smoothing", self.smoothing, SMOOTHING_METHODS)
        check_number("series.smoothing_width", self.smoothing_width, lo=0.0, lo_open=True)
        check_choice("series.smoothing_width_unit", self.smoothing_width_unit, WIDTH_UNITS)
        check_number("series.max_gap_years", self.max_gap_years, lo=0.0, lo_open=True)
        check_number("series.fill_max_gap_years", self.fill_max_gap_years, lo=0.0, lo_open=True)

    @property
    def smoother(self) -> Smoother:
        """The :class:`pipeline.smoothing.Smoother` these settings name."""
        return Smoother(self.smoothing, self.smoothing_width, self.smoothing_width_unit, self.max_gap_years)


def rotation_number(time) -> np.ndarray:
    """Carrington rotation number (float) of datetime64 times (sunpy's ephemeris)."""
    from astropy.time import Time
    from sunpy.coordinates.sun import carrington_rotation_number

    t = np.atleast_1d(to_datetime64(time)).astype("datetime64[ms]").astype(str)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.atleast_1d(np.asarray(carrington_rotation_number(Time(list(t), scale="utc")), dtype=float))


def rotation_mid_time(rotations) -> np.ndarray:
    """Mid-time (datetime64[ns]) of integer Carrington rotations.

    Notes
    -----
    The time at which rotation number ``r + 0.5`` is reached, from sunpy's
    ``carrington_rotation_time`` (Carrington longitude of the sub-Earth point
    by the standard ephemeris).
    """
    r = np.atleast_1d(np.asarray(rotations, dtype=float))
    if r.size == 0:
        return np.array([], dtype="datetime64[ns]")
    return np.array(_mid_times(tuple(float(v) for v in r)), dtype="datetime64[ns]")


@functools.lru_cache(maxsize=64)
def _mid_times(rotations: tuple) -> tuple:
    """:func:`rotation_mid_time` of a tuple of rotations, cached: the ensemble of analysis choices
    (pipeline.systematics) builds many series over the same rotations, and the ephemeris is the slow part."""
    from sunpy.coordinates.sun import carrington_rotation_time

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t = carrington_rotation_time(np.asarray(rotations) + 0.5)
        iso = np.atleast_1d(t.utc.isot)
    return tuple(to_datetime64(iso))


def _good_records(records):
    good, skipped = [], 0
    for r in records:
        if getattr(r, "status", None) != "ok" or not getattr(r, "time", None):
            skipped += 1
            continue
        good.append(r)
    good.sort(key=lambda r: to_datetime64(r.time))
    return good, skipped


def _rotation_mean(values, errors, groups, n_groups):
    """Per-group mean and error of frame values (NaN-aware)."""
    mean = np.full(n_groups, np.nan)
    err = np.full(n_groups, np.nan)
    count = np.zeros(n_groups, dtype=np.int64)
    for g in range(n_groups):
        sel = (groups == g) & np.isfinite(values)
        n = int(sel.sum())
        count[g] = n
        if n == 0:
            continue
        x = values[sel]
        mean[g] = x.mean()
        e = errors[sel]
        e = e[np.isfinite(e)]
        prop = math.sqrt(float(np.sum(e * e))) / e.size if e.size else math.nan
        if n >= 2:
            scatter = float(np.std(x, ddof=1)) / math.sqrt(n)
            err[g] = scatter if not np.isfinite(prop) else max(scatter, prop)
        else:
            err[g] = prop
    return mean, err, count


def _group_mean(values, groups, n_groups):
    out = np.full(n_groups, np.nan)
    for g in range(n_groups):
        x = values[(groups == g) & np.isfinite(values)]
        if x.size:
            out[g] = x.mean()
    return out


def _visible_part(total_err, fill_err):
    """The frame error without its fill part: ``sqrt(e^2 - e_fill^2)`` (the total where no fill part)."""
    f = np.where(np.isfinite(fill_err), fill_err, 0.0)
    return np.sqrt(np.maximum(total_err * total_err - f * f, 0.0))


def _group_mean_where(values, present, groups, n_groups):
    """Per group, the mean of ``values`` over the frames where ``present`` is finite (NaN if none)."""
    out = np.full(n_groups, np.nan)
    for g in range(n_groups):
        x = values[(groups == g) & np.isfinite(present) & np.isfinite(values)]
        if x.size:
            out[g] = x.mean()
    return out


def _with_fill(err, fill_err):
    """``sqrt(err^2 + fill^2)`` where there is a fill error, else the error as it is."""
    return np.where(np.isfinite(fill_err), np.hypot(np.where(np.isfinite(err), err, 0.0), fill_err), err)


def _season_rotations(t_years, mean, err, max_gap_years):
    """``"season"``: a pole's rotation means, the rotations it did not measure interpolated in time.

    Returns the values, the errors of the measured rotations (NaN where
    interpolated), the fill errors (0 where measured) and the flags of the
    interpolated rotations (:func:`pipeline.b0.fill_hidden_bins_with_error`
    on the one column of rotation means, their errors as the noise).
    """
    vals, ferr = fill_hidden_bins_with_error(t_years, mean[:, None], max_gap_years, value_errors=err[:, None])
    vals, ferr = vals[:, 0], ferr[:, 0]
    measured = np.isfinite(mean)
    interp = ~measured & np.isfinite(vals)
    return vals, np.where(measured, err, np.nan), np.where(np.isfinite(vals), ferr, np.nan), interp


def _var(data, dims, units, long_name):
    return xr.Variable(dims, data, attrs={"units": units, "long_name": long_name})


def _f(v):
    return math.nan if v is None else float(v)


def polar_series(records, settings: SeriesSettings | None = None) -> xr.Dataset:
    """North, south and dipole polar-field series per frame, per rotation and smoothed.

    Parameters
    ----------
    records : iterable of pipeline.measure.FrameRecord
        Any order; records whose status is not ``"ok"`` or that have no time
        are left out (counted in ``attrs["frames_left_out"]``).
    settings : SeriesSettings, optional

    Raises
    ------
    pipeline.b0.MixedRecordsError
        When the records used differ in cap latitude, or (``"profile"`` and
        ``"fill"``, which read the latitude profiles) in profile bin edges:
        a series is made from records measured one way.

    Returns
    -------
    xarray.Dataset
        See docs/interfaces: per frame (``time``) ``north_br_gauss``,
        ``south_br_gauss``, ``dipole_br_gauss``, their ``*_error_gauss``,
        ``north_coverage``, ``south_coverage``, ``b0_deg``; per rotation
        (``rotation``, coordinate ``rotation_time``) the ``*_br_rotation_gauss``
        means, ``*_br_rotation_error_gauss``, ``*_rotation_coverage``,
        ``frames_per_rotation`` and the smoothed ``*_br_smooth_gauss``.
        Gauss throughout; every variable has ``units`` and ``long_name``.

    Fill errors (``"fill"`` and ``"season"``): per frame
    ``north_br_fill_error_gauss``, ``south_br_fill_error_gauss``,
    ``dipole_br_fill_error_gauss`` (``"fill"`` only: the part of the frame's
    error that the filled hidden bins add, :func:`pipeline.b0.fill_estimates`;
    0 where nothing was filled, NaN for the other methods), and per rotation
    ``*_br_rotation_fill_error_gauss``: one-sigma errors of the rotation mean
    that are correlated in time (neighbouring rotations share the frames the
    fill came from), meant to be perturbed as one draw per block of
    rotations, not per rotation.

    Notes
    -----
    Axial dipole proxy ``D = (N - S) / 2`` (DESIGN.md), error
    ``sqrt(eN^2 + eS^2) / 2``.  A rotation's mean is the plain mean of its
    frames; its error is the larger of the scatter's standard error
    ``std / sqrt(n)`` and the propagated frame errors ``sqrt(sum e^2) / n``
    (a single frame keeps its own error), of the frames' visible-part
    errors, combined in quadrature with the rotation's fill error.  For
    ``"fill"`` the rotation's fill error is the mean of its frames' fill
    errors, not divided by ``sqrt(n)``: the fills of one rotation share the
    same neighbouring frames, so their errors are correlated.

    ``"season"`` measures north and south in different rotations.  Each
    pole's per-rotation value is its own rotation mean where it was measured,
    else the value interpolated linearly in time between the nearest
    rotations that measured it, at most ``fill_max_gap_years`` apart (or half
    that from the end of the data; else NaN), with the fill error of
    :func:`pipeline.b0.fill_hidden_bins_with_error` (the structure function of
    that pole's rotation means, their errors as the noise; 0 where measured;
    the flags ``*_rotation_interpolated`` mark the interpolated rotations).
    The per-rotation dipole ``(N - S) / 2`` then exists on every rotation
    where both poles have a value; the per-frame dipole of ``"season"`` stays
    NaN (no frame measures both poles).  The smoothed series are the smoother
    applied to these per-rotation values, and the smoothed dipole is
    ``(N_smooth - S_smooth) / 2`` (the smoothers are linear).
    """
    settings = settings or SeriesSettings()
    good, skipped = _good_records(records)
    common_cap_latitude(good)  # means over different caps are not one series
    if settings.b0_method in ("profile", "fill"):
        common_profile_edges(good)
    n = len(good)
    t = to_datetime64([r.time for r in good]) if n else np.array([], dtype="datetime64[ns]")
    if settings.b0_method in SERIES_METHODS:
        est = fill_estimates(good, np.atleast_1d(decimal_year(t)) if n else np.array([]), settings)
    else:
        est = [pole_estimates(r, settings) for r in good]
    north = np.array([e.north_br_gauss for e in est], dtype=float)
    south = np.array([e.south_br_gauss for e in est], dtype=float)
    north_err = np.array([e.north_br_error_gauss for e in est], dtype=float)
    south_err = np.array([e.south_br_error_gauss for e in est], dtype=float)
    north_fill = np.array([e.north_fill_error_gauss for e in est], dtype=float)
    south_fill = np.array([e.south_fill_error_gauss for e in est], dtype=float)
    dipole = 0.5 * (north - south)  # axial dipole proxy (N - S) / 2 (DESIGN.md)
    dipole_err = 0.5 * np.hypot(north_err, south_err)
    dipole_fill = 0.5 * np.hypot(north_fill, south_fill)  # the two hemispheres' fills use different bins
    north_cov = np.array([_f(r.north_coverage) for r in good])
    south_cov = np.array([_f(r.south_coverage) for r in good])
    b0 = np.array([_f(r.b0_deg) for r in good])

    cr = np.array([_f(r.carrington_rotation) for r in good])
    missing = ~np.isfinite(cr)
    if missing.any():
        cr[missing] = rotation_number(t[missing])
    if n:
        rot_lo, rot_hi = int(np.floor(cr.min())), int(np.floor(cr.max()))
        rotations = np.arange(rot_lo, rot_hi + 1)
    else:
        rotations = np.array([], dtype=np.int64)
    groups = (np.floor(cr).astype(np.int64) - (rotations[0] if n else 0)) if n else np.array([], dtype=np.int64)
    nrot = rotations.size
    rot_time = rotation_mid_time(rotations)
    # the rotation means' noise from the frames' visible-part errors; the fill part is added after,
    # not reduced by sqrt(n) (the fills of one rotation share their neighbouring frames)
    rn, rn_err, n_count = _rotation_mean(north, _visible_part(north_err, north_fill), groups, nrot)
    rs, rs_err, s_count = _rotation_mean(south, _visible_part(south_err, south_fill), groups, nrot)
    rn_fill = _group_mean_where(north_fill, north, groups, nrot)
    rs_fill = _group_mean_where(south_fill, south, groups, nrot)
    rn_interp = rs_interp = None
    ty = np.atleast_1d(decimal_year(rot_time)) if nrot else np.array([])
    if settings.b0_method == "season" and nrot:
        rn, rn_err, rn_fill, rn_interp = _season_rotations(ty, rn, rn_err, settings.fill_max_gap_years)
        rs, rs_err, rs_fill, rs_interp = _season_rotations(ty, rs, rs_err, settings.fill_max_gap_years)
    rn_err = _with_fill(rn_err, rn_fill)
    rs_err = _with_fill(rs_err, rs_fill)
    rd = 0.5 * (rn - rs)
    rd_err = 0.5 * np.hypot(rn_err, rs_err)
    rd_fill = 0.5 * np.hypot(rn_fill, rs_fill)
    frames = np.bincount(groups, minlength=nrot) if n else np.zeros(0, dtype=np.int64)
    rcov_n = _group_mean(north_cov, groups, nrot)
    rcov_s = _group_mean(south_cov, groups, nrot)

    smoother = settings.smoother
    sn = smooth(ty, rn, ty, smoother) if nrot else np.array([])
    ss = smooth(ty, rs, ty, smoother) if nrot else np.array([])
    sd = 0.5 * (sn - ss)

    G = "G"
    method = settings.b0_method
    data_vars = {
        "north_br_gauss": _var(north, ("time",), G, f"north polar-cap mean Br ({method})"),
        "south_br_gauss": _var(south, ("time",), G, f"south polar-cap mean Br ({method})"),
        "dipole_br_gauss": _var(dipole, ("time",), G, "axial dipole proxy (north - south)/2"),
        "north_br_error_gauss": _var(north_err, ("time",), G, "standard error of north_br_gauss"),
        "south_br_error_gauss": _var(south_err, ("time",), G, "standard error of south_br_gauss"),
        "dipole_br_error_gauss": _var(dipole_err, ("time",), G, "standard error of dipole_br_gauss"),
        "north_br_fill_error_gauss": _var(north_fill, ("time",), G, "part of north_br_error_gauss from the "
                                          "B0 fill of hidden bins (0 nothing filled, NaN other methods)"),
        "south_br_fill_error_gauss": _var(south_fill, ("time",), G, "part of south_br_error_gauss from the "
                                          "B0 fill of hidden bins (0 nothing filled, NaN other methods)"),
        "dipole_br_fill_error_gauss": _var(dipole_fill, ("time",), G, "part of dipole_br_error_gauss from the "
                                           "B0 fill of hidden bins (0 nothing filled, NaN other methods)"),
        "north_coverage": _var(north_cov, ("time",), "1", "measured fraction of the north cap area"),
        "south_coverage": _var(south_cov, ("time",), "1", "measured fraction of the south cap area"),
        "b0_deg": _var(b0, ("time",), "deg", "heliographic latitude of the observer (B0)"),
        "north_br_rotation_gauss": _var(rn, ("rotation",), G, "north cap mean Br per Carrington rotation"),
        "south_br_rotation_gauss": _var(rs, ("rotation",), G, "south cap mean Br per Carrington rotation"),
        "dipole_br_rotation_gauss": _var(rd, ("rotation",), G, "axial dipole proxy per Carrington rotation"),
        "north_br_rotation_error_gauss": _var(rn_err, ("rotation",), G, "standard error of north rotation mean"),
        "south_br_rotation_error_gauss": _var(rs_err, ("rotation",), G, "standard error of south rotation mean"),
        "dipole_br_rotation_error_gauss": _var(rd_err, ("rotation",), G, "standard error of dipole rotation mean"),
        "north_br_rotation_fill_error_gauss": _var(
            rn_fill, ("rotation",), G, "one-sigma fill error of the north rotation mean, correlated between "
                                       "neighbouring rotations (included in north_br_rotation_error_gauss)"),
        "south_br_rotation_fill_error_gauss": _var(
            rs_fill, ("rotation",), G, "one-sigma fill error of the south rotation mean, correlated between "
                                       "neighbouring rotations (included in south_br_rotation_error_gauss)"),
        "dipole_br_rotation_fill_error_gauss": _var(
            rd_fill, ("rotation",), G, "one-sigma fill error of the dipole rotation mean, correlated between "
                                       "neighbouring rotations (included in dipole_br_rotation_error_gauss)"),
        "north_rotation_coverage": _var(rcov_n, ("rotation",), "1", "mean north cap coverage per rotation"),
        "south_rotation_coverage": _var(rcov_s, ("rotation",), "1", "mean south cap coverage per rotation"),
        "frames_per_rotation": _var(frames.astype(np.int64), ("rotation",), "1", "frames in the rotation"),
        "north_br_smooth_gauss": _var(sn, ("rotation",), G, f"smoothed north cap mean Br ({smoother.describe()})"),
        "south_br_smooth_gauss": _var(ss, ("rotation",), G, f"smoothed south cap mean Br ({smoother.describe()})"),
        "dipole_br_smooth_gauss": _var(sd, ("rotation",), G, f"smoothed axial dipole proxy ({smoother.describe()})"),
    }
    coords = {
        "time": xr.Variable(("time",), t, attrs={"long_name": "observation time (UTC)"}),
        "rotation": xr.Variable(("rotation",), rotations.astype(np.int64),
                                attrs={"units": "1", "long_name": "Carrington rotation number"}),
        "rotation_time": xr.Variable(("rotation",), rot_time,
                                     attrs={"long_name": "mid-time of the Carrington rotation (UTC)"}),
    }
    attrs = {
        "title": "polecast PolarSeries",
        "b0_method": method,
        "smoothing": smoother.method,
        "smoothing_width": float(smoother.width),
        "smoothing_width_unit": smoother.width_unit,
        "smoothing_description": smoother.describe(),
        "max_gap_years": float(smoother.max_gap_years),
        "frames_used": n,
        "frames_left_out": skipped,
    }
    if method == "profile":
        attrs["profile_exponent"] = "fitted" if settings.profile_fit_exponent else float(settings.profile_exponent)
        attrs["profile_reference"] = "Svalgaard, Duvall & Scherrer 1978, Solar Physics 58, 225"
    if method == "fill":
        attrs["fill_max_gap_years"] = float(settings.fill_max_gap_years)
    if method == "season":
        attrs["season_threshold_deg"] = float(settings.season_threshold_deg)
        attrs["fill_max_gap_years"] = float(settings.fill_max_gap_years)
        for pole, flag in (("north", rn_interp), ("south", rs_interp)):
            data_vars[f"{pole}_rotation_interpolated"] = _var(
                (flag if flag is not None else np.zeros(nrot, bool)).astype(np.int8), ("rotation",), "1",
                f"1 where the {pole} rotation value is interpolated in time from the {pole} pole's seasons")
    return xr.Dataset(data_vars, coords=coords, attrs=attrs)


def latitude_time_diagram(records, settings: SeriesSettings | None = None) -> xr.DataArray:
    """Longitude-averaged Br per latitude bin and Carrington rotation.

    Parameters
    ----------
    records : iterable of pipeline.measure.FrameRecord
        With latitude profiles; records that are not ``"ok"``, have no
        profile or a profile whose value count does not match its edges are
        left out (counted in ``attrs["frames_left_out"]``).
    settings : SeriesSettings, optional
        Not used yet beyond validation (kept for a uniform signature).

    Raises
    ------
    pipeline.b0.MixedRecordsError
        When two records' profile bin edges differ (naming both).

    Returns
    -------
    xarray.DataArray
        Gauss, dims ``("latitude", "rotation")``; coordinates ``latitude``
        (bin centres, deg), ``latitude_lower``/``latitude_upper`` (edges, deg),
        ``rotation`` and ``rotation_time``.  NaN where no pixel was measured.

    Notes
    -----
    ``B(bin, rot) = sum_frames sum(A Br) / sum_frames sum(A)`` over the
    frames of the rotation: each frame contributes its bin mean weighted by
    its measured area ``A`` in the bin, i.e. the area-weighted mean over all
    pixels of the rotation.
    """
    _ = settings or SeriesSettings()
    good, skipped = _good_records(records)
    edges = common_profile_edges(good)
    used = []
    for r in good:
        e = np.asarray(r.profile_edges_deg, dtype=float)
        if e.size < 2 or len(r.profile_br_gauss) != e.size - 1 or len(r.profile_area_m2) != e.size - 1:
            skipped += 1
            continue
        used.append(r)
    if edges is None:
        edges = np.array([0.0, 1.0])
    nb = edges.size - 1
    if used:
        t = to_datetime64([r.time for r in used])
        cr = np.array([_f(r.carrington_rotation) for r in used])
        miss = ~np.isfinite(cr)
        if miss.any():
            cr[miss] = rotation_number(t[miss])
        rot = np.floor(cr).astype(np.int64)
        rotations = np.arange(rot.min(), rot.max() + 1)
    else:
        rot = np.zeros(0, dtype=np.int64)
        rotations = np.zeros(0, dtype=np.int64)
    wb = np.zeros((nb, rotations.size))
    w = np.zeros((nb, rotations.size))
    for r, k in zip(used, rot - (rotations[0] if rotations.size else 0)):
        br = np.array([np.nan if v is None else float(v) for v in r.profile_br_gauss])
        a = np.array([0.0 if v is None else float(v) for v in r.profile_area_m2])
        ok = np.isfinite(br) & (a > 0)
        wb[ok, k] += a[ok] * br[ok]
        w[ok, k] += a[ok]
    with np.errstate(invalid="ignore", divide="ignore"):
        val = np.where(w > 0, wb / np.where(w > 0, w, 1.0), np.nan)
    centres = 0.5 * (edges[:-1] + edges[1:])
    return xr.DataArray(
        val, dims=("latitude", "rotation"),
        coords={"latitude": ("latitude", centres, {"units": "deg", "long_name": "latitude bin centre"}),
                "latitude_lower": ("latitude", edges[:-1], {"units": "deg"}),
                "latitude_upper": ("latitude", edges[1:], {"units": "deg"}),
                "rotation": ("rotation", rotations, {"units": "1", "long_name": "Carrington rotation number"}),
                "rotation_time": ("rotation", rotation_mid_time(rotations),
                                  {"long_name": "mid-time of the Carrington rotation (UTC)"})},
        name="br_gauss",
        attrs={"units": "G", "long_name": "longitude-averaged radial field", "frames_used": len(used),
               "frames_left_out": skipped})


def _filled_diagram_parts(diagram, max_gap_years, min_abs_latitude_deg, min_seen_fraction):
    """Filled values, their fill errors (0 measured, NaN unfilled or outside the filled range), resolved."""
    vals = np.array(diagram.values, dtype=float)
    errs = np.where(np.isfinite(vals), 0.0, np.nan)
    seen = np.isfinite(vals).mean(axis=1)
    resolved = seen >= min_seen_fraction
    vals[~resolved] = np.nan
    errs[~resolved] = np.nan
    t = np.atleast_1d(decimal_year(diagram["rotation_time"].values))
    lo = diagram["latitude_lower"].values
    hi = diagram["latitude_upper"].values
    for sel in (np.flatnonzero(lo >= min_abs_latitude_deg - 1e-9),
                np.flatnonzero(hi <= -min_abs_latitude_deg + 1e-9)[::-1]):
        if sel.size:
            v, e = fill_hidden_bins_with_error(t, vals[sel].T, max_gap_years)
            vals[sel], errs[sel] = v.T, e.T
    return vals, errs, resolved


def filled_diagram(diagram: xr.DataArray, max_gap_years: float = 1.5, min_abs_latitude_deg: float = 50.0,
                   min_seen_fraction: float = 0.15):
    """The latitude-time diagram with hidden high-latitude bins filled as the ``"fill"`` B0 method does.

    Bins with ``|lat| >= min_abs_latitude_deg`` of each hemisphere are filled
    per rotation by :func:`pipeline.b0.fill_hidden_bins` (latitude holes, then
    time within ``max_gap_years``, then toward the pole); other bins are kept
    as measured.  Use it for band cap means consistent with the default polar
    series; show the measured diagram itself.  :func:`filled_diagram_error`
    gives the filled bins' one-sigma errors.

    A bin measured in fewer than ``min_seen_fraction`` of the rotations is
    beyond the images' resolution (a few pixels near the pole): its own values
    are not used, it is filled from the resolved bins below it, and the
    coordinate ``resolved`` marks it False so that :func:`band_cap_means`
    gives no mean for a band made mostly of such bins.

    Returns
    -------
    xarray.DataArray
        Same shape and coordinates plus ``resolved`` (latitude), ``attrs["filled"] = True``.
    """
    if diagram.values.size == 0:
        return diagram.copy()
    vals, _, resolved = _filled_diagram_parts(diagram, max_gap_years, min_abs_latitude_deg, min_seen_fraction)
    out = diagram.copy(data=vals).assign_coords(resolved=("latitude", resolved))
    out.attrs = dict(diagram.attrs, filled=True, fill_max_gap_years=float(max_gap_years),
                     min_seen_fraction=float(min_seen_fraction))
    return out


def filled_diagram_error(diagram: xr.DataArray, max_gap_years: float = 1.5, min_abs_latitude_deg: float = 50.0,
                         min_seen_fraction: float = 0.15):
    """One-sigma fill error of every bin of :func:`filled_diagram` (same arguments), gauss.

    Returns
    -------
    xarray.DataArray
        Same shape and coordinates as the diagram plus ``resolved``; 0 where the
        bin was measured (and resolved), the error of
        :func:`pipeline.b0.fill_hidden_bins_with_error` where it was filled, NaN
        where :func:`filled_diagram` has no value.  Feed it to
        :func:`band_cap_fill_errors`.  The errors of neighbouring rotations are
        correlated (they share the rotations the fill came from).
    """
    if diagram.values.size == 0:
        return diagram.copy()
    _, errs, resolved = _filled_diagram_parts(diagram, max_gap_years, min_abs_latitude_deg, min_seen_fraction)
    out = diagram.copy(data=errs).assign_coords(resolved=("latitude", resolved))
    out.name = "br_fill_error_gauss"
    out.attrs = dict(diagram.attrs, units="G", long_name="one-sigma fill error of the longitude-averaged radial field",
                     filled=True, fill_max_gap_years=float(max_gap_years), min_seen_fraction=float(min_seen_fraction))
    return out


def _band_average(diagram: xr.DataArray, boundaries_deg, min_coverage: float, what: str) -> dict:
    """Zone-area-weighted means over the bins with data of each band (see :func:`band_cap_means`)."""
    check_number("min_coverage", min_coverage, lo=0.0, hi=1.0)
    lo = diagram["latitude_lower"].values
    hi = diagram["latitude_upper"].values
    zone = np.abs(np.sin(np.radians(hi)) - np.sin(np.radians(lo)))
    vals = diagram.values
    resolved = diagram["resolved"].values if "resolved" in diagram.coords else np.ones(lo.size, dtype=bool)
    out = {"north": {}, "south": {}}
    for L in boundaries_deg:
        for pole, sel in (("north", lo >= L - 1e-9), ("south", hi <= -L + 1e-9)):
            v = vals[sel]
            a = zone[sel][:, None] * np.isfinite(v)
            total = zone[sel].sum()
            num = np.nansum(np.where(np.isfinite(v), v, 0.0) * a, axis=0)
            den = a.sum(axis=0)
            with np.errstate(invalid="ignore", divide="ignore"):
                m = np.where((den > 0) & (den >= min_coverage * total), num / np.where(den > 0, den, 1.0), np.nan)
            if zone[sel][resolved[sel]].sum() < min_coverage * total:  # a band beyond the resolution
                m = np.full_like(m, np.nan)
            out[pole][float(L)] = xr.DataArray(
                m, dims=("rotation",), coords={"rotation": diagram["rotation"],
                                               "rotation_time": diagram["rotation_time"]},
                attrs={"units": "G", "long_name": f"{pole} cap {what} above |lat| {L:g} deg"})
    return out


def band_cap_fill_errors(error_diagram: xr.DataArray, boundaries_deg=BAND_BOUNDARIES_DEG,
                         min_coverage: float = 0.2) -> dict:
    """One-sigma fill error of each band's cap mean, per rotation, from :func:`filled_diagram_error`.

    Parameters
    ----------
    error_diagram : xarray.DataArray
        From :func:`filled_diagram_error` (same arguments as the
        :func:`filled_diagram` the means come from).
    boundaries_deg, min_coverage
        As :func:`band_cap_means`, which gives the means these errors belong to.

    Returns
    -------
    dict
        ``{"north": {L: DataArray(rotation)}, "south": {...}}`` in gauss, the
        shape of :func:`band_cap_means`; NaN exactly where it is NaN, 0 where no
        bin of the band was filled.

    Notes
    -----
    ``e_L = sum_b e_b dA_b / sum_b dA_b`` over the bins with a value: the
    bins' fill errors taken as fully correlated within a rotation (they share
    their neighbouring rotations), which is conservative.  The errors of
    neighbouring rotations are correlated too.
    """
    return _band_average(error_diagram, boundaries_deg, min_coverage, "mean Br fill error")


def band_cap_means(diagram: xr.DataArray, boundaries_deg=BAND_BOUNDARIES_DEG,
                   min_coverage: float = 0.2) -> dict:
    """Whole-cap mean Br above each band boundary, per rotation, from the diagram.

    Parameters
    ----------
    diagram : xarray.DataArray
        From :func:`latitude_time_diagram`.
    boundaries_deg : sequence of float
        Cap boundaries ``L`` (|latitude|, degrees).
    min_coverage : float
        A rotation's cap mean is NaN when the bins with data cover less than
        this fraction of the cap's area on the sphere (default 0.2: small
        images leave many 1-deg bins near the limb without a pixel, and the far
        pole's highest bands are hidden half the year; on 96-px closed-loop
        frames 0.5 left the 70-85 deg bands with too few rotations to place a
        reversal).

    Returns
    -------
    dict
        ``{"north": {L: DataArray(rotation)}, "south": {...}}`` in gauss.

    Notes
    -----
    ``<Br>_L = sum_b B_b dA_b / sum_b dA_b`` over bins with data inside
    ``|lat| >= L``, with the sphere area of a bin
    ``dA_b = 2 pi R^2 |sin(hi) - sin(lo)|`` (the zone area, Archimedes'
    hat-box theorem).  On a :func:`filled_diagram`, a band whose resolved bins
    cover less than ``min_coverage`` of its area has no mean.
    """
    return _band_average(diagram, boundaries_deg, min_coverage, "mean Br")
