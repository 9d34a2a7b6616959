"""Choosing the span and seed of the committed demo archive (demo_fits/).

The demo span starts 5 years before a cycle minimum in the 2030s and ends
1.25 years after the next minimum, so it holds the declining phase of one
cycle, a minimum, a whole cycle with both poles' reversals, and the last
minimum with the polar field around it (at least one and a half cycles).
A seed qualifies when each pole reverses inside the span and the next
cycle's amplitude is not an outlier of the calibration relation: its
residual from the ordinary-least-squares line of the calibration table is
within one prediction standard error (so a 95% forecast interval of that
relation should contain it).  The criterion uses the calibration rows at the
phase ``minimum`` only (like is regressed on like).
"""

from __future__ import annotations

import numpy as np

from pipeline.synth.star import StarHistory, StarParameters, star_history
from pipeline.synth.truth import calibration_rows, cycle_landmarks_truth, precursor_gauss, sign_changes_yr

__all__ = ["demo_span_yr", "calibration_residual", "qualify_seed"]


def demo_span_yr(history: StarHistory, earliest_start_yr: float = 2030.0, lead_yr: float = 5.0,
                 tail_yr: float = 1.25) -> tuple:
    """``(start, end, minimum_a, minimum_b)`` in decimal years, or None when no such span exists."""
    lms = cycle_landmarks_truth(history)
    for a, b in zip(lms, lms[1:]):
        if a["minimum_time"] - lead_yr >= earliest_start_yr:
            return a["minimum_time"] - lead_yr, b["minimum_time"] + tail_yr, a["minimum_time"], b["minimum_time"]
    return None


def calibration_residual(rows: list, precursor: float, amplitude: float) -> dict:
    """Residual of ``(precursor, amplitude)`` from the OLS line of a calibration table.

    Notes
    -----
    Prediction standard error ``s sqrt(1 + 1/n + (x - xbar)^2 / Sxx)`` of
    simple linear regression (e.g. Montgomery, Peck & Vining 2012,
    Introduction to Linear Regression Analysis, eq. 2.45).
    """
    x = np.array([r["precursor"] for r in rows], float)
    y = np.array([r["amplitude"] for r in rows], float)
    n = x.size
    slope, intercept = np.polyfit(x, y, 1)
    resid = y - (intercept + slope * x)
    s = np.sqrt((resid ** 2).sum() / (n - 2))
    sxx = ((x - x.mean()) ** 2).sum()
    se_pred = s * np.sqrt(1 + 1 / n + (precursor - x.mean()) ** 2 / sxx)
    predicted = intercept + slope * precursor
    return dict(slope=float(slope), intercept=float(intercept), residual_sd=float(s), predicted=float(predicted),
                prediction_se=float(se_pred), residual=float(amplitude - predicted),
                z=float((amplitude - predicted) / se_pred), correlation=float(np.corrcoef(x, y)[0, 1]), n=n)


def qualify_seed(seed: int, params: StarParameters = StarParameters()) -> dict | None:
    """The demo span of a seed and why it qualifies (or None when it has no span)."""
    h = star_history(seed, params)
    span = demo_span_yr(h)
    if span is None:
        return None
    y0, y1, m_a, m_b = span
    ty = h.time_yr
    sel = (ty >= y0) & (ty <= y1)
    rev_n = sign_changes_yr(ty[sel], h.north_gauss[sel])
    rev_s = sign_changes_yr(ty[sel], h.south_gauss[sel])
    rows = calibration_rows(h, y0, lags_years=())  # the phase 'minimum': the precursor below is taken there
    last = [lm for lm in cycle_landmarks_truth(h) if abs(lm["minimum_time"] - m_b) < 1e-9][0]
    precursor, _ = precursor_gauss(h, m_b)
    res = calibration_residual(rows, precursor, last["maximum_value"])
    return dict(seed=seed, start_yr=y0, end_yr=y1, minima=(m_a, m_b), reversals_north=rev_n, reversals_south=rev_s,
                precursor=precursor, next_amplitude=last["maximum_value"], **res,
                ok=bool(rev_n and rev_s and abs(res["z"]) <= 1.0))
