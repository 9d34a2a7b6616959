"""The polar-field precursor of the next cycle, from a PolarSeries.

At a cycle minimum the precursor is the mean, over a window of +-0.5 year
(default) centred on the minimum, of the per-rotation magnitude of the axial
dipole proxy |(north - south)/2| (``kind="dipole"``) or of the mean of the two
hemispheres' magnitudes (|north| + |south|)/2 (``kind="hemispheres"``), in
gauss, with its standard error.  Before the minimum is reached, the same
window mean at a chosen lag after the final polarity reversal stands in for
it; the polar precursor becomes usable from about four years after the
reversal (Kumar et al. 2021).

The series is an ``xarray.Dataset`` as made by ``pipeline.aggregator`` (see
the shared interfaces): coordinate ``rotation_time`` (datetime64) on dimension
``rotation`` and variables ``north_br_rotation_gauss``,
``south_br_rotation_gauss``, ``dipole_br_rotation_gauss`` with their
``*_rotation_error_gauss`` (optional).
"""

from __future__ import annotations

import math

import numpy as np

from pipeline.timeutil import decimal_year

__all__ = [
    "precursor_for_forecast",
    "PRECURSOR_KINDS",
    "MIN_LAG_AFTER_REVERSAL_YEARS",
    "rotation_magnitude",
    "precursor_at",
    "precursor_at_minima",
    "precursor_after_reversal",
    "latest_precursor",
]

#: Kumar et al. (2021): the polar precursor is usable from about 4 years after the reversal
MIN_LAG_AFTER_REVERSAL_YEARS = 4.0


def _error(series, name: str):
    var = name.replace("_br_rotation_gauss", "_br_rotation_error_gauss")
    return np.asarray(series[var].values, dtype=np.float64) if var in series else None


def _dipole_magnitude(series):
    value = np.abs(np.asarray(series["dipole_br_rotation_gauss"].values, dtype=np.float64))
    return value, _error(series, "dipole_br_rotation_gauss")


def _hemispheres_magnitude(series):
    north = np.asarray(series["north_br_rotation_gauss"].values, dtype=np.float64)
    south = np.asarray(series["south_br_rotation_gauss"].values, dtype=np.float64)
    value = 0.5 * (np.abs(north) + np.abs(south))
    en, es = _error(series, "north_br_rotation_gauss"), _error(series, "south_br_rotation_gauss")
    error = None if en is None or es is None else 0.5 * np.hypot(en, es)
    return value, error


#: precursor kinds by name: Dataset -> (per-rotation magnitude in gauss, its error or None)
PRECURSOR_KINDS = {"dipole": _dipole_magnitude, "hemispheres": _hemispheres_magnitude}


def rotation_magnitude(series, kind: str = "dipole"):
    """Per-rotation precursor magnitude of a PolarSeries.

    Parameters
    ----------
    series : xarray.Dataset
        PolarSeries with ``rotation_time`` and the ``*_br_rotation_gauss`` variables.
    kind : str
        ``"dipole"``: |(north - south)/2|; ``"hemispheres"``: (|north| + |south|)/2.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray, numpy.ndarray or None)
        Rotation mid-times (decimal years), magnitudes (gauss) and their
        one-sigma errors (gauss; None when the series has no error variables).

    Notes
    -----
    Hemispheres: :math:`\\sigma = \\tfrac12\\sqrt{\\sigma_N^2 + \\sigma_S^2}` (independent errors);
    the error of |x| is that of x.
    """
    try:
        func = PRECURSOR_KINDS[kind]
    except KeyError:
        raise ValueError(f"kind: got {kind!r}; valid kinds are {', '.join(sorted(PRECURSOR_KINDS))}") from None
    need = {"dipole": ["dipole_br_rotation_gauss"],
            "hemispheres": ["north_br_rotation_gauss", "south_br_rotation_gauss"]}[kind]
    missing = [v for v in need + ["rotation_time"] if v not in series.variables]
    if missing:
        raise ValueError(f"series: missing {', '.join(missing)}; pass a PolarSeries from pipeline.aggregator")
    time = np.atleast_1d(decimal_year(series["rotation_time"].values)).astype(np.float64)
    value, error = func(series)
    return time, value, error


def _window_mean(time, value, error, center: float, window_years: float) -> dict:
    sel = (np.abs(time - center) <= window_years) & np.isfinite(value)
    n = int(sel.sum())
    if n == 0:
        raise ValueError(f"no rotation with a measured value within +-{window_years:g} yr of {center:.3f}; "
                         f"the polar series does not cover this time")
    v = value[sel]
    mean = float(v.mean())
    # standard error of the mean from the scatter of the rotations (needs two or more)
    scatter = float(v.std(ddof=1) / math.sqrt(n)) if n >= 2 else math.nan
    measurement = math.nan
    without_error = n
    if error is not None:
        e = error[sel]
        known = np.isfinite(e)
        without_error = int(n - known.sum())
        if known.any():
            # independent per-rotation errors, propagated from the m rotations that have one:
            # sqrt(sum sigma_i^2) / m, the error of their mean (as pipeline.aggregator does for the
            # frames of a rotation); for m < n it exceeds the all-rotation value sqrt(sum)/sqrt(n m)
            # that typical errors for the others would give, so a missing error never shrinks the term
            measurement = float(math.sqrt(np.sum(e[known] ** 2)) / known.sum())
    candidates = [x for x in (scatter, measurement) if math.isfinite(x)]
    return {
        "time": float(center),
        "precursor_gauss": mean,
        "precursor_error_gauss": max(candidates) if candidates else None,
        "scatter_error_gauss": scatter if math.isfinite(scatter) else None,
        "measurement_error_gauss": measurement if math.isfinite(measurement) else None,
        "n_rotations": n,
        "n_rotations_without_error": without_error,
        "window_years": float(window_years),
    }


def _check_window(window_years):
    w = float(window_years)
    if not math.isfinite(w) or w <= 0:
        raise ValueError(f"window_years: got {window_years!r}; expected a positive half-width in years, e.g. 0.5")
    return w


def precursor_at(series, center_time_decimal_year: float, *, kind: str = "dipole",
                 window_years: float = 0.5) -> dict:
    """Window mean of the precursor magnitude centred on one time.

    Parameters
    ----------
    series : xarray.Dataset
        PolarSeries.
    center_time_decimal_year : float
        Window centre (decimal year), e.g. a cycle minimum.
    kind : str
        ``"dipole"`` or ``"hemispheres"`` (see :func:`rotation_magnitude`).
    window_years : float
        Half-width of the window (years; default 0.5).

    Returns
    -------
    dict
        ``time``, ``precursor_gauss`` (mean magnitude, G),
        ``precursor_error_gauss`` (the larger of the two standard errors, G),
        ``scatter_error_gauss`` (s / sqrt(n)), ``measurement_error_gauss``
        (sqrt(sum sigma_i^2) / m over the m rotations that have an error; None
        when none has), ``n_rotations``, ``n_rotations_without_error`` (n - m;
        n when the series has no error variables), ``window_years``.

    Notes
    -----
    :math:`P = \\frac1n\\sum_{|t_i - t_0| \\le w} |B_i|`; standard error
    :math:`\\max(s/\\sqrt n, \\sqrt{\\sum\\sigma_i^2}/m)`, conservative because
    successive rotations are not independent (common practice, no source).
    A rotation with a value but no error (NaN) counts in the mean and the
    scatter; the propagated term comes from the m rotations that have one,
    as the error of their mean, which is never smaller than the value the
    others would give with errors like theirs (m = n: the usual
    :math:`\\sqrt{\\sum\\sigma_i^2}/n`).

    Raises
    ------
    ValueError
        For an unknown kind, a bad window, or no measured rotation in the window.
    """
    w = _check_window(window_years)
    time, value, error = rotation_magnitude(series, kind)
    return _window_mean(time, value, error, float(center_time_decimal_year), w)


def precursor_at_minima(series, minima_time_decimal_year, *, kind: str = "dipole",
                        window_years: float = 0.5) -> list[dict]:
    """The precursor at each cycle minimum; minima the series does not cover get a reason.

    Returns
    -------
    list of dict
        One per minimum, in the given order: the :func:`precursor_at` keys
        plus ``minimum_time`` and ``reason`` (None when measured; otherwise a
        one-line reason and ``precursor_gauss`` None).
    """
    w = _check_window(window_years)
    time, value, error = rotation_magnitude(series, kind)
    out = []
    for t0 in np.atleast_1d(np.asarray(minima_time_decimal_year, dtype=np.float64)):
        try:
            item = _window_mean(time, value, error, float(t0), w)
            item["reason"] = None
        except ValueError as exc:
            item = {"time": float(t0), "precursor_gauss": None, "precursor_error_gauss": None,
                    "scatter_error_gauss": None, "measurement_error_gauss": None, "n_rotations": 0,
                    "n_rotations_without_error": 0, "window_years": w, "reason": str(exc)}
        item["minimum_time"] = float(t0)
        out.append(item)
    return out


def _lag_notes(lag_years: float) -> list[str]:
    if lag_years < MIN_LAG_AFTER_REVERSAL_YEARS:
        # Kumar et al. (2021): usable from about 4 yr after the reversal (r >= 0.8)
        return [f"the precursor is taken {lag_years:.2f} yr after the final reversal; the polar precursor "
                f"is a usable predictor only from about {MIN_LAG_AFTER_REVERSAL_YEARS:g} yr after it "
                f"(Kumar et al. 2021)"]
    return []


def precursor_after_reversal(series, reversal_time_decimal_year: float, lag_years: float, *,
                             kind: str = "dipole", window_years: float = 0.5) -> dict:
    """The precursor at a chosen lag after the final polarity reversal (before the minimum).

    Parameters
    ----------
    series : xarray.Dataset
        PolarSeries.
    reversal_time_decimal_year : float
        Final reversal epoch (decimal year), e.g. from ``pipeline.reversal``.
    lag_years : float
        Window centre = reversal + lag (years, >= 0).
    kind, window_years
        As :func:`precursor_at`.

    Returns
    -------
    dict
        The :func:`precursor_at` keys plus ``reversal_time``, ``lag_years``
        and ``notes`` (a caution when the lag is under about 4 years).

    Notes
    -----
    Kumar et al. (2021) find the polar precursor usable from about four years
    after the reversal, with correlation r >= 0.8 with the next amplitude,
    rising to r >= 0.9 at the minimum.

    References
    ----------
    Kumar, P., Nagy, M., Lemerle, A., Karak, B. B. & Petrovay, K. 2021, "The
    polar precursor method for solar cycle prediction: comparison of
    predictors and their temporal range", arXiv:2101.05013 (The Astrophysical
    Journal 909, 87).
    """
    lag = float(lag_years)
    if not math.isfinite(lag) or lag < 0:
        raise ValueError(f"lag_years: got {lag_years!r}; expected a lag >= 0 years after the reversal, e.g. 4")
    item = precursor_at(series, float(reversal_time_decimal_year) + lag, kind=kind, window_years=window_years)
    item.update(reversal_time=float(reversal_time_decimal_year), lag_years=lag, notes=_lag_notes(lag))
    return item


def latest_precursor(series, reversal_time_decimal_year: float, *, kind: str = "dipole",
                     window_years: float = 0.5) -> dict:
    """The precursor from the newest full window, and its lag after the final reversal.

    The window ends at the newest rotation (centre = newest - ``window_years``).

    Returns
    -------
    dict
        As :func:`precursor_after_reversal`, plus ``newest_time`` (decimal year).
    """
    w = _check_window(window_years)
    time, value, _ = rotation_magnitude(series, kind)
    ok = np.isfinite(value)
    if not ok.any():
        raise ValueError("series: no rotation with a measured value; nothing to take a precursor from")
    newest = float(time[ok].max())
    lag = max(newest - w - float(reversal_time_decimal_year), 0.0)
    item = precursor_at(series, newest - w, kind=kind, window_years=w)
    item.update(reversal_time=float(reversal_time_decimal_year), lag_years=lag, notes=_lag_notes(lag),
                newest_time=newest)
    return item


def _final_reversal_time(result):
    """Decimal-year time of the final crossing of a ``find_reversals`` result, or None."""
    final = result.get("final") if isinstance(result, dict) else getattr(result, "final", None)
    if final is None:
        return None
    return float(final["time"] if isinstance(final, dict) else getattr(final, "time"))


def precursor_for_forecast(series, cycles, settings, reversal_settings=None, smoother=None) -> dict:
    """The precursor of the coming cycle from a PolarSeries and the cycle landmarks.

    At the last cycle minimum when the polar series covers its window; when
    the final polarity reversal of the dipole lies after that minimum (the next
    minimum still ahead), at ``settings.lag_years`` after the reversal, or from
    the newest full window (Kumar et al. 2021, arXiv:2101.05013: usable from
    about four years after the reversal).

    Parameters
    ----------
    series : xarray.Dataset
        A PolarSeries (:func:`pipeline.aggregator.polar_series`).
    cycles : list of dict
        :func:`pipeline.cycles.cycle_landmarks` (``minimum_time`` in decimal years).
    settings : pipeline.regression.ForecastSettings
        ``precursor_kind``, ``window_years``, ``lag_years``.
    reversal_settings : pipeline.reversal.ReversalSettings, optional
    smoother : pipeline.smoothing.Smoother, optional

    Returns
    -------
    dict
        ``precursor_gauss``, ``precursor_error_gauss``, ``route`` (``minimum`` or
        ``after_reversal``), ``minimum_time``, ``reversal_time``, ``data_date``
        (ISO date of the newest rotation), ``notes`` and the window details.

    Raises
    ------
    ValueError
        When no minimum is known or the series cannot give a precursor.
    """
    import dataclasses

    from pipeline.reversal import ReversalSettings, find_reversals
    from pipeline.timeutil import iso_date

    if not cycles:
        raise ValueError("no cycle minimum found; give a longer monthly sunspot series")
    minimum = cycles[-1]["minimum_time"]
    kind, w = settings.precursor_kind, settings.window_years
    time, value, _ = rotation_magnitude(series, kind)
    measured = np.isfinite(value)
    if not measured.any():
        raise ValueError("the polar series has no measured rotation")
    newest = float(time[measured].max())
    # only the epoch is needed here: no bootstrap
    rev_settings = dataclasses.replace(reversal_settings or ReversalSettings(), n_bootstrap=0)
    result = find_reversals(np.atleast_1d(decimal_year(series["rotation_time"].values)),
                            np.asarray(series["dipole_br_rotation_gauss"].values, dtype=np.float64),
                            rev_settings, smoother)
    reversal = _final_reversal_time(result)
    if reversal is not None and reversal > minimum:
        if settings.lag_years is None:
            item = latest_precursor(series, reversal, kind=kind, window_years=w)
        else:
            item = precursor_after_reversal(series, reversal, settings.lag_years, kind=kind, window_years=w)
        item["route"] = "after_reversal"
    else:
        if minimum + w > newest:
            raise ValueError(f"the polar series ends at {newest:.3f}, before the window of +-{w:g} yr around the "
                             f"last cycle minimum {minimum:.3f} is complete; wait for more data")
        item = precursor_at(series, minimum, kind=kind, window_years=w)
        item.update(route="minimum", notes=[])
    item.update(minimum_time=minimum, reversal_time=reversal, data_date=iso_date(float(newest)), kind=kind)
    return item
