"""The polar-field precursor of the next cycle, from a PolarSeries.

At a cycle minimum the precursor is the mean, over a window of +-0.5 year
(default) centred on the minimum, of the per-rotation magnitude of the axial
dipole proxy |(north - south)/2| (``kind="dipole"``) or of the mean of the two
hemispheres' magnitudes (|north| + |south|)/2 (``kind="hemispheres"``), in
gauss, with its standard error.  Before the minimum is reached, the same
window mean at a chosen lag after the final polarity reversal stands in for
it; the polar precursor becomes usable from about four years after the
reversal (Kumar et al. 2021).

Phase (issue 10): every precursor has one, ``minimum`` (the window centred
on a cycle minimum) or ``reversal+L`` (the window centred L years after the
cycle's final dipole reversal).  :func:`choose_phase` picks it from the
final reversal, the current cycle minimum with its status and the end of the
data (``"auto"``, or an explicit phase), and :func:`precursor_at_phase`
takes the window mean there.  A window counts only once it is complete
(centre + half-width <= the newest data).

The series is an ``xarray.Dataset`` as made by ``pipeline.aggregator`` (see
the shared interfaces): coordinate ``rotation_time`` (datetime64) on dimension
``rotation`` and variables ``north_br_rotation_gauss``,
``south_br_rotation_gauss``, ``dipole_br_rotation_gauss`` with their
``*_rotation_error_gauss`` (optional).
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field

import numpy as np

from pipeline.timeutil import decimal_year

__all__ = [
    "AUTO_PHASE",
    "DEFAULT_LAGS_YEARS",
    "KNOWN_MINIMUM_STATUSES",
    "PhaseChoice",
    "check_phase_request",
    "check_lags_years",
    "phase_lag_years",
    "choose_phase",
    "precursor_at_phase",
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


# ---- phase: which window the precursor is taken from (issue 10) ------------------------------------------

#: ``[forecast] phase = "auto"``: the phase is chosen from where the data stand (:func:`choose_phase`)
AUTO_PHASE = "auto"
#: default ``[forecast] lags_years``: the lags after the final reversal that ``"auto"`` may take (years)
DEFAULT_LAGS_YEARS = (2.0, 3.0, 4.0, 5.0, 6.0)
#: statuses of a cycle minimum (:func:`pipeline.cycles.current_minimum`) that make it *known* to ``"auto"``;
#: a ``pending`` candidate may still move, so it does not count
KNOWN_MINIMUM_STATUSES = ("confirmed", "pinned")


def check_phase_request(name: str, value) -> str:
    """Validate a requested phase: ``"auto"`` or a phase, returned in its canonical spelling.

    Parameters
    ----------
    name : str
        The dotted key or option named in the message (``forecast.phase``, ``--phase``).
    value : str
        ``auto``, ``minimum`` or ``reversal+L`` (:func:`pipeline.regression.parse_phase`).

    Raises
    ------
    pipeline.config.ConfigError
        Naming the key, the bad value and the valid forms.
    """
    from pipeline.config import ConfigError
    from pipeline.regression import PHASE_FORMS, parse_phase

    if isinstance(value, str) and value.strip().lower() == AUTO_PHASE:
        return AUTO_PHASE
    try:
        return parse_phase(value)
    except ValueError:
        raise ConfigError(f"{name}: got {value!r}; valid phases are 'auto', {' or '.join(PHASE_FORMS)}") from None


def check_lags_years(name: str, value) -> tuple:
    """Validate the lags ``"auto"`` may take: a non-empty list of years in [0, 15], returned sorted, unique.

    Raises
    ------
    pipeline.config.ConfigError
        Naming the key, the bad value and what is allowed.
    """
    from pipeline.config import ConfigError

    items = list(value) if isinstance(value, (list, tuple)) else None
    if not items or not all(isinstance(v, numbers.Real) and not isinstance(v, bool) for v in items):
        raise ConfigError(f"{name}: got {value!r}; expected a non-empty list of lags in years, e.g. [2, 3, 4, 5, 6]")
    lags = [float(v) for v in items]
    bad = [v for v in lags if not (math.isfinite(v) and 0.0 <= v <= 15.0)]
    if bad:
        raise ConfigError(f"{name}: got {value!r}; every lag must lie in [0, 15] years after the reversal")
    return tuple(sorted(set(lags)))


def phase_lag_years(phase: str) -> float | None:
    """The lag L of a ``reversal+L`` phase (years); None for ``minimum``."""
    from pipeline.regression import DEFAULT_PHASE, parse_phase

    canonical = parse_phase(phase)
    return None if canonical == DEFAULT_PHASE else float(canonical.split("+", 1)[1])


@dataclass(frozen=True)
class PhaseChoice:
    """The phase a precursor is taken at, or why none can be.

    Attributes
    ----------
    requested : str
        ``"auto"`` or the explicit phase asked for.
    phase : str or None
        ``"minimum"`` or ``"reversal+L"``; None when no window can be taken.
    lag_years : float or None
        L of ``reversal+L`` (years); None at the minimum or when unavailable.
    center_time : float or None
        Centre of the window (decimal year).
    reason : str or None
        One line: why no phase could be taken (None when one was).
    notes : tuple of str
        How the choice was made (e.g. a pending minimum passed over).
    """

    requested: str
    phase: str | None
    lag_years: float | None
    center_time: float | None
    reason: str | None
    notes: tuple = field(default_factory=tuple)

    @property
    def available(self) -> bool:
        """True when a phase was chosen."""
        return self.phase is not None

    def to_dict(self) -> dict:
        return {"requested": self.requested, "phase": self.phase, "lag_years": self.lag_years,
                "center_time": self.center_time, "reason": self.reason, "notes": list(self.notes)}


def _minimum_parts(minimum):
    """``(time or None, status or None)`` of None, a ``(time, status)`` pair or a ``current_minimum`` dict."""
    if minimum is None:
        return None, None
    if isinstance(minimum, dict):
        time, status = minimum.get("time"), minimum.get("status")
    else:
        time, status = minimum
    return (None if time is None else float(time)), status


def choose_phase(final_reversal_time, minimum, data_end, lags_years=DEFAULT_LAGS_YEARS, window_years: float = 0.5,
                 requested: str = AUTO_PHASE) -> PhaseChoice:
    """Choose the phase of the precursor from where the data stand.

    Parameters
    ----------
    final_reversal_time : float or None
        The final dipole reversal (decimal year; :mod:`pipeline.reversal`), None when none is found.
    minimum : None, (float or None, str) or dict
        The current cycle minimum and its status (``confirmed``, ``pending``,
        ``pinned`` or ``unresolved``), e.g. :func:`pipeline.cycles.current_minimum`.
    data_end : float or None
        Time of the newest measured sample of the polar series (decimal year).
    lags_years : sequence of float
        The lags ``"auto"`` may take (years after the final reversal).
    window_years : float
        Half-width of the precursor window (years).
    requested : str
        ``"auto"`` (default) or an explicit phase (``minimum``, ``reversal+L``).

    Returns
    -------
    PhaseChoice
        With ``reason`` set (and ``phase`` None) when no window can be taken.

    Notes
    -----
    ``"auto"``: the phase ``minimum`` once the minimum that follows the
    final dipole reversal is known (status ``confirmed`` or ``pinned``; a
    ``pending`` candidate may still move) and its window is complete;
    otherwise ``reversal+L`` with the largest L of ``lags_years`` whose window
    is complete, :math:`t_{rev} + L + w \\le t_{end}`.  With no reversal in
    the polar series a known minimum still gives the phase ``minimum``.  An
    explicit phase is taken as asked (a ``minimum`` request takes the current
    minimum whatever its status, and says so when it is pending) once its
    window is complete.  The window must end before the newest data so that
    later data can add no rotation to it (common practice, no source).
    """
    w = _check_window(window_years)
    want = check_phase_request("phase", requested)
    lags = check_lags_years("lags_years", lags_years)
    rev = None if final_reversal_time is None else float(final_reversal_time)
    min_time, status = _minimum_parts(minimum)
    if data_end is None or not math.isfinite(float(data_end)):
        return PhaseChoice(want, None, None, None, "the polar series has no measured rotation; nothing to take a "
                                                   "precursor from")
    end = float(data_end)

    def complete(center: float) -> bool:
        return center + w <= end

    def at_minimum(notes=()) -> PhaseChoice:
        return PhaseChoice(want, "minimum", None, min_time, None, tuple(notes))

    def needs(center: float, what: str) -> str:
        return (f"the window of +-{w:g} yr around {what} ({center:.3f}) is not complete: the polar series ends at "
                f"{end:.3f} and needs data to {center + w:.3f}; wait for more data")

    if want == "minimum":
        if min_time is None:
            return PhaseChoice(want, None, None, None, f"no cycle minimum is known in the sunspot series (status "
                                                       f"{status or 'unresolved'}); the phase 'minimum' needs one")
        if not complete(min_time):
            return PhaseChoice(want, None, None, min_time, needs(min_time, f"the {status} cycle minimum"))
        notes = []
        if status not in KNOWN_MINIMUM_STATUSES:
            notes.append(f"the cycle minimum at {min_time:.3f} is {status}: it may move as later sunspot data "
                         f"arrive, and the forecast with it")
        return at_minimum(notes)
    if want != AUTO_PHASE:
        lag = phase_lag_years(want)
        if rev is None:
            return PhaseChoice(want, None, lag, None, f"no dipole reversal in the polar series (to {end:.3f}); "
                                                      f"the phase {want!r} needs the final reversal")
        if not complete(rev + lag):
            return PhaseChoice(want, None, lag, rev + lag, needs(rev + lag, f"{lag:g} yr after the final reversal "
                                                                            f"at {rev:.3f}"))
        return PhaseChoice(want, want, lag, rev + lag, None)

    # "auto"
    follows = min_time is not None and (rev is None or min_time > rev)
    known = follows and status in KNOWN_MINIMUM_STATUSES
    notes = []
    if known and complete(min_time):
        if rev is None:
            notes.append(f"no dipole reversal in the polar series (to {end:.3f}); the precursor is taken at the "
                         f"{status} cycle minimum at {min_time:.3f}")
        return at_minimum(notes)
    if known:
        notes.append(f"the {status} cycle minimum at {min_time:.3f} is known, but its window of +-{w:g} yr is not "
                     f"complete yet (the polar series ends at {end:.3f})")
    elif follows:
        notes.append(f"the cycle minimum candidate at {min_time:.3f} is {status}, not yet known (confirmed or "
                     f"pinned); the precursor is taken after the final reversal until it is")
    if rev is None:
        reason = (f"no dipole reversal in the polar series (to {end:.3f}) and no known cycle minimum with a "
                  f"complete window; give a longer series")
        if known:
            reason = needs(min_time, f"the {status} cycle minimum") + "; and no dipole reversal in the polar series"
        return PhaseChoice(want, None, None, None, reason, tuple(notes))
    ready = [lag for lag in lags if complete(rev + lag)]
    if not ready:
        first = lags[0]
        return PhaseChoice(want, None, None, None,
                           f"no configured lag after the final dipole reversal at {rev:.3f} has a complete window "
                           f"yet (lags {', '.join(f'{v:g}' for v in lags)} yr; the polar series ends at {end:.3f}, "
                           f"reversal+{first:g} needs data to {rev + first + w:.3f})", tuple(notes))
    from pipeline.regression import reversal_phase

    lag = max(ready)
    return PhaseChoice(want, reversal_phase(lag), lag, rev + lag, None, tuple(notes))


def precursor_at_phase(series, choice: PhaseChoice, reversal_time_decimal_year=None, *, kind: str = "dipole",
                       window_years: float = 0.5) -> dict:
    """The precursor at a chosen phase.

    Parameters
    ----------
    series : xarray.Dataset
        PolarSeries (or a series table made into one, :func:`pipeline.asof.series_from_table`).
    choice : PhaseChoice
        From :func:`choose_phase`, with a phase.
    reversal_time_decimal_year : float, optional
        The final dipole reversal (needed for ``reversal+L``).
    kind, window_years
        As :func:`precursor_at`.

    Returns
    -------
    dict
        The :func:`precursor_at` keys plus ``phase``, ``route`` (``minimum`` or
        ``after_reversal``), ``lag_years`` (None at the minimum),
        ``reversal_time`` and ``notes`` (the Kumar et al. 2021 caution under
        about 4 years).

    Raises
    ------
    ValueError
        When the choice has no phase (its reason), or no rotation of the
        window has a measured value.
    """
    if not choice.available:
        raise ValueError(choice.reason or "no phase chosen")
    rev = None if reversal_time_decimal_year is None else float(reversal_time_decimal_year)
    if choice.phase == "minimum":
        item = precursor_at(series, choice.center_time, kind=kind, window_years=window_years)
        item.update(route="minimum", lag_years=None, reversal_time=rev, notes=[])
    else:
        if rev is None:
            raise ValueError(f"reversal_time_decimal_year: needed for the phase {choice.phase!r}")
        item = precursor_after_reversal(series, rev, choice.lag_years, kind=kind, window_years=window_years)
        item["route"] = "after_reversal"
    item.update(phase=choice.phase, kind=kind)
    return item
