"""The right answers of the synthetic star: landmarks, reversals, precursors, visible-cap means.

Everything here is computed from the star's noise-free axisymmetric field
(:class:`pipeline.synth.star.StarHistory`) and its monthly sunspot series, with
the definitions the pipeline's stages use (interfaces.md): cap means above
60 degrees, dipole proxy ``(north - south)/2``, the 13-month smoothed sunspot
number, and the precursor = mean |dipole| within +-0.5 yr of a minimum.
"""

from __future__ import annotations

import numpy as np

from pipeline.synth.star import StarHistory

__all__ = ["cycle_landmarks_truth", "precursor_gauss", "sign_changes_yr", "calibration_rows",
           "visible_cap_means_gauss", "visible_longitude_fraction", "mu_threshold_cos", "pearson_r"]


def cycle_landmarks_truth(history: StarHistory) -> list[dict]:
    """Minimum and maximum of the 13-month smoothed sunspot number for each cycle.

    The generator knows where each cycle starts; the minimum is the lowest
    smoothed value within -2 .. +2.5 yr of the start, the maximum the highest
    between that minimum and the next (or within 8 yr when the next is
    unknown).  Cycles whose window leaves the smoothed record are left out.

    Returns
    -------
    list of dict
        ``cycle, minimum_time, minimum_value, maximum_time, maximum_value``
        (decimal years, sunspot number), in time order.
    """
    t = history.month_mid_yr
    r = history.sunspot_smooth
    ok = np.isfinite(r)
    minima = []
    for c in history.cycles[1:]:
        sel = ok & (t >= c["start_yr"] - 2.0) & (t <= c["start_yr"] + 2.5)
        if sel.sum() < 24:
            continue
        i = np.flatnonzero(sel)[np.argmin(r[sel])]
        minima.append((c["cycle"], i))
    out = []
    for k, (number, i) in enumerate(minima):
        j_end = minima[k + 1][1] if k + 1 < len(minima) else None
        if j_end is None:
            sel = ok & (t > t[i]) & (t <= t[i] + 8.0)
            if not ok[np.searchsorted(t, t[i] + 8.0, side="left") - 1]:
                continue
        else:
            sel = ok & (t > t[i]) & (t < t[j_end])
        if not sel.any():
            continue
        j = np.flatnonzero(sel)[np.argmax(r[sel])]
        out.append(dict(cycle=int(number), minimum_time=float(t[i]), minimum_value=float(r[i]),
                        maximum_time=float(t[j]), maximum_value=float(r[j])))
    return out


def precursor_gauss(history: StarHistory, minimum_time_yr: float, half_window_yr: float = 0.5) -> tuple:
    """Precursor at a minimum: mean |(north - south)/2| within +-half_window, and its standard error.

    Notes
    -----
    The definition of the shared interfaces (the polar-field precursor of
    Schatten et al. 1978, GRL 5, 411, on whole-cap means above 60 deg).  The
    standard error is ``s / sqrt(n)`` over monthly means of |dipole| in the
    window (samples within a month are not independent).
    """
    ty = history.time_yr
    sel = np.abs(ty - minimum_time_yr) <= half_window_yr
    if not sel.any():
        raise ValueError(f"minimum_time_yr: got {minimum_time_yr!r}; outside the star's history "
                         f"{ty[0]:.2f}..{ty[-1]:.2f}")
    d = np.abs(history.dipole_gauss[sel])
    months = np.floor((ty[sel] - (minimum_time_yr - half_window_yr)) * 12.0).astype(int)
    monthly = np.array([d[months == m].mean() for m in np.unique(months)])
    se = float(monthly.std(ddof=1) / np.sqrt(monthly.size)) if monthly.size > 1 else float("nan")
    return float(d.mean()), se


def sign_changes_yr(time_yr, values) -> list[float]:
    """Times of every sign change of a series, linearly interpolated between samples (decimal years)."""
    t = np.asarray(time_yr, dtype=float)
    v = np.asarray(values, dtype=float)
    s = np.sign(v)
    # carry signs over exact zeros so that a touch of zero is not a crossing
    for i in range(1, s.size):
        if s[i] == 0:
            s[i] = s[i - 1]
    idx = np.flatnonzero(s[1:] * s[:-1] < 0)
    out = []
    for i in idx:
        a, b = v[i], v[i + 1]
        f = a / (a - b) if a != b else 0.5
        out.append(float(t[i] + f * (t[i + 1] - t[i])))
    return out


def _amplitude_error(history: StarHistory, maximum_time_yr: float) -> float:
    """Error of a 13-month smoothed maximum: monthly scatter x sqrt(sum w^2) of the 13-month weights."""
    t = history.month_mid_yr
    sel = np.abs(t - maximum_time_yr) <= 0.5 + 1e-9
    resid = history.sunspot_observed[sel] - history.sunspot_true[sel]
    w = np.ones(13)
    w[0] = w[-1] = 0.5
    w /= 12.0
    return float(np.std(resid, ddof=1) * np.sqrt((w * w).sum())) if resid.size > 1 else float("nan")


def calibration_rows(history: StarHistory, before_yr: float, skip_cycles: int = 3) -> list[dict]:
    """The (cycle, precursor, amplitude) table of earlier cycles of the same star.

    Parameters
    ----------
    history : StarHistory
    before_yr : float
        Only cycles whose maximum lies before this decimal year (so the table
        is history at the time of the observation span).
    skip_cycles : int
        The first cycles after the start of the history are spin-up and left out.

    Returns
    -------
    list of dict
        ``cycle, precursor, amplitude, precursor_error, amplitude_error``:
        the precursor at the minimum that starts the cycle (gauss) and the
        cycle's 13-month smoothed maximum.
    """
    first = history.cycles[0]["cycle"] + skip_cycles
    rows = []
    for lm in cycle_landmarks_truth(history):
        if lm["cycle"] < first or lm["maximum_time"] >= before_yr:
            continue
        p, pe = precursor_gauss(history, lm["minimum_time"])
        rows.append(dict(cycle=lm["cycle"], precursor=p, amplitude=lm["maximum_value"], precursor_error=pe,
                         amplitude_error=_amplitude_error(history, lm["maximum_time"])))
    return rows


def pearson_r(x, y) -> float:
    """Pearson correlation coefficient (numpy.corrcoef)."""
    return float(np.corrcoef(np.asarray(x, float), np.asarray(y, float))[0, 1])


def _mu_at_angle(t_rad: float, rsun_m: float, distance_m: float) -> float:
    """mu of the sphere point at angle ``t`` from the sub-observer point, from the 3-D vectors.

    The point ``P = R (sin t, 0, cos t)``, its outward normal ``P / R`` and the
    direction to the observer at ``O = (0, 0, D)``: ``mu = n . (O - P) / |O - P|``
    (DESIGN.md's definition of mu, evaluated directly, no closed form).
    """
    p = rsun_m * np.array([np.sin(t_rad), 0.0, np.cos(t_rad)])
    view = np.array([0.0, 0.0, distance_m]) - p
    return float(np.dot(p / rsun_m, view) / np.linalg.norm(view))


def mu_threshold_cos(rsun_m: float, distance_m: float, mu_min: float) -> float:
    """cos of the angle from the sub-observer point at which mu equals mu_min (finite distance).

    Parameters
    ----------
    rsun_m, distance_m : float
        Sphere radius and observer distance from its centre, metres (``distance_m > rsun_m``).
    mu_min : float
        The mu of the boundary; values <= 0 give the limb (mu = 0).

    Returns
    -------
    float
        ``cos t`` of the circle on the sphere where mu = mu_min.

    Notes
    -----
    Found by Brent's root finding (``scipy.optimize.brentq``; Brent 1973,
    *Algorithms for Minimization without Derivatives*, ch. 4) on
    ``mu(t) - mu_min`` over ``0 <= t <= pi/2``, with mu evaluated from the 3-D
    vectors (:func:`_mu_at_angle`).  mu falls monotonically from 1 at the
    sub-observer point to ``-R / sqrt(R^2 + D^2) < 0`` at ``t = pi/2``, so the
    bracket always holds one root.  This route shares no formula with
    :func:`pipeline.projection.visible_area_m2` (a closed-form quadratic), so
    their agreement checks both.
    """
    from scipy.optimize import brentq

    big_d, r, m = float(distance_m), float(rsun_m), max(float(mu_min), 0.0)
    if not big_d > r > 0.0:
        raise ValueError(f"distance_m: got {distance_m!r} with rsun_m {rsun_m!r}; need distance_m > rsun_m > 0")
    t = brentq(lambda x: _mu_at_angle(x, r, big_d) - m, 0.0, np.pi / 2, xtol=1e-15, rtol=4 * np.finfo(float).eps)
    return float(np.cos(t))


def visible_longitude_fraction(latitude_deg, b0_deg: float, cos_threshold: float) -> np.ndarray:
    """Fraction of a latitude circle with ``cos t >= cos_threshold`` as seen from latitude B0.

    Notes
    -----
    ``cos t = sin B0 sin lat + cos B0 cos lat cos dphi`` (spherical law of
    cosines), so the visible arc is ``|dphi| <= arccos((c - sin B0 sin lat)
    / (cos B0 cos lat))`` and the fraction is that angle over pi.
    """
    lat = np.deg2rad(np.asarray(latitude_deg, dtype=float))
    b0 = np.deg2rad(b0_deg)
    den = np.cos(b0) * np.cos(lat)
    with np.errstate(divide="ignore", invalid="ignore"):
        q = (cos_threshold - np.sin(b0) * np.sin(lat)) / den
    q = np.where(den > 0, q, np.where(np.sin(b0) * np.sin(lat) >= cos_threshold, -1.0, 1.0))
    return np.arccos(np.clip(q, -1.0, 1.0)) / np.pi


def visible_cap_means_gauss(profile_lat_deg, profile_br_gauss, b0_deg: float, distance_m: float,
                            rsun_m: float, cap_latitude_deg: float = 60.0, mu_min: float = 0.1,
                            n_nodes: int = 4000) -> tuple:
    """Area-weighted mean of an axisymmetric field over the visible part of each cap.

    Parameters
    ----------
    profile_lat_deg, profile_br_gauss : ndarray
        The field as a function of latitude (linear interpolation between
        nodes, flat beyond the outermost ones), degrees and gauss.
    b0_deg, distance_m, rsun_m : float
        Observer latitude and distance, solar radius.
    cap_latitude_deg, mu_min : float
        Cap boundary and the lowest mu used (the measurement's defaults).
    n_nodes : int
        Midpoint-rule nodes in latitude per cap.

    Returns
    -------
    (north, south) : tuple of float
        Gauss; NaN if no part of a cap is visible.

    Notes
    -----
    ``<B> = int B(lat) f(lat) cos lat dlat / int f(lat) cos lat dlat`` with
    ``f`` the visible fraction of each latitude circle
    (:func:`visible_longitude_fraction`) above ``mu >= mu_min``
    (:func:`mu_threshold_cos`): an analytic route independent of any pixel grid.
    """
    order = np.argsort(profile_lat_deg)
    xp = np.asarray(profile_lat_deg, dtype=float)[order]
    fp = np.asarray(profile_br_gauss, dtype=float)[order]
    c = mu_threshold_cos(rsun_m, distance_m, mu_min)
    out = []
    for sign in (1.0, -1.0):
        edges = np.linspace(cap_latitude_deg, 90.0, n_nodes + 1)
        mid = sign * 0.5 * (edges[1:] + edges[:-1])
        w = visible_longitude_fraction(mid, b0_deg, c) * np.cos(np.deg2rad(mid))
        b = np.interp(mid, xp, fp)
        out.append(float((w * b).sum() / w.sum()) if w.sum() > 0 else float("nan"))
    return tuple(out)
