"""Cycle activity of the synthetic star: cycle shapes, sunspot numbers, emergence laws.

Each cycle follows the shape of Hathaway, Wilson & Reichmann (1994, Solar
Physics 151, 177); emergence latitudes drift toward the equator through a
cycle (Hathaway 2011, Solar Physics 273, 221), tilts follow Joy's law
(e.g. Stenflo & Kosovichev 2012, ApJ 745, 129) and polarities Hale's rules
(Hale et al. 1919, ApJ 49, 153).  Times are decimal years unless a name says
otherwise.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

__all__ = ["HWR_C", "hwr_shape", "hwr_width_months", "hwr_parameters", "cycle_sunspot_number",
           "emergence_latitude_deg", "joy_tilt_deg", "smooth_13_month", "monthly_noise"]

#: Hathaway, Wilson & Reichmann 1994 (Solar Phys. 151, 177): fixed asymmetry parameter c (from memory)
HWR_C = 0.71


def hwr_shape(months_since_start, a: float, b_months: float, c: float = HWR_C) -> np.ndarray:
    """Hathaway-Wilson-Reichmann cycle shape (sunspot number).

    Parameters
    ----------
    months_since_start : array_like
        Time since the cycle's start ``t0``, months; the shape is 0 before it.
    a : float
        Amplitude parameter (sunspot number per month^3).
    b_months : float
        Rise-time parameter, months.
    c : float
        Asymmetry parameter.

    Notes
    -----
    ``F(t) = a (t - t0)^3 / (exp((t - t0)^2 / b^2) - c)``
    (Hathaway, Wilson & Reichmann 1994, Solar Physics 151, 177, eq. 1).
    """
    t = np.maximum(np.asarray(months_since_start, dtype=float), 0.0)
    with np.errstate(over="ignore"):
        # Hathaway, Wilson & Reichmann 1994, eq. 1
        return a * t ** 3 / (np.exp((t / b_months) ** 2) - c)


def hwr_width_months(a: float) -> float:
    """``b = 27.12 + 25.15 / (a 10^3)^(1/4)`` months (Hathaway 2015, Living Rev. Sol. Phys. 12, 4; from memory).

    Couples rise time to amplitude: big cycles rise faster (the Waldmeier effect).
    """
    return 27.12 + 25.15 / (a * 1.0e3) ** 0.25


@lru_cache(maxsize=None)
def _peak_of_unit_shape(c: float = HWR_C) -> tuple[float, float]:
    """``x_m`` maximising ``x^3 / (exp(x^2) - c)`` and the maximum ``g_m``."""
    from scipy.optimize import minimize_scalar

    res = minimize_scalar(lambda x: -x ** 3 / (np.exp(x * x) - c), bounds=(0.3, 3.0), method="bounded",
                          options={"xatol": 1e-12})
    return float(res.x), float(-res.fun)


def hwr_parameters(peak_sunspot_number: float) -> tuple[float, float]:
    """``(a, b_months)`` of a cycle whose shape peaks at ``peak_sunspot_number``.

    Solves ``peak = a b^3 g_m`` together with :func:`hwr_width_months` by
    fixed-point iteration (converges in a few steps).
    """
    _, g_m = _peak_of_unit_shape()
    b = 48.0
    a = peak_sunspot_number / (b ** 3 * g_m)
    for _ in range(50):
        b = hwr_width_months(a)
        a_new = peak_sunspot_number / (b ** 3 * g_m)
        if abs(a_new - a) < 1e-14:
            break
        a = a_new
    return a, b


def cycle_sunspot_number(time_yr, start_yr: float, peak_sunspot_number: float) -> np.ndarray:
    """Sunspot number of one cycle at decimal years ``time_yr`` (HWR 1994 shape)."""
    a, b = hwr_parameters(peak_sunspot_number)
    months = (np.asarray(time_yr, dtype=float) - start_yr) * 12.0
    return hwr_shape(months, a, b)


def emergence_latitude_deg(years_since_start) -> np.ndarray:
    """Centroid |latitude| of emergence through a cycle, degrees.

    Notes
    -----
    ``lat = 28 deg exp(-(t - t0) / 90 months)`` (Hathaway 2011, Solar Physics
    273, 221; from memory).
    """
    t_months = np.maximum(np.asarray(years_since_start, dtype=float), 0.0) * 12.0
    return 28.0 * np.exp(-t_months / 90.0)  # Hathaway 2011


def joy_tilt_deg(latitude_deg, coefficient_deg: float = 32.1) -> np.ndarray:
    """Joy's-law tilt ``gamma = gamma_0 sin|lat|`` (degrees; Stenflo & Kosovichev 2012, ApJ 745, 129; from memory).

    Positive tilt puts the leading polarity closer to the equator.
    """
    return coefficient_deg * np.sin(np.deg2rad(np.abs(np.asarray(latitude_deg, dtype=float))))


def smooth_13_month(values) -> np.ndarray:
    """The tapered 13-month running mean of monthly values (NaN within 6 months of the ends).

    Notes
    -----
    ``R13_n = (R_(n-6)/2 + R_(n-5) + ... + R_(n+5) + R_(n+6)/2) / 12``
    (the standard smoothing of monthly sunspot numbers; common practice, no source).
    """
    x = np.asarray(values, dtype=float)
    w = np.ones(13)
    w[0] = w[-1] = 0.5
    w /= 12.0
    out = np.full(x.shape, np.nan)
    if x.size >= 13:
        out[6:-6] = np.convolve(x, w, mode="valid")
    return out


def monthly_noise(true_monthly, rng: np.random.Generator, *, scale: float = 1.5, floor: float = 2.0,
                  correlation: float = 0.5) -> np.ndarray:
    """Observed monthly sunspot numbers: truth plus AR(1) noise, clipped at zero.

    Notes
    -----
    Noise standard deviation ``scale sqrt(R) + floor``, month-to-month
    correlation ``correlation`` (an AR(1) process); monthly sunspot numbers
    scatter roughly as the square root of their level (common practice, no
    source).
    """
    r = np.asarray(true_monthly, dtype=float)
    z = rng.standard_normal(r.size)
    e = np.empty_like(z)
    prev = 0.0
    k = np.sqrt(1.0 - correlation ** 2)
    for i, zi in enumerate(z):
        prev = correlation * prev + k * zi
        e[i] = prev
    sd = scale * np.sqrt(np.maximum(r, 0.0)) + floor
    return np.maximum(r + sd * e, 0.0)
