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

    Every filled bin carries a one-sigma error that grows with its distance
    in time to the frames that saw it (:func:`fill_hidden_bins_with_error`):
    per bin, the empirical structure function (variogram) of its observed
    values, ``D(h) = mean[(x(t + h) - x(t))^2]`` over observed pairs at lag
    ``h`` (Matheron 1963, Economic Geology 58, 1246, from memory; Cressie 1993,
    Statistics for Spatial Data, sec. 2.4), is fitted with the linear
    (Brownian-motion) model ``D(h) = 2 s_n^2 + s^2 h``: ``2 s_n^2`` is twice
    the measurement noise variance of a bin value (the lag-0 intercept, or
    from the values' stated errors) and ``D_s(h) = s^2 h`` the signal part; a
    value interpolated with weights ``w1, w2`` between neighbours at
    distances ``d1, d2`` has the error variance of that linear predictor,
    ``w1 D_s(d1) + w2 D_s(d2) - w1 w2 D_s(d1 + d2) + w1^2 e1^2 + w2^2 e2^2``
    (the prediction variance of fixed weights summing to one, as in ordinary
    kriging, Cressie 1993, sec. 3.2, from memory), which for the linear model
    is the Brownian-bridge variance ``s^2 d1 d2 / (d1 + d2)`` plus the
    neighbours' noise; a value held constant beyond the ends has
    ``D_s(d) + e1^2``; bins extended toward the pole add the squared
    latitude step of the two highest filled bins, latitude holes a like
    term.  The cap mean's fill error is the band-weighted sum of its bins'
    errors (fully correlated within a frame: conservative), combined in
    quadrature with the record's visible-part error
    (:attr:`PoleEstimate.north_fill_error_gauss` keeps it apart).

Per-rotation dipole of ``"season"``
    ``"season"`` never measures both poles in one rotation, so
    :func:`pipeline.aggregator.polar_series` gives each pole, on every
    rotation it did not measure, the value interpolated linearly in time
    between the nearest rotations of its own seasons (at most
    ``fill_max_gap_years`` apart, or half that from the end of the data;
    else NaN), with the error of the same variance model
    (:func:`fill_hidden_bins_with_error` on the rotation means, their own
    errors as the noise), and the dipole ``(N - S) / 2`` on every rotation
    where both exist.  The per-frame dipole of ``"season"`` stays NaN.

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
           "fill_hidden_bins", "fill_hidden_bins_with_error", "TimeVariogram", "time_variogram",
           "interpolation_variance", "common_cap_latitude", "common_profile_edges", "cap_mean_factor",
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
    #: the ``"fill"`` part of the errors above (gauss; 0 when nothing was filled, NaN for other methods)
    north_fill_error_gauss: float = math.nan
    south_fill_error_gauss: float = math.nan


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


def _gap_neighbours(t_years, seen, max_gap_years):
    """For the unseen rows of one column: previous/next seen row, distances and which may be filled.

    An entry may be filled only when seen rows lie within ``max_gap_years`` on
    both sides together (``d1 + d2 <= max_gap``), or, at the ends of the data
    (one side only), within half of it.
    """
    ts = t_years[seen]
    miss = np.flatnonzero(~seen)
    tm = t_years[miss]
    j = np.searchsorted(ts, tm)
    has_prev, has_next = j > 0, j < ts.size
    prev = np.flatnonzero(seen)[np.maximum(j - 1, 0)] if ts.size else np.zeros(0, int)
    nxt = np.flatnonzero(seen)[np.minimum(j, ts.size - 1)] if ts.size else np.zeros(0, int)
    d1 = np.where(has_prev, tm - ts[np.maximum(j - 1, 0)], np.inf) if ts.size else np.full(tm.size, np.inf)
    d2 = np.where(has_next, ts[np.minimum(j, ts.size - 1)] - tm, np.inf) if ts.size else np.full(tm.size, np.inf)
    inner = (d1 + d2) <= max_gap_years
    edge = (np.minimum(d1, d2) <= 0.5 * max_gap_years) & ~np.isfinite(d1 + d2)
    return miss, prev, nxt, d1, d2, inner, edge


def _fill_bins(t_years, values, max_gap_years):
    """Fill NaN entries of each column by linear interpolation in time between observed rows.

    An entry is filled only when observed rows lie within ``max_gap_years``
    on both sides (or on one side within half of it, at the ends of the data).
    """
    return _fill_bins_with_error(t_years, values, max_gap_years, np.zeros_like(values), None)[0]


@dataclass(frozen=True)
class TimeVariogram:
    """Signal structure function of one series, ``D_s(h) = rate |h|`` (gauss^2), and its noise variance.

    Attributes
    ----------
    rate_gauss2_per_year : float
        ``s^2`` of the linear (Brownian) model ``D_s(h) = s^2 |h|`` fitted to
        the empirical structure function (gauss^2 per year).
    noise_variance_gauss2 : float
        The estimated measurement noise variance of one value (gauss^2; NaN
        when the values' errors were given instead).
    lag_years, empirical_gauss2 : ndarray
        The empirical structure function the model was fitted to (lag-bin mean
        lags, years; values, gauss^2), for inspection.
    pairs : int
        Observed pairs used.
    """

    rate_gauss2_per_year: float
    noise_variance_gauss2: float
    lag_years: np.ndarray
    empirical_gauss2: np.ndarray
    pairs: int

    def __call__(self, h_years) -> np.ndarray:
        """``D_s(h) = s^2 |h|`` (gauss^2)."""
        return self.rate_gauss2_per_year * np.abs(np.asarray(h_years, dtype=float))


#: A lag bin needs this many pairs to enter the fit (common practice in geostatistics asks for 30 pairs
#: per lag, Journel & Huijbregts 1978 from memory; short series here cannot afford that).
_MIN_PAIRS = 3


def _lag_step_years(t_years, max_lag_years):
    dt = np.diff(np.unique(t_years))
    dt = dt[dt > 0]
    step = float(np.median(dt)) if dt.size else max_lag_years
    return max(step, max_lag_years / 40.0)


def _pair_sums(t_years, x, noise2, max_lag_years, step):
    """Per lag bin (centred on multiples of ``step``): count, sum of lags, sum of (dx^2 - s_i^2 - s_j^2), sum dx^2."""
    nbin = int(math.floor(max_lag_years / step + 0.5)) + 1
    cnt = np.zeros(nbin)
    slag = np.zeros(nbin)
    ssig = np.zeros(nbin)
    sraw = np.zeros(nbin)
    ok = np.isfinite(x)
    t, v, s2 = t_years[ok], x[ok], noise2[ok]
    for k in range(1, t.size):
        h = t[k:] - t[:-k]
        sel = h <= max_lag_years + 1e-12
        if not sel.any():
            break
        h = h[sel]
        d2 = (v[k:] - v[:-k])[sel] ** 2
        nn = (s2[k:] + s2[:-k])[sel]
        b = np.minimum(np.floor(h / step + 0.5).astype(int), nbin - 1)
        cnt += np.bincount(b, minlength=nbin)
        slag += np.bincount(b, weights=h, minlength=nbin)
        sraw += np.bincount(b, weights=d2, minlength=nbin)
        ssig += np.bincount(b, weights=d2 - np.where(np.isfinite(nn), nn, 0.0), minlength=nbin)
    return cnt, slag, ssig, sraw


def _wls_line(h, y, w, intercept: bool):
    """Weighted least squares ``y = c0 + c1 h`` (or ``c1 h``); returns (c0, c1)."""
    if intercept and h.size >= 2:
        A = np.stack([np.ones_like(h), h], axis=1)
    else:
        A = h[:, None]
    sw = np.sqrt(w)
    coef = np.linalg.lstsq(A * sw[:, None], y * sw, rcond=None)[0]
    return (float(coef[0]), float(coef[1])) if A.shape[1] == 2 else (0.0, float(coef[0]))


def _variogram_from_sums(cnt, slag, ssig, sraw, noise_known):
    """:class:`TimeVariogram` from lag-bin sums; None when no lag bin has enough pairs.

    The linear model is fitted by weighted least squares with weights
    ``N(h) / D_model(h)^2``, iterated from equal-pair weights (Cressie 1985,
    Mathematical Geology 17, 563, from memory).
    """
    use = cnt >= _MIN_PAIRS
    use[0] = False  # lags near 0 (duplicate times) are left out
    if not use.any():
        return None
    lag = slag[use] / cnt[use]
    raw = sraw[use] / cnt[use]
    n = cnt[use]
    y = ssig[use] / cnt[use] if noise_known else raw
    # iteratively reweighted: weights N(h) / D_model(h)^2 with the previous fit's model (Cressie 1985);
    # weights from the empirical values themselves would favour the bins that fluctuated low
    nug, rate = _wls_line(lag, y, n, intercept=not noise_known)
    for _ in range(3):
        model = np.maximum(nug + rate * lag, 1e-12 * max(float(np.max(np.abs(y))), 1e-30))
        nug, rate = _wls_line(lag, y, n / model ** 2, intercept=not noise_known)
    if noise_known:
        noise2, sig = math.nan, y
    else:
        # D(h) = 2 s^2 + r h: the nugget 2 s^2 is the lag-0 limit (Cressie 1993, sec. 2.3.1, from memory);
        # a negative intercept (a series dominated by a trend) resolves no noise: refit through 0
        if nug < 0.0 or rate < 0.0:
            nug = min(max(nug, 0.0), float(raw.min()))
            _, rate = _wls_line(lag, raw - nug, n / np.maximum(raw, 1e-30) ** 2, intercept=False)
        noise2 = 0.5 * nug
        sig = raw - nug
    return TimeVariogram(max(rate, 0.0), noise2, lag, sig, int(cnt.sum()))


def time_variogram(t_years, x, max_lag_years, value_errors=None) -> TimeVariogram | None:
    """Structure function of one irregular series: the linear model's rate and the noise variance.

    Parameters
    ----------
    t_years : ndarray
        Times, decimal years, increasing.
    x : ndarray
        Values (gauss), NaN where not observed.
    max_lag_years : float
        Longest lag used (years).
    value_errors : ndarray, optional
        One-sigma measurement errors of the values (gauss).  Given, each
        pair's ``e_i^2 + e_j^2`` is subtracted from its squared difference;
        not given, the noise variance is estimated as the lag-0 limit.

    Returns
    -------
    TimeVariogram or None
        None when no lag bin has enough pairs.

    Notes
    -----
    Empirical structure function ``D(h) = mean[(x(t + h) - x(t))^2]`` over
    observed pairs whose lag falls in the bin centred on ``h`` (multiples of
    the median time step; Matheron 1963, Economic Geology 58, 1246; Cressie
    1993, Statistics for Spatial Data, eq. 2.4.2, the classical estimator;
    both from memory).  With white measurement noise of variance ``s_n^2`` it
    is ``D_s(h) + 2 s_n^2`` for ``h > 0``.  The model is the linear
    (Brownian-motion) one, ``D(h) = 2 s_n^2 + s^2 h`` (Cressie 1993, sec.
    2.3.1, from memory), fitted over ``0 < h <= max_lag_years``.  Linear, not
    the empirical table itself: the empirical structure function of a short
    random walk curves upward (its realised drift) and, put into the
    interpolation variance, would call a gap of half a year almost exact.
    """
    t = np.asarray(t_years, dtype=float)
    v = np.asarray(x, dtype=float)
    step = _lag_step_years(t, max_lag_years)
    if value_errors is None:
        noise2, known = np.zeros_like(v), False
    else:
        e = np.asarray(value_errors, dtype=float)
        noise2, known = e * e, True
    return _variogram_from_sums(*_pair_sums(t, v, noise2, max_lag_years, step), noise_known=known)


def interpolation_variance(variogram: TimeVariogram, d1_years, d2_years, e1_gauss, e2_gauss) -> np.ndarray:
    """Error variance (gauss^2) of a value interpolated linearly in time (or held beyond an end).

    Parameters
    ----------
    variogram : TimeVariogram or callable
        The signal structure function ``D_s(h)`` (gauss^2 at lags in years).
    d1_years, d2_years : ndarray
        Distances to the previous and next observed value (``inf`` where there
        is none on that side: the value is held constant from the other).
    e1_gauss, e2_gauss : ndarray
        Their one-sigma errors.

    Notes
    -----
    Linear interpolation ``x^ = w1 x1 + w2 x2``, ``w1 = d2 / (d1 + d2)``,
    ``w2 = d1 / (d1 + d2)``.  For any predictor whose weights sum to one the
    error variance against the signal is
    ``sum_i w_i D_s(d_i) - (1/2) sum_ij w_i w_j D_s(|t_i - t_j|)`` plus the
    propagated noise ``sum_i w_i^2 e_i^2`` (the ordinary-kriging variance
    for given weights, with ``D_s = 2 gamma``; Cressie 1993, Statistics for
    Spatial Data, sec. 3.2, from memory):
    ``w1 D_s(d1) + w2 D_s(d2) - w1 w2 D_s(d1 + d2) + w1^2 e1^2 + w2^2 e2^2``.
    For Brownian motion, ``D_s(h) = s^2 h``, it is the Brownian-bridge
    variance ``s^2 d1 d2 / (d1 + d2)`` (e.g. Karatzas & Shreve 1991,
    Brownian Motion and Stochastic Calculus, sec. 5.6.B, from memory); for a
    field linear in time, ``D_s = a^2 h^2``, it is 0, as linear
    interpolation is then exact.  One side only: ``D_s(d) + e^2``.  A
    negative value (a structure function that is not a valid variogram) is
    clipped to 0.
    """
    d1 = np.asarray(d1_years, dtype=float)
    d2 = np.asarray(d2_years, dtype=float)
    e1 = np.asarray(e1_gauss, dtype=float)
    e2 = np.asarray(e2_gauss, dtype=float)
    both = np.isfinite(d1) & np.isfinite(d2)
    with np.errstate(invalid="ignore", divide="ignore"):
        span = np.where(both, d1 + d2, 1.0)
        w1 = np.where(both, np.where(span > 0, d2 / np.where(span > 0, span, 1.0), 0.5), np.isfinite(d1) * 1.0)
    w2 = 1.0 - w1
    dd1 = np.where(np.isfinite(d1), d1, 0.0)
    dd2 = np.where(np.isfinite(d2), d2, 0.0)
    sig = w1 * variogram(dd1) + w2 * variogram(dd2) - np.where(both, w1 * w2 * variogram(dd1 + dd2), 0.0)
    noise = np.where(w1 > 0, w1 * w1 * np.nan_to_num(e1) ** 2, 0.0) + np.where(w2 > 0, w2 * w2 * np.nan_to_num(e2) ** 2, 0.0)
    return np.maximum(sig, 0.0) + noise


def _column_variograms(t_years, values, max_gap_years, noise2):
    """Per column its own :class:`TimeVariogram`; a column with too few pairs takes the pooled one."""
    nb = values.shape[1]
    step = _lag_step_years(t_years, max_gap_years)
    known = noise2 is not None
    n2 = noise2 if known else np.zeros_like(values)
    sums = [_pair_sums(t_years, values[:, b], n2[:, b], max_gap_years, step) for b in range(nb)]
    pooled = None
    if sums:
        pooled = _variogram_from_sums(*[np.sum([s[i] for s in sums], axis=0) for i in range(4)], noise_known=known)
    out = []
    for b in range(nb):
        own = _variogram_from_sums(*sums[b], noise_known=known)
        out.append(own if own is not None and own.lag_years.size >= 2 else pooled)
    return out


def _fill_bins_with_error(t_years, values, max_gap_years, errors, variograms):
    """Time step of the fill: values and one-sigma errors of each column's unseen rows.

    ``errors`` are the errors of the seen entries; ``variograms`` one
    :class:`TimeVariogram` per column (None: no variogram, the signal term is 0).
    """
    out = values.copy()
    err = errors.copy()
    for b in range(values.shape[1]):
        col = values[:, b]
        seen = np.isfinite(col)
        if seen.sum() == 0:
            continue
        miss, prev, nxt, d1, d2, inner, edge = _gap_neighbours(t_years, seen, max_gap_years)
        ok = inner | edge
        filled = np.interp(t_years[miss], t_years[seen], col[seen])  # constant beyond the ends
        out[miss[ok], b] = filled[ok]
        vg = variograms[b] if variograms is not None else None
        if vg is None:
            vg = TimeVariogram(0.0, math.nan, np.zeros(0), np.zeros(0), 0)
        var = interpolation_variance(vg, d1[ok], d2[ok], errors[prev[ok], b], errors[nxt[ok], b])
        err[miss[ok], b] = np.sqrt(var)
    return out, err


def _fill_latitude_interior(values, errors=None):
    """Per row, interpolate NaN bins lying between measured bins (columns ordered in latitude).

    With ``errors`` (one-sigma, of the measured bins) also returns the
    filled bins' errors: ``w_l^2 e_l^2 + w_r^2 e_r^2 + w_l w_r (x_r - x_l)^2``,
    the latitude analogue of the Brownian-bridge term with the rate set by the
    bracketing difference (on a monotone profile the true value lies between
    the neighbours; the term's one-sigma is half that range at the midpoint).
    """
    out = values.copy()
    err = None if errors is None else errors.copy()
    x = np.arange(values.shape[1])
    for k in range(values.shape[0]):
        seen = np.isfinite(values[k])
        if seen.sum() < 2:
            continue
        first, last = np.flatnonzero(seen)[[0, -1]]
        hole = ~seen & (x > first) & (x < last)
        if hole.any():
            out[k, hole] = np.interp(x[hole], x[seen], values[k, seen])
            if err is not None:
                si = np.flatnonzero(seen)
                j = np.searchsorted(si, x[hole])
                left, right = si[j - 1], si[j]
                wr = (x[hole] - left) / (right - left)
                wl = 1.0 - wr
                var = (wl * errors[k, left]) ** 2 + (wr * errors[k, right]) ** 2 \
                    + wl * wr * (values[k, right] - values[k, left]) ** 2
                err[k, hole] = np.sqrt(var)
    return out if errors is None else (out, err)


def _extend_poleward(values, errors=None):
    """Per row, NaN bins beyond the last filled bin (the pole side) take its value.

    With ``errors`` also their errors: the highest filled bin's variance plus
    ``(k (x_top - x_below))^2`` for the bin ``k`` steps beyond it (the offset
    a linear extrapolation of the two highest filled bins would make; with
    only one filled bin, ``(k x_top)^2``, an error as large as the value).
    """
    out = values.copy()
    err = None if errors is None else errors.copy()
    for k in range(values.shape[0]):
        seen = np.flatnonzero(np.isfinite(values[k]))
        if seen.size:
            top = seen[-1]
            out[k, top + 1:] = values[k, top]
            if err is not None and top + 1 < values.shape[1]:
                step = values[k, top] - values[k, top - 1] if top >= 1 and np.isfinite(values[k, top - 1]) \
                    else values[k, top]
                steps = np.arange(1, values.shape[1] - top)
                err[k, top + 1:] = np.sqrt(errors[k, top] ** 2 + (steps * step) ** 2)
    return out if errors is None else (out, err)


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
        :func:`fill_hidden_bins_with_error` gives the same values and their errors.
    """
    vals = _fill_latitude_interior(np.asarray(values, dtype=float))
    return _extend_poleward(_fill_bins(np.asarray(t_years, dtype=float), vals, max_gap_years))


def fill_hidden_bins_with_error(t_years, values, max_gap_years, value_errors=None):
    """:func:`fill_hidden_bins` and the one-sigma error of every filled bin.

    Parameters
    ----------
    t_years : ndarray, shape (n,)
        Times of the rows, decimal years, increasing.
    values : ndarray, shape (n, m)
        Bin means (gauss, NaN where not measured), columns ordered from the cap
        boundary toward the pole.
    max_gap_years : float
        Longest time gap bridged (see :func:`_fill_bins`); also the longest lag
        of the structure functions.
    value_errors : ndarray, shape (n, m), optional
        One-sigma measurement errors of the values (gauss).  Not given (or NaN
        for an entry), a bin's noise is estimated from its structure
        function's lag-0 limit (:func:`time_variogram`).

    Returns
    -------
    filled : ndarray
        As :func:`fill_hidden_bins`.
    error : ndarray
        One-sigma error (gauss) of each filled entry against the true bin
        value; 0 for the entries measured (their noise belongs to the
        measurement), NaN where nothing was filled.

    Notes
    -----
    1. Per column, the signal structure function ``D_s(h) = s^2 h`` and the
       noise of the measured values (:func:`time_variogram`; a column with
       fewer than two usable lags takes the one pooled over the columns).
    2. Latitude holes (between measured bins of a row):
       ``w_l^2 e_l^2 + w_r^2 e_r^2 + w_l w_r (x_r - x_l)^2``.
    3. Time: :func:`interpolation_variance` with the neighbours' errors
       (their measurement noise, or step 2's error).
    4. Toward the pole: the highest filled bin's variance plus
       ``(k (x_top - x_below))^2`` at ``k`` bins beyond it.

    References
    ----------
    Matheron, G. 1963, Economic Geology 58, 1246 (from memory).
    Cressie, N. 1993, Statistics for Spatial Data, revised ed., Wiley, secs. 2.4 and 3.2 (from memory).
    """
    t = np.asarray(t_years, dtype=float)
    raw = np.asarray(values, dtype=float)
    measured = np.isfinite(raw)
    given = None
    if value_errors is not None:
        given = np.asarray(value_errors, dtype=float)
        if given.shape != raw.shape:
            raise ValueError(f"value_errors: shape {given.shape} differs from the values' {raw.shape}")
        given = np.where(measured & np.isfinite(given), given, np.nan)
    vgs = _column_variograms(t, raw, max_gap_years, None if given is None else np.nan_to_num(given) ** 2)
    noise = np.full(raw.shape, np.nan)
    for b, vg in enumerate(vgs):
        s2 = vg.noise_variance_gauss2 if vg is not None else math.nan
        if given is not None:
            col = given[:, b]
            fallback = float(np.nanmedian(col)) if np.isfinite(col).any() else (math.sqrt(s2) if np.isfinite(s2) else 0.0)
            noise[:, b] = np.where(np.isfinite(col), col, fallback)
        else:
            noise[:, b] = math.sqrt(s2) if np.isfinite(s2) else 0.0
    noise[~measured] = np.nan
    vals, err = _fill_latitude_interior(raw, noise)
    vals, err = _fill_bins_with_error(t, vals, max_gap_years, err, vgs)
    vals, err = _extend_poleward(vals, err)
    err = np.where(measured, 0.0, np.where(np.isfinite(vals), err, np.nan))
    return vals, err


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
        measured no bin).  The error is
        ``sqrt(e_visible^2 + e_fill^2)``: the record's visible-part standard
        error and the fill error ``e_fill = sum_b A_b e_b / sum_b A_b`` of the
        filled bins' one-sigma errors ``e_b`` (:func:`fill_hidden_bins_with_error`,
        0 for measured bins) with the bins' sphere areas ``A_b``: the bins'
        errors are taken as fully correlated within a frame (they share their
        neighbouring frames), which is conservative.  ``e_fill`` alone is in
        ``north_fill_error_gauss`` / ``south_fill_error_gauss``.

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
        vals, errs = fill_hidden_bins_with_error(ty, br[:, idx], settings.fill_max_gap_years)
        whole = np.isfinite(vals).all(axis=1) & has_profile
        mean = np.where(whole, (vals * band).sum(axis=1) / band.sum(), np.nan)
        # fill error of the cap mean: bins' errors fully correlated within a frame (conservative)
        ferr = np.where(whole, (np.nan_to_num(errs) * band).sum(axis=1) / band.sum(), np.nan)
        poles[name] = (mean, ferr)
    for k, r in enumerate(records):
        fn, fs = float(poles["north"][1][k]), float(poles["south"][1][k])
        en = math.hypot(_nan_if_none(r.north_br_error_gauss), fn) if math.isfinite(fn) else math.nan
        es = math.hypot(_nan_if_none(r.south_br_error_gauss), fs) if math.isfinite(fs) else math.nan
        out.append(PoleEstimate(float(poles["north"][0][k]), float(poles["south"][0][k]), en, es,
                                north_fill_error_gauss=fn, south_fill_error_gauss=fs))
    return out
