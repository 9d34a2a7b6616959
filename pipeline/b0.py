"""The annual B0-angle effect on polar-cap means: three named methods.

The Sun's rotation axis is tilted by about 7.25 deg to the ecliptic, so the
observer's heliographic latitude B0 swings through +-7.25 deg each year and
each pole is seen better for half of it.  The visible part of a cap is then a
biased sample of the whole cap: the far pole's highest latitudes are hidden
behind the limb and its lower latitudes dominate the mean.

Methods (per frame and per pole):

``"visible"``
    The plain visible-part mean (the record's own cap means).
``"season"``
    Keep a pole only in the season it is tilted toward the observer:
    north when ``B0 > threshold``, south when ``B0 < -threshold``; the rest
    is NaN and the per-rotation and smoothed series bridge the half-year
    gaps.
``"profile"``
    Fit ``Br(lat) = B_pole sin^n |lat|`` (Svalgaard, Duvall & Scherrer 1978,
    Solar Physics 58, 225) to the record's latitude profile over
    ``|lat| >= fit_min_latitude_deg`` (area-weighted least squares), and
    return the whole-cap mean over ``|lat| >= L``:

    ``<Br>_cap = B_pole * [integral_L^90 sin^n(lat) cos(lat) dlat] / [integral_L^90 cos(lat) dlat]
               = B_pole * (1 - sin^(n+1) L) / ((n + 1) (1 - sin L))``.

    The exponent ``n`` is fixed (default 8, the value Svalgaard et al. 1978
    found, from memory) or fitted per frame.
``"fill"``
    Whole-cap mean from the latitude profiles, the bins a frame cannot see
    filled in time from the frames that saw them.  First, bins a frame left
    empty between bins it measured (pixel sampling) are interpolated in
    latitude; then each latitude bin of the
    cap is a time series observed when B0 tilts its pole toward the observer;
    a frame's unobserved bins take the value interpolated linearly in time
    between the nearest frames that saw them (within ``fill_max_gap_years``),
    bins still empty next to the pole (never seen at the image's resolution)
    take the value of the highest filled bin; and the cap mean is the
    sphere-area-weighted mean over all bins,
    ``<Br> = sum_b B_b (sin u_b - sin l_b) / (1 - sin L)``.  It assumes only
    that the field at a given latitude changes smoothly over the half-year
    its bin is hidden, not a shape in latitude, so it follows a reversal
    that proceeds poleward (where a fitted shape lags or leads).  It needs
    the whole series (:func:`fill_estimates`), not one frame.

Records of one series must share their cap latitude and profile bin edges:
:func:`common_cap_latitude` and :func:`common_profile_edges` refuse a mix
with :class:`MixedRecordsError` (naming both records and values) rather than
take the first record's settings for all or refill one binning from another.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["B0_METHODS", "SERIES_METHODS", "PoleEstimate", "MixedRecordsError", "pole_estimates", "fill_estimates",
           "fill_hidden_bins", "common_cap_latitude", "common_profile_edges", "cap_mean_factor",
           "bin_mean_sin_power", "fit_sin_power_profile"]


class MixedRecordsError(ValueError):
    """Records of one series that were measured differently (cap latitude, profile bin edges).

    The message names the two records and their values, and the fix: make a
    series from records measured with one configuration (or re-measure).
    """


def _same_cap(a, b) -> bool:
    if a is None or b is None:
        return a is None and b is None
    return math.isclose(float(a), float(b), rel_tol=0.0, abs_tol=1e-9)


def _cap_text(cap) -> str:
    return "none stated" if cap is None else f"{float(cap):g} deg"


def common_cap_latitude(records):
    """The cap latitude (deg) all records state, or None when they state none (or there are none).

    Raises
    ------
    MixedRecordsError
        When two records differ (a record that states none differs from one
        that states a value), naming both records and values.
    """
    first = None
    for r in records:
        if first is None:
            first = r
        elif not _same_cap(first.cap_latitude_deg, r.cap_latitude_deg):
            raise MixedRecordsError(
                f"records: cap_latitude_deg differs within one series ({_cap_text(first.cap_latitude_deg)} in "
                f"{first.file!r}, {_cap_text(r.cap_latitude_deg)} in {r.file!r}); make a series from records "
                f"measured with one cap latitude (re-measure with ingest --remeasure)")
    return None if first is None or first.cap_latitude_deg is None else float(first.cap_latitude_deg)


def _describe_edges(e: np.ndarray) -> str:
    return f"{e.size} edges {e[0]:g}..{e[-1]:g} deg"


def common_profile_edges(records):
    """The latitude-profile bin edges (deg) shared by every record that has a profile, or None.

    Records without a profile (no edges) are passed over; see the callers
    for what they do with them.

    Raises
    ------
    MixedRecordsError
        When two records' edges differ, naming both records, their edges and
        the first bin edge that differs.
    """
    edges, owner = None, None
    for r in records:
        e = np.asarray(r.profile_edges_deg or (), dtype=float)
        if e.size < 2:
            continue
        if edges is None:
            edges, owner = e, r
            continue
        if e.shape != edges.shape or not np.allclose(e, edges, rtol=0.0, atol=1e-9):
            if e.shape == edges.shape:
                k = int(np.flatnonzero(~np.isclose(e, edges, rtol=0.0, atol=1e-9))[0])
                where = f"; edge {k} is {edges[k]:g} deg in one, {e[k]:g} deg in the other"
            else:
                where = ""
            raise MixedRecordsError(
                f"records: latitude-profile bin edges differ within one series ({_describe_edges(edges)} in "
                f"{owner.file!r}, {_describe_edges(e)} in {r.file!r}{where}); make a series from records "
                f"measured with one profile binning (re-measure with ingest --remeasure)")
    return edges


@dataclass(frozen=True)
class PoleEstimate:
    """One frame's estimate for both poles (gauss; NaN where not available)."""

    north_br_gauss: float
    south_br_gauss: float
    north_br_error_gauss: float
    south_br_error_gauss: float
    north_exponent: float = math.nan
    south_exponent: float = math.nan


def _nan_if_none(v) -> float:
    return math.nan if v is None else float(v)


def cap_mean_factor(exponent: float, cap_latitude_deg: float) -> float:
    """Whole-cap mean of ``sin^n(lat)`` over ``lat >= L`` on the sphere (dimensionless).

    Notes
    -----
    ``(1 - sin^(n+1) L) / ((n + 1)(1 - sin L))``: the area-weighted
    (``cos lat``) mean of the Svalgaard, Duvall & Scherrer (1978, Solar
    Physics 58, 225) profile ``sin^n lat`` over the cap.
    """
    s = math.sin(math.radians(cap_latitude_deg))
    return (1.0 - s ** (exponent + 1.0)) / ((exponent + 1.0) * (1.0 - s))


def bin_mean_sin_power(lo_abs_deg: np.ndarray, hi_abs_deg: np.ndarray, exponent: float) -> np.ndarray:
    """Area-weighted mean of ``sin^n |lat|`` over latitude bins ``[lo, hi]`` (|lat|, degrees).

    Notes
    -----
    ``(sin^(n+1) hi - sin^(n+1) lo) / ((n + 1)(sin hi - sin lo))``, the exact
    bin average of the Svalgaard, Duvall & Scherrer (1978) profile.
    """
    s1 = np.sin(np.radians(lo_abs_deg))
    s2 = np.sin(np.radians(hi_abs_deg))
    return (s2 ** (exponent + 1.0) - s1 ** (exponent + 1.0)) / ((exponent + 1.0) * (s2 - s1))


def _wls_amplitude(y, m, w):
    """Weighted least-squares ``y = B m``: B, its standard error, weighted SSR."""
    swmm = float(np.sum(w * m * m))
    b = float(np.sum(w * y * m)) / swmm
    r = y - b * m
    ssr = float(np.sum(w * r * r))
    dof = y.size - 1
    if dof > 0:
        # residual variance per unit weight, scaled to the amplitude (standard WLS)
        se = math.sqrt(ssr / dof / swmm)
    else:
        se = math.nan
    return b, se, ssr


def fit_sin_power_profile(lo_abs_deg, hi_abs_deg, br_gauss, area_m2, *, exponent: float = 8.0,
                          fit_exponent: bool = False, exponent_bounds=(1.0, 20.0)):
    """Fit ``Br = B_pole sin^n |lat|`` to binned, area-weighted profile values.

    Parameters
    ----------
    lo_abs_deg, hi_abs_deg : ndarray
        Bin bounds in |latitude|, degrees.
    br_gauss : ndarray
        Mean Br per bin, gauss.
    area_m2 : ndarray
        Measured area per bin (the weights), m^2.
    exponent : float
        ``n`` when not fitted (dimensionless).
    fit_exponent : bool
        Fit ``n`` too (bounded scalar minimisation of the weighted SSR with
        ``B_pole`` profiled out).
    exponent_bounds : tuple of float
        Bounds for the fitted ``n``.

    Returns
    -------
    b_pole_gauss, b_pole_error_gauss, exponent : float

    Notes
    -----
    Weighted least squares with weights = measured area (bin noise variance
    falls as 1/area); model values are exact bin means
    (:func:`bin_mean_sin_power`).  Profile after Svalgaard, Duvall &
    Scherrer (1978, Solar Physics 58, 225).
    """
    lo = np.asarray(lo_abs_deg, float)
    hi = np.asarray(hi_abs_deg, float)
    y = np.asarray(br_gauss, float)
    w = np.asarray(area_m2, float)
    w = w / w.max()
    if not fit_exponent:
        b, se, _ = _wls_amplitude(y, bin_mean_sin_power(lo, hi, exponent), w)
        return b, se, float(exponent)
    from scipy.optimize import minimize_scalar

    def ssr(n):
        return _wls_amplitude(y, bin_mean_sin_power(lo, hi, n), w)[2]

    res = minimize_scalar(ssr, bounds=exponent_bounds, method="bounded", options={"xatol": 1e-3})
    n = float(res.x)
    b, se, _ = _wls_amplitude(y, bin_mean_sin_power(lo, hi, n), w)
    return b, se, n


def _visible(record, settings) -> PoleEstimate:
    return PoleEstimate(_nan_if_none(record.north_br_gauss), _nan_if_none(record.south_br_gauss),
                        _nan_if_none(record.north_br_error_gauss), _nan_if_none(record.south_br_error_gauss))


def _season(record, settings) -> PoleEstimate:
    v = _visible(record, settings)
    b0 = _nan_if_none(record.b0_deg)
    thr = settings.season_threshold_deg
    north_ok = b0 > thr  # north pole tilted toward the observer
    south_ok = b0 < -thr
    nan = math.nan
    return PoleEstimate(v.north_br_gauss if north_ok else nan, v.south_br_gauss if south_ok else nan,
                        v.north_br_error_gauss if north_ok else nan, v.south_br_error_gauss if south_ok else nan)


def _profile_hemisphere(edges, br, area, sign, settings, cap_deg):
    lo_e, hi_e = edges[:-1], edges[1:]
    if sign > 0:
        sel = lo_e >= settings.fit_min_latitude_deg - 1e-9
        lo_abs, hi_abs = lo_e[sel], hi_e[sel]
    else:
        sel = hi_e <= -settings.fit_min_latitude_deg + 1e-9
        lo_abs, hi_abs = -hi_e[sel], -lo_e[sel]
    y, w = br[sel], area[sel]
    good = np.isfinite(y) & np.isfinite(w) & (w > 0)
    if good.sum() < settings.profile_min_bins:
        return math.nan, math.nan, math.nan
    b, se, n = fit_sin_power_profile(lo_abs[good], hi_abs[good], y[good], w[good],
                                     exponent=settings.profile_exponent,
                                     fit_exponent=settings.profile_fit_exponent)
    # whole-cap mean of B_pole sin^n over |lat| >= cap (Svalgaard, Duvall & Scherrer 1978)
    f = cap_mean_factor(n, cap_deg)
    return b * f, se * f, n


def _profile(record, settings) -> PoleEstimate:
    edges = np.asarray(record.profile_edges_deg, dtype=float)
    nan = math.nan
    if edges.size < 2 or len(record.profile_br_gauss) != edges.size - 1:
        return PoleEstimate(nan, nan, nan, nan)
    br = np.array([nan if v is None else float(v) for v in record.profile_br_gauss])
    area = np.array([nan if v is None else float(v) for v in record.profile_area_m2], dtype=float)
    if area.size != br.size:
        return PoleEstimate(nan, nan, nan, nan)
    cap = settings.cap_latitude_deg if settings.cap_latitude_deg is not None else record.cap_latitude_deg
    if cap is None:
        raise ValueError(f"record {record.file!r}: cap_latitude_deg is not stated, so the whole-cap mean has no "
                         f"boundary; set series.cap_latitude_deg")
    cap = float(cap)
    bn, en, nn = _profile_hemisphere(edges, br, area, +1, settings, cap)
    bs, es, ns = _profile_hemisphere(edges, br, area, -1, settings, cap)
    return PoleEstimate(bn, bs, en, es, nn, ns)


_METHODS = {"visible": _visible, "season": _season, "profile": _profile}

#: Methods that need the whole series rather than one frame.
SERIES_METHODS = ("fill",)

#: Valid names of ``series.b0_method``.
B0_METHODS = tuple(sorted(set(_METHODS) | set(SERIES_METHODS)))


def pole_estimates(record, settings) -> PoleEstimate:
    """Both poles' cap means of one record by the named B0 method.

    Parameters
    ----------
    record : pipeline.measure.FrameRecord
    settings : pipeline.aggregator.SeriesSettings
        Uses ``b0_method``, ``season_threshold_deg``, ``profile_exponent``,
        ``profile_fit_exponent``, ``fit_min_latitude_deg``,
        ``profile_min_bins`` and ``cap_latitude_deg``.

    Returns
    -------
    PoleEstimate
        Gauss; NaN where the method gives no value for a pole.

    Raises
    ------
    ValueError
        For an unknown method name (lists the valid ones), and for
        ``"profile"`` when neither the settings nor the record state a cap
        latitude.
    """
    if settings.b0_method in SERIES_METHODS:
        raise ValueError(f"b0_method {settings.b0_method!r} needs the whole series: use fill_estimates")
    try:
        fn = _METHODS[settings.b0_method]
    except KeyError:
        raise ValueError(f"b0_method: got {settings.b0_method!r}; valid methods are "
                         f"{', '.join(map(repr, B0_METHODS))}") from None
    return fn(record, settings)


def _profile_arrays(records):
    """Common bin edges, (frames x bins) arrays of bin means and areas, and which frames have a profile.

    None when no record has a profile.  Refuses differing edges
    (:func:`common_profile_edges`) and a profile whose value count does not
    match its edges.
    """
    edges = common_profile_edges(records)
    if edges is None:
        return None
    nb = edges.size - 1
    br = np.full((len(records), nb), np.nan)
    area = np.zeros((len(records), nb))
    has = np.zeros(len(records), dtype=bool)
    for k, r in enumerate(records):
        if len(r.profile_edges_deg or ()) < 2:
            continue  # no profile: nothing measured in latitude
        if len(r.profile_br_gauss) != nb or len(r.profile_area_m2) != nb:
            raise ValueError(f"record {r.file!r}: the latitude profile has {len(r.profile_br_gauss)} values and "
                             f"{len(r.profile_area_m2)} areas for {nb} bins; re-measure the file")
        br[k] = [math.nan if v is None else float(v) for v in r.profile_br_gauss]
        area[k] = [0.0 if v is None else float(v) for v in r.profile_area_m2]
        has[k] = True
    br[~(area > 0)] = np.nan
    return edges, br, area, has


def _fill_bins(t_years, values, max_gap_years):
    """Fill NaN entries of each column by linear interpolation in time between observed rows.

    An entry is filled only when observed rows lie within ``max_gap_years``
    on both sides (or on one side within half of it, at the ends of the data).
    """
    out = values.copy()
    for b in range(values.shape[1]):
        col = values[:, b]
        seen = np.isfinite(col)
        if seen.sum() == 0:
            continue
        ts, vs = t_years[seen], col[seen]
        miss = ~seen
        tm = t_years[miss]
        j = np.searchsorted(ts, tm)
        prev_gap = np.where(j > 0, tm - ts[np.maximum(j - 1, 0)], np.inf)
        next_gap = np.where(j < ts.size, ts[np.minimum(j, ts.size - 1)] - tm, np.inf)
        inner = (prev_gap + next_gap) <= max_gap_years
        edge = (np.minimum(prev_gap, next_gap) <= 0.5 * max_gap_years) & ~np.isfinite(prev_gap + next_gap)
        ok = inner | edge
        filled = np.interp(tm, ts, vs)  # constant beyond the ends
        col_out = out[:, b]
        idx = np.flatnonzero(miss)
        col_out[idx[ok]] = filled[ok]
    return out


def _fill_latitude_interior(values):
    """Per row, interpolate NaN bins lying between measured bins (columns ordered in latitude)."""
    out = values.copy()
    x = np.arange(values.shape[1])
    for k in range(values.shape[0]):
        seen = np.isfinite(values[k])
        if seen.sum() < 2:
            continue
        first, last = np.flatnonzero(seen)[[0, -1]]
        hole = ~seen & (x > first) & (x < last)
        if hole.any():
            out[k, hole] = np.interp(x[hole], x[seen], values[k, seen])
    return out


def _extend_poleward(values):
    """Per row, NaN bins beyond the last filled bin (the pole side) take its value."""
    out = values.copy()
    for k in range(values.shape[0]):
        seen = np.flatnonzero(np.isfinite(values[k]))
        if seen.size:
            out[k, seen[-1] + 1:] = values[k, seen[-1]]
    return out


def fill_hidden_bins(t_years, values, max_gap_years):
    """The ``"fill"`` steps on one hemisphere's bins: latitude holes, then time, then to the pole.

    Parameters
    ----------
    t_years : ndarray, shape (n,)
        Times of the rows, decimal years, increasing.
    values : ndarray, shape (n, m)
        Bin means (gauss, NaN where not measured), columns ordered from the cap
        boundary toward the pole.
    max_gap_years : float
        Longest time gap bridged (see :func:`_fill_bins`).

    Returns
    -------
    ndarray
        The filled values (NaN only where nothing within the limits saw a bin).
    """
    vals = _fill_latitude_interior(np.asarray(values, dtype=float))
    return _extend_poleward(_fill_bins(np.asarray(t_years, dtype=float), vals, max_gap_years))


def fill_estimates(records, t_years, settings) -> list:
    """Both poles' whole-cap means for every record by the ``"fill"`` method.

    Parameters
    ----------
    records : list of pipeline.measure.FrameRecord
        In time order, with latitude profiles that reach the cap boundary.
    t_years : ndarray
        Their times, decimal years.
    settings : pipeline.aggregator.SeriesSettings
        Uses ``cap_latitude_deg`` (None: the records' common one) and
        ``fill_max_gap_years``.

    Returns
    -------
    list of PoleEstimate
        Gauss; NaN for a pole whose cap has a bin that neither the frame nor
        any frame within the gap limit saw, and for both poles of a record
        without a latitude profile (nothing is filled in for a frame that
        measured no bin).  The error is the record's visible-part standard
        error (the filled bins add no scatter term).

    Raises
    ------
    MixedRecordsError
        When the records differ in cap latitude or in profile bin edges
        (never homogenised: one would be refilled on the other's bins).
    ValueError
        When no cap latitude is known (neither the settings nor the records
        state one), or a profile's value count does not match its edges.
    pipeline.config.ConfigError
        When the profiles do not cover the cap (``measure.profile_min_latitude_deg``
        above the cap latitude), naming the fix.

    Notes
    -----
    Sphere area of the band between latitudes l and u: ``2 pi R^2 (sin u - sin l)``
    (handbook geometry); the cap above L has ``2 pi R^2 (1 - sin L)``.
    """
    n = len(records)
    nan_est = [PoleEstimate(math.nan, math.nan, math.nan, math.nan) for _ in range(n)]
    record_cap = common_cap_latitude(records)  # the errors below are the records' own, over their cap
    arrays = _profile_arrays(records)
    if arrays is None or n == 0:
        return nan_est
    edges, br, _area, has_profile = arrays
    cap = settings.cap_latitude_deg if settings.cap_latitude_deg is not None else record_cap
    if cap is None:
        raise ValueError("records: none states its cap_latitude_deg, so the whole-cap mean has no boundary; "
                         "set series.cap_latitude_deg")
    lo, hi = edges[:-1], edges[1:]
    ty = np.asarray(t_years, dtype=float)
    out = []
    poles = {}
    for sign, name in ((+1, "north"), (-1, "south")):
        idx = np.flatnonzero((lo >= cap - 1e-9) if sign > 0 else (hi <= -cap + 1e-9))
        if sign < 0:
            idx = idx[::-1]  # columns from the cap boundary to the pole
        a_lo, a_hi = (lo[idx], hi[idx]) if sign > 0 else (-hi[idx], -lo[idx])
        band = np.sin(np.deg2rad(a_hi)) - np.sin(np.deg2rad(a_lo))
        complete = idx.size and abs(band.sum() - (1.0 - math.sin(math.radians(cap)))) < 1e-6
        if not complete:  # the profiles do not cover the whole cap
            from pipeline.config import ConfigError

            raise ConfigError(
                f"series.b0_method: got 'fill', but the records' latitude profiles do not reach the cap "
                f"boundary {cap:g} deg; re-measure with measure.profile_min_latitude_deg <= {cap:g} "
                f"(ingest --remeasure), or choose b0_method 'profile' or 'visible'")
        vals = fill_hidden_bins(ty, br[:, idx], settings.fill_max_gap_years)
        poles[name] = np.where(np.isfinite(vals).all(axis=1) & has_profile,
                               (vals * band).sum(axis=1) / band.sum(), np.nan)
    for k, r in enumerate(records):
        out.append(PoleEstimate(float(poles["north"][k]), float(poles["south"][k]),
                                _nan_if_none(r.north_br_error_gauss), _nan_if_none(r.south_br_error_gauss)))
    return out
