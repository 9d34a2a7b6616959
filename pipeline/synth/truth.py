"""The right answers of the synthetic star: landmarks, reversals, precursors, visible-cap means.

Everything here is computed from the star's noise-free axisymmetric field
(:class:`pipeline.synth.star.StarHistory`) and its monthly sunspot series, with
the definitions the pipeline's stages use (interfaces.md): cap means above
60 degrees, dipole proxy ``(north - south)/2``, the 13-month smoothed sunspot
number, and the precursor = mean |dipole| within +-0.5 yr of the centre of its
window.  The window has a phase (DESIGN.md): ``minimum`` (centred on a cycle
minimum) or ``reversal+L`` (centred L years after that cycle's final dipole
reversal, the last sign change of the true dipole before the minimum).
"""

from __future__ import annotations

import numpy as np

from pipeline.regression import DEFAULT_PHASE, describe_scale, reversal_phase
from pipeline.synth.star import StarHistory

__all__ = ["cycle_landmarks_truth", "precursor_gauss", "window_mean_gauss", "sign_changes_yr",
           "final_reversal_yr", "phase_precursors", "calibration_rows", "CALIBRATION_LAGS_YEARS",
           "PRECURSOR_HALF_WINDOW_YR", "TRUTH_SCALE", "visible_cap_means_gauss", "visible_longitude_fraction",
           "mu_threshold_cos", "pearson_r"]

#: lags L of the ``reversal+L`` rows of the calibration table (years after the final dipole reversal);
#: the forecast's default ``[forecast] lags_years`` (issue 10)
CALIBRATION_LAGS_YEARS = (2.0, 3.0, 4.0, 5.0, 6.0)

#: half-width of every precursor window (years), as the forecast's default ``window_years``
PRECURSOR_HALF_WINDOW_YR = 0.5

#: the ``scale`` of the truth's calibration rows: true whole-cap means of the star (every longitude of
#: |lat| >= 60 deg, no instrument, no B0 effect), axial dipole |(N - S)/2|; a measured store's scale
#: (an instrument, the visible part of the cap, a B0 method) differs from it on purpose
TRUTH_SCALE = describe_scale(instrument="none (synthetic truth of Tessaly)", cap_latitude_deg=60.0,
                             b0_method="none (whole cap at every longitude)", precursor_kind="dipole")


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


def window_mean_gauss(time_yr, magnitude_gauss, center_yr: float, half_window_yr: float = 0.5) -> tuple:
    """Mean of a magnitude within +-half_window of a centre, and its standard error.

    Parameters
    ----------
    time_yr, magnitude_gauss : array_like
        Sample times (decimal years) and values (gauss), e.g. |dipole|.
    center_yr, half_window_yr : float
        Window centre (decimal year) and half-width (years).

    Returns
    -------
    (mean, standard error) : tuple of float
        Gauss; the error is NaN for a window within a single month.

    Notes
    -----
    :math:`P = \\frac1n \\sum_{|t_i - t_0| \\le w} |B_i|`; the standard
    error is ``s / sqrt(m)`` over the m monthly means of the window (samples
    within a month are not independent; common practice, no source).

    Raises
    ------
    ValueError
        When no sample lies in the window.
    """
    ty = np.asarray(time_yr, dtype=float)
    d = np.asarray(magnitude_gauss, dtype=float)
    sel = np.abs(ty - center_yr) <= half_window_yr
    if not sel.any():
        raise ValueError(f"center_yr: got {center_yr!r}; no sample within +-{half_window_yr:g} yr "
                         f"(the series covers {ty[0]:.2f}..{ty[-1]:.2f})")
    d = d[sel]
    months = np.floor((ty[sel] - (center_yr - half_window_yr)) * 12.0).astype(int)
    monthly = np.array([d[months == m].mean() for m in np.unique(months)])
    se = float(monthly.std(ddof=1) / np.sqrt(monthly.size)) if monthly.size > 1 else float("nan")
    return float(d.mean()), se


def precursor_gauss(history: StarHistory, minimum_time_yr: float, half_window_yr: float = 0.5) -> tuple:
    """Precursor at a minimum: mean |(north - south)/2| within +-half_window, and its standard error.

    Notes
    -----
    The definition of the shared interfaces (the polar-field precursor of
    Schatten et al. 1978, GRL 5, 411, on whole-cap means above 60 deg),
    through :func:`window_mean_gauss`.  The standard error is ``s / sqrt(n)``
    over monthly means of |dipole| in the window (samples within a month are
    not independent).  Any window centre works (the ``reversal+L`` phases of
    :func:`phase_precursors` use it too).
    """
    ty = history.time_yr
    if not (np.abs(ty - minimum_time_yr) <= half_window_yr).any():
        raise ValueError(f"minimum_time_yr: got {minimum_time_yr!r}; outside the star's history "
                         f"{ty[0]:.2f}..{ty[-1]:.2f}")
    return window_mean_gauss(ty, np.abs(history.dipole_gauss), minimum_time_yr, half_window_yr)


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


def final_reversal_yr(time_yr, dipole_gauss, minimum_time_yr: float, previous_minimum_yr: float) -> float | None:
    """The final dipole reversal of a cycle: the last sign change of the dipole before its minimum.

    Parameters
    ----------
    time_yr, dipole_gauss : array_like
        The true axial dipole ``(north - south)/2`` (gauss) at its sample times (decimal years).
    minimum_time_yr : float
        The cycle minimum the reversal precedes (decimal year): the minimum
        that starts the cycle whose amplitude the precursor predicts.
    previous_minimum_yr : float
        The minimum before it (decimal year); only sign changes after it count,
        so a cycle without a reversal never borrows an older one.

    Returns
    -------
    float or None
        Decimal year of the last sign change in ``(previous_minimum_yr,
        minimum_time_yr)`` (linear interpolation, :func:`sign_changes_yr`);
        None when the dipole does not change sign there.
    """
    t = np.asarray(time_yr, dtype=float)
    d = np.asarray(dipole_gauss, dtype=float)
    # one sample either side of the interval, so a crossing between the bounding samples is seen
    i0 = max(int(np.searchsorted(t, previous_minimum_yr, side="left")) - 1, 0)
    i1 = min(int(np.searchsorted(t, minimum_time_yr, side="right")) + 1, t.size)
    inside = [x for x in sign_changes_yr(t[i0:i1], d[i0:i1]) if previous_minimum_yr < x < minimum_time_yr]
    return inside[-1] if inside else None


def _first_reversal_after_yr(time_yr, dipole_gauss, after_yr: float) -> float | None:
    """The first sign change of the dipole after a time (decimal year), or None."""
    t = np.asarray(time_yr, dtype=float)
    i0 = max(int(np.searchsorted(t, after_yr, side="left")) - 1, 0)
    later = [x for x in sign_changes_yr(t[i0:], np.asarray(dipole_gauss, dtype=float)[i0:]) if x > after_yr]
    return later[0] if later else None


def phase_precursors(time_yr, dipole_gauss, minimum_time_yr: float, previous_minimum_yr: float,
                     lags_years=CALIBRATION_LAGS_YEARS, half_window_yr: float = PRECURSOR_HALF_WINDOW_YR,
                     within_yr: tuple | None = None) -> dict:
    """The precursor of one cycle at the phase ``minimum`` and at ``reversal+L`` for each lag.

    Parameters
    ----------
    time_yr, dipole_gauss : array_like
        The true axial dipole ``(north - south)/2`` (gauss) and its sample times (decimal years).
    minimum_time_yr : float
        The minimum that starts the cycle (decimal year).
    previous_minimum_yr : float
        The minimum before it (decimal year): the final reversal is searched after it.
    lags_years : sequence of float
        The lags L of the ``reversal+L`` phases (years).
    half_window_yr : float
        Half-width of every window (years).
    within_yr : (float, float), optional
        A window counts only when it lies wholly inside this span (decimal
        years); default the sampled series.

    Returns
    -------
    dict
        ``{"reversal_time": float or None, "phases": {phase: {"center_time",
        "precursor", "precursor_error"}}}``, phases in the order ``minimum``,
        then ``reversal+L`` by increasing L, spelled as
        :func:`pipeline.regression.reversal_phase` spells them.

    Notes
    -----
    The phase ``minimum`` is the window centred on the minimum; ``reversal+L``
    the window of the same half-width centred L years after the cycle's final
    dipole reversal, the last sign change of the dipole between the previous
    minimum and this one (:func:`final_reversal_yr`).  Each is the mean
    |dipole| of :func:`window_mean_gauss`.  A phase is left out when its
    window is not complete inside ``within_yr``; a ``reversal+L`` phase also
    when the cycle has no reversal, or when its window reaches the next
    dipole reversal (the first sign change after the minimum; past it the
    window would measure the field of the next cycle).  A ``reversal+L``
    window that extends past the minimum itself is kept: a forecast made
    while that minimum is not yet confirmed takes it there, and dropping
    those rows would leave out exactly the cycles whose reversal came
    shortly before their minimum.
    """
    t = np.asarray(time_yr, dtype=float)
    magnitude = np.abs(np.asarray(dipole_gauss, dtype=float))
    lo, hi = (float(t[0]), float(t[-1])) if within_yr is None else (float(within_yr[0]), float(within_yr[1]))
    w = float(half_window_yr)

    def complete(center: float) -> bool:
        return lo <= center - w and center + w <= hi

    phases = {}
    if complete(minimum_time_yr):
        p, pe = window_mean_gauss(t, magnitude, minimum_time_yr, w)
        phases[DEFAULT_PHASE] = dict(center_time=float(minimum_time_yr), precursor=p, precursor_error=pe)
    reversal = final_reversal_yr(t, dipole_gauss, minimum_time_yr, previous_minimum_yr)
    if reversal is not None:
        following = _first_reversal_after_yr(t, dipole_gauss, minimum_time_yr)
        bound = np.inf if following is None else following
        for lag in sorted(float(x) for x in lags_years):
            center = reversal + lag
            if complete(center) and center + w < bound:
                p, pe = window_mean_gauss(t, magnitude, center, w)
                phases[reversal_phase(lag)] = dict(center_time=float(center), precursor=p, precursor_error=pe)
    return {"reversal_time": reversal, "phases": phases}


def calibration_rows(history: StarHistory, before_yr: float, skip_cycles: int = 3,
                     lags_years=CALIBRATION_LAGS_YEARS, half_window_yr: float = PRECURSOR_HALF_WINDOW_YR) -> list[dict]:
    """The calibration table of earlier cycles of the same star, at the phase minimum and at reversal+L.

    Parameters
    ----------
    history : StarHistory
    before_yr : float
        Only cycles whose maximum lies before this decimal year (so the table
        is history at the time of the observation span).
    skip_cycles : int
        The first cycles after the start of the history are spin-up and left out.
    lags_years : sequence of float
        The lags L of the ``reversal+L`` rows (years); empty for the
        ``minimum`` rows only.
    half_window_yr : float
        Half-width of every precursor window (years).

    Returns
    -------
    list of dict
        ``cycle, precursor, amplitude, precursor_error, amplitude_error,
        phase, scale, center_time, reversal_time``: the precursor of the
        cycle at the phase (gauss; :func:`phase_precursors` on the true
        whole-cap dipole) and the cycle's 13-month smoothed maximum, the same
        amplitude for every phase of a cycle; ``scale`` is
        :data:`TRUTH_SCALE`.  Ordered by phase (``minimum``, then
        ``reversal+L`` by increasing L), then cycle.  A cycle lacks a
        ``reversal+L`` row when that window is not complete within the star's
        history, when the cycle has no final reversal since the previous
        minimum, or when the window reaches the next dipole reversal; a
        window extending past the minimum is kept (see
        :func:`phase_precursors`).
    """
    first = history.cycles[0]["cycle"] + skip_cycles
    ty, dipole = history.time_yr, history.dipole_gauss
    landmarks = cycle_landmarks_truth(history)
    order = [DEFAULT_PHASE] + [reversal_phase(float(x)) for x in sorted(lags_years)]
    by_phase = {phase: [] for phase in order}
    for k, lm in enumerate(landmarks):
        if lm["cycle"] < first or lm["maximum_time"] >= before_yr:
            continue
        previous = landmarks[k - 1]["minimum_time"] if k > 0 else float(ty[0])
        got = phase_precursors(ty, dipole, lm["minimum_time"], previous, lags_years, half_window_yr)
        amplitude_error = _amplitude_error(history, lm["maximum_time"])
        for phase, item in got["phases"].items():
            by_phase[phase].append(dict(cycle=lm["cycle"], precursor=item["precursor"], amplitude=lm["maximum_value"],
                                        precursor_error=item["precursor_error"], amplitude_error=amplitude_error,
                                        phase=phase, scale=TRUTH_SCALE, center_time=item["center_time"],
                                        reversal_time=got["reversal_time"]))
    return [row for phase in order for row in by_phase[phase]]


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
