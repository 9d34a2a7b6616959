"""Named low-pass smoothers for irregular, gappy time series.

Every smoother is a kernel-weighted local mean (a Nadaraya-Watson estimator;
Nadaraya 1964, Theory of Probability and its Applications 9, 141; Watson
1964, Sankhya A 26, 359) evaluated on any grid of times, so irregular
sampling and missing Carrington rotations need no interpolation first:

``s(g) = sum_i K(t_i - g) x_i / sum_i K(t_i - g)``

- ``"gaussian"``: ``K(u) = exp(-u^2 / (2 sigma^2))`` with
  ``sigma = FWHM / (2 sqrt(2 ln 2))``; its power transfer at frequency f is
  ``exp(-(2 pi f sigma)^2 / 2)`` for even sampling.
- ``"running"``: ``K(u) = 1`` for ``|u| <= width / 2`` (the running mean over
  ``width`` of time, e.g. N rotations).
- ``"none"``: linear interpolation between the samples (for series that are
  already smooth).

A grid time farther than ``max_gap_years / 2`` from every sample is NaN: a
gap wider than ``max_gap_years`` is left open rather than bridged.

Times are decimal years inside this module; widths may be given in
Carrington rotations (synodic period 27.2753 days; e.g. Ulrich & Boyden 2006,
Solar Physics 235, 17) or in years.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from pipeline.config import check_choice, check_number

__all__ = ["Smoother", "SMOOTHING_METHODS", "WIDTH_UNITS", "CARRINGTON_PERIOD_DAYS",
           "rotations_to_years", "smoothing_matrix", "smooth", "years_of_width"]

#: Mean synodic Carrington rotation period, days (Ulrich & Boyden 2006, Solar Physics 235, 17).
CARRINGTON_PERIOD_DAYS = 27.2753
_DAYS_PER_YEAR = 365.25  # Julian year
_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))

WIDTH_UNITS = ("rotations", "years")


def rotations_to_years(n_rotations: float) -> float:
    """Length of ``n_rotations`` Carrington rotations in (Julian) years."""
    return float(n_rotations) * CARRINGTON_PERIOD_DAYS / _DAYS_PER_YEAR


def years_of_width(width: float, unit: str) -> float:
    """A smoothing width in years, from rotations or years."""
    check_choice("series.smoothing_width_unit", unit, WIDTH_UNITS)
    return rotations_to_years(width) if unit == "rotations" else float(width)


def _gaussian_kernel(u_years: np.ndarray, width_years: float) -> np.ndarray:
    # FWHM = 2 sqrt(2 ln 2) sigma (the Gaussian's full width at half maximum)
    sigma = width_years / _FWHM_PER_SIGMA
    return np.exp(-0.5 * (u_years / sigma) ** 2)


def _running_kernel(u_years: np.ndarray, width_years: float) -> np.ndarray:
    return (np.abs(u_years) <= 0.5 * width_years + 1e-12).astype(np.float64)


_KERNELS = {"gaussian": _gaussian_kernel, "running": _running_kernel}

#: Named smoothers (``"none"`` is linear interpolation).
SMOOTHING_METHODS = tuple(sorted([*_KERNELS, "none"]))


@dataclass(frozen=True)
class Smoother:
    """A named smoother and its width.

    Attributes
    ----------
    method : str
        ``"gaussian"`` (width = FWHM), ``"running"`` (width = full window) or
        ``"none"``.
    width : float
        Width in ``width_unit``.
    width_unit : str
        ``"rotations"`` (Carrington rotations) or ``"years"``.
    max_gap_years : float
        Grid points farther than half this from every sample are NaN (years).
    """

    method: str = "gaussian"
    width: float = 6.0
    width_unit: str = "rotations"
    max_gap_years: float = 2.0

    def __post_init__(self):
        check_choice("series.smoothing", self.method, SMOOTHING_METHODS)
        check_number("series.smoothing_width", self.width, lo=0.0, lo_open=True)
        check_choice("series.smoothing_width_unit", self.width_unit, WIDTH_UNITS)
        check_number("series.max_gap_years", self.max_gap_years, lo=0.0, lo_open=True)

    @property
    def width_years(self) -> float:
        """The width in years."""
        return years_of_width(self.width, self.width_unit)

    def describe(self) -> str:
        """One line for Dataset attributes and reports."""
        if self.method == "none":
            return "none (linear interpolation)"
        what = "FWHM" if self.method == "gaussian" else "window"
        return f"{self.method} {what} {self.width:g} {self.width_unit}"


def smoothing_matrix(t_years: np.ndarray, grid_years: np.ndarray, smoother: Smoother) -> np.ndarray:
    """Linear operator ``W`` with ``smooth(x) = W @ x`` (rows: grid, columns: samples).

    Rows of grid points that the gap rule leaves open are all NaN.

    Parameters
    ----------
    t_years : ndarray
        Sample times, decimal years, finite (any order).
    grid_years : ndarray
        Where to evaluate, decimal years.
    smoother : Smoother

    Notes
    -----
    Nadaraya-Watson weights ``W_gi = K(t_i - g) / sum_j K(t_j - g)``
    (Nadaraya 1964, Theory Probab. Appl. 9, 141; Watson 1964, Sankhya A 26,
    359); for ``"none"`` the rows hold linear-interpolation weights.
    """
    t = np.asarray(t_years, dtype=np.float64)
    g = np.asarray(grid_years, dtype=np.float64)
    w = np.zeros((g.size, t.size))
    if t.size == 0:
        return np.full((g.size, 0), np.nan)
    if smoother.method == "none":
        order = np.argsort(t, kind="stable")
        ts = t[order]
        j = np.clip(np.searchsorted(ts, g, side="right") - 1, 0, max(ts.size - 2, 0))
        if ts.size == 1:
            w[:, order[0]] = 1.0
        else:
            span = ts[j + 1] - ts[j]
            frac = np.where(span > 0, (g - ts[j]) / np.where(span > 0, span, 1.0), 0.0)
            inside = (g >= ts[0]) & (g <= ts[-1])
            rows = np.arange(g.size)
            w[rows, order[j]] = 1.0 - frac
            w[rows, order[j + 1]] += frac
            w[~inside] = np.nan
    else:
        # Nadaraya (1964) / Watson (1964) kernel-weighted mean
        k = _KERNELS[smoother.method](g[:, None] - t[None, :], smoother.width_years)
        total = k.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            w = k / total[:, None]
        w[total <= 0] = np.nan
    nearest = np.min(np.abs(g[:, None] - t[None, :]), axis=1)
    w[nearest > 0.5 * smoother.max_gap_years] = np.nan
    return w


def smooth(t_years, values, grid_years, smoother: Smoother | None = None) -> np.ndarray:
    """Smooth an irregular series onto a grid of times.

    Parameters
    ----------
    t_years : array_like
        Sample times, decimal years.
    values : array_like
        Sample values (any unit; NaN samples are left out).
    grid_years : array_like
        Output times, decimal years.
    smoother : Smoother, optional
        Default: Gaussian, FWHM 6 rotations.

    Returns
    -------
    ndarray
        Smoothed values on the grid, same unit as ``values``; NaN where the
        gap rule leaves the grid open or no sample is finite.

    Notes
    -----
    ``s(g) = sum_i K(t_i - g) x_i / sum_i K(t_i - g)`` (Nadaraya 1964;
    Watson 1964); see the module docstring.
    """
    smoother = smoother or Smoother()
    t = np.asarray(t_years, dtype=np.float64).ravel()
    x = np.asarray(values, dtype=np.float64).ravel()
    if t.shape != x.shape:
        raise ValueError(f"t_years and values: lengths {t.size} and {x.size} differ; give one value per time")
    ok = np.isfinite(t) & np.isfinite(x)
    g = np.asarray(grid_years, dtype=np.float64)
    if not ok.any():
        return np.full(g.shape, np.nan)
    w = smoothing_matrix(t[ok], g.ravel(), smoother)
    return (w @ x[ok]).reshape(g.shape)
