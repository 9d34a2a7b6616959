"""Polarity-reversal epochs of the polar fields, with bootstrap intervals.

A reversal is a sign change of the smoothed series that persists:

1. The series (any irregular sampling, gaps allowed) is smoothed onto a
   regular grid of one Carrington rotation by the named smoother of
   :mod:`pipeline.smoothing` (default Gaussian, FWHM 6 rotations).
2. The grid splits into runs of one sign at its zero crossings (linear
   interpolation between grid points; across a gap between the nearest
   finite grid points).
3. Persistence rule: while any run is shorter than ``min_persistence_years``
   (default 0.4 yr) the shortest one is absorbed into its neighbours (its sign
   flipped).  What remains are runs of at least that length; each boundary
   between two of them is one reversal.  Its epoch is the median of the raw
   zero crossings between the last long run of the old sign and the first
   long run of the new one (an odd number of them), so noise or a ripple
   around a slow crossing neither adds reversals nor biases the epoch toward
   either end of the cluster.  Excursions at the ends of the data shorter than
   the persistence are not reported (they cannot be confirmed yet).
4. The final reversal is the last one: after it the sign holds to the end
   of the data.
5. Interval: a residual bootstrap (Efron & Tibshirani 1993, An Introduction
   to the Bootstrap, Chapman & Hall, ch. 9): residuals from the smooth are
   resampled (in moving blocks of ``bootstrap_block_samples`` to keep serial
   correlation; Kuensch 1989, Annals of Statistics 17, 1217), added back to
   the smooth, and steps 1-3 rerun; each reversal's interval is the
   percentile interval of the matched replicate epochs (same direction,
   nearest in time, within half the distance to the neighbouring reversals).
   Where the crossing falls in a sampling gap wider than 1.5 typical sample
   spacings the interval is widened to the gap's ends: the data only say it
   happened inside the gap.  With the ``"none"`` smoother the residuals are
   zero, so the interval is only that gap bracket.

The default persistence (0.4 yr) sits below the ~0.5 yr that a six-month
polarity episode still lasts after the default smoothing, and above the
length of the short runs that smoothed noise and the damped annual ripple
make near a slow crossing.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from pipeline.config import check_number
from pipeline.smoothing import Smoother, rotations_to_years, smoothing_matrix
from pipeline.timeutil import decimal_year, iso_date, to_datetime64

__all__ = ["ReversalSettings", "Crossing", "ReversalResult", "find_reversals", "persistent_crossings",
           "polar_reversals", "series_reversals", "band_reversals", "decimal_years_of"]


@dataclass(frozen=True)
class ReversalSettings:
    """How reversals are found (configuration section ``[reversals]``).

    Attributes
    ----------
    min_persistence_years : float
        A new sign must hold this long to count (years).
    confidence : float
        Nominal coverage of the intervals (0-1).
    n_bootstrap : int
        Bootstrap replicates (0: no bootstrap, the interval is the gap
        bracket only).
    bootstrap_block_samples : int
        Length of the moving blocks of residuals (samples; 1 = independent).
    seed : int
        Seed of the bootstrap's random generator (results are reproducible).
    grid_step_rotations : float
        Step of the smoothing grid (Carrington rotations).
    """

    min_persistence_years: float = 0.4
    confidence: float = 0.9
    n_bootstrap: int = 300
    bootstrap_block_samples: int = 1
    seed: int = 0
    grid_step_rotations: float = 1.0

    def __post_init__(self):
        check_number("reversals.min_persistence_years", self.min_persistence_years, lo=0.0)
        check_number("reversals.confidence", self.confidence, lo=0.0, hi=0.999, lo_open=True)
        check_number("reversals.n_bootstrap", self.n_bootstrap, lo=0, hi=100000, integer=True)
        check_number("reversals.bootstrap_block_samples", self.bootstrap_block_samples, lo=1, integer=True)
        check_number("reversals.seed", self.seed, lo=0, integer=True)
        check_number("reversals.grid_step_rotations", self.grid_step_rotations, lo=0.01, hi=13.0)


@dataclass(frozen=True)
class Crossing:
    """One persistent sign change.

    Attributes
    ----------
    time, low, high : float
        Epoch and interval bounds, decimal years.
    sign_after : int
        +1 or -1.
    support : float
        Fraction of bootstrap replicates that had this crossing (NaN without
        bootstrap); not part of the JSON object.
    """

    time: float
    low: float
    high: float
    sign_after: int
    support: float = math.nan

    @property
    def time_iso(self) -> str:
        """``YYYY-MM-DD`` of the epoch."""
        return iso_date(float(self.time))

    def to_dict(self) -> dict:
        """The issue's JSON object ``{time, low, high, time_iso, sign_after}``."""
        return {"time": round(float(self.time), 4), "low": round(float(self.low), 4),
                "high": round(float(self.high), 4), "time_iso": self.time_iso, "sign_after": int(self.sign_after)}


@dataclass(frozen=True)
class ReversalResult:
    """Every persistent crossing of one series and the final one."""

    crossings: tuple = field(default_factory=tuple)

    @property
    def final(self) -> Crossing | None:
        """The last crossing (the sign holds after it to the end of the data), or None."""
        return self.crossings[-1] if self.crossings else None

    def to_dict(self) -> dict:
        """``{"crossings": [...], "final": {...} or None}``."""
        return {"crossings": [c.to_dict() for c in self.crossings],
                "final": None if self.final is None else self.final.to_dict()}


def decimal_years_of(time) -> np.ndarray:
    """Decimal years from decimal-year numbers, datetime64 or ISO strings."""
    arr = np.asarray(time)
    if arr.dtype.kind in ("f", "i", "u"):
        return arr.astype(np.float64).ravel()
    return np.atleast_1d(decimal_year(to_datetime64(arr))).astype(np.float64).ravel()


def _signs(values):
    s = np.sign(values)
    # an exact zero keeps the previous sign (or the next one at the start)
    nz = np.flatnonzero(s)
    if nz.size == 0:
        return s
    idx = np.maximum.accumulate(np.where(s != 0, np.arange(s.size), -1))
    idx[idx < 0] = nz[0]
    return s[idx]


def persistent_crossings(grid_years, smooth_values, min_persistence_years: float):
    """Persistent sign changes of a smoothed series (see the module docstring).

    Parameters
    ----------
    grid_years : ndarray
        Increasing times, decimal years.
    smooth_values : ndarray
        Smoothed values there (NaN allowed: left out).
    min_persistence_years : float
        Minimum length of a run of one sign (years).

    Returns
    -------
    list of (float, int)
        ``(epoch in decimal years, sign after)``, in time order.
    """
    g = np.asarray(grid_years, float)
    v = np.asarray(smooth_values, float)
    ok = np.isfinite(g) & np.isfinite(v)
    g, v = g[ok], v[ok]
    if g.size < 2:
        return []
    s = _signs(v)
    if not s.any():
        return []
    k = np.flatnonzero(s[1:] != s[:-1])
    if k.size == 0:
        return []
    # linear interpolation of the zero between grid points k and k+1
    tc = g[k] + (g[k + 1] - g[k]) * v[k] / (v[k] - v[k + 1])
    bounds = np.concatenate([[g[0]], tc, [g[-1]]])
    run_sign = np.concatenate([[s[0]], s[k + 1]]).astype(int)
    run_len = np.diff(bounds)
    # merged runs: [first original run, last original run, sign, start, end]
    runs = [[i, i, run_sign[i], bounds[i], bounds[i + 1]] for i in range(run_sign.size)]
    while len(runs) > 1:
        lengths = [r[4] - r[3] for r in runs]
        j = int(np.argmin(lengths))
        if lengths[j] >= min_persistence_years:
            break
        if j == 0:
            nxt = runs[1]
            runs[0:2] = [[runs[0][0], nxt[1], nxt[2], runs[0][3], nxt[4]]]
        elif j == len(runs) - 1:
            prv = runs[j - 1]
            runs[j - 1:j + 1] = [[prv[0], runs[j][1], prv[2], prv[3], runs[j][4]]]
        else:
            prv, nxt = runs[j - 1], runs[j + 1]
            runs[j - 1:j + 2] = [[prv[0], nxt[1], prv[2], prv[3], nxt[4]]]
    out = []
    for a, b in zip(runs[:-1], runs[1:]):
        i = a[1]
        for m in range(a[1], a[0] - 1, -1):
            if run_sign[m] == a[2] and run_len[m] >= min_persistence_years:
                i = m
                break
        j = b[0]
        for m in range(b[0], b[1] + 1):
            if run_sign[m] == b[2] and run_len[m] >= min_persistence_years:
                j = m
                break
        cluster = tc[i:j] if j > i else tc[a[1]:a[1] + 1]
        out.append((float(np.median(cluster)), int(b[2])))
    return out


def _block_indices(rng, n, block, n_rep):
    if block <= 1 or n <= block:
        return rng.integers(0, n, size=(n_rep, n))
    nblocks = int(math.ceil(n / block))
    starts = rng.integers(0, n - block + 1, size=(n_rep, nblocks))
    idx = (starts[:, :, None] + np.arange(block)[None, None, :]).reshape(n_rep, -1)
    return idx[:, :n]


def _gap_bracket(t_samples, epoch):
    j = int(np.searchsorted(t_samples, epoch))
    lo = t_samples[max(j - 1, 0)]
    hi = t_samples[min(j, t_samples.size - 1)]
    return float(lo), float(hi)


def find_reversals(time, values, settings: ReversalSettings | None = None,
                   smoother: Smoother | None = None) -> ReversalResult:
    """Every persistent sign change of one series, the final one, and intervals.

    Parameters
    ----------
    time : array_like
        Decimal years, datetime64 or ISO strings; any order, irregular.
    values : array_like
        Polar field (gauss; any unit works), NaN for missing.
    settings : ReversalSettings, optional
    smoother : pipeline.smoothing.Smoother, optional
        Default: that of :class:`pipeline.aggregator.SeriesSettings` (Gaussian,
        FWHM 6 rotations).

    Returns
    -------
    ReversalResult
        ``.crossings`` (tuple of :class:`Crossing`), ``.final``, ``.to_dict()``.

    Notes
    -----
    Smooth ``s = W x`` (Nadaraya-Watson), persistent crossings of ``s``, and
    a residual (moving-block) bootstrap ``x* = W_t x + e*`` for the percentile
    intervals (Efron & Tibshirani 1993, ch. 9; Kuensch 1989, Ann. Stat. 17,
    1217); see the module docstring.
    """
    settings = settings or ReversalSettings()
    smoother = smoother or Smoother()
    t = decimal_years_of(time)
    x = np.asarray(values, dtype=np.float64).ravel()
    if t.size != x.size:
        raise ValueError(f"time and values: lengths {t.size} and {x.size} differ; give one value per time")
    ok = np.isfinite(t) & np.isfinite(x)
    t, x = t[ok], x[ok]
    order = np.argsort(t, kind="stable")
    t, x = t[order], x[order]
    if t.size < 3:
        return ReversalResult(())
    step = rotations_to_years(settings.grid_step_rotations)
    grid = np.arange(t[0], t[-1] + 0.5 * step, step)
    w_grid = smoothing_matrix(t, grid, smoother)
    s = w_grid @ x
    found = persistent_crossings(grid, s, settings.min_persistence_years)
    if not found:
        return ReversalResult(())
    spacing = float(np.median(np.diff(t))) if t.size > 1 else 0.0
    alpha = 1.0 - settings.confidence
    boot = [[] for _ in found]
    n_rep = settings.n_bootstrap
    if n_rep > 0:
        fit = smoothing_matrix(t, t, smoother) @ x
        resid = x - fit
        good = np.isfinite(resid)
        resid = resid[good] - resid[good].mean() if good.any() else np.zeros(1)
        rng = np.random.default_rng(settings.seed)
        idx = _block_indices(rng, resid.size, settings.bootstrap_block_samples, n_rep)
        x_star = np.where(np.isfinite(fit), fit, x)[None, :] + resid[idx[:, :t.size] % resid.size]
        s_star = x_star @ w_grid.T
        times = np.array([c[0] for c in found])
        half_gap = np.full(times.size, np.inf)
        if times.size > 1:
            d = np.diff(times) / 2.0
            half_gap = np.minimum(np.concatenate([[np.inf], d]), np.concatenate([d, [np.inf]]))
        for r in range(n_rep):
            rep = persistent_crossings(grid, s_star[r], settings.min_persistence_years)
            for k, (tk, sk) in enumerate(found):
                cand = [tr for tr, sr in rep if sr == sk and abs(tr - tk) < half_gap[k]]
                if cand:
                    boot[k].append(min(cand, key=lambda v: abs(v - tk)))
    crossings = []
    for (tk, sk), bt in zip(found, boot):
        if len(bt) >= 2:
            lo, hi = np.quantile(bt, [alpha / 2.0, 1.0 - alpha / 2.0])
            lo, hi = min(float(lo), tk), max(float(hi), tk)
        else:
            lo = hi = tk
        g_lo, g_hi = _gap_bracket(t, tk)
        if spacing > 0 and g_hi - g_lo > 1.5 * spacing:
            lo, hi = min(lo, g_lo), max(hi, g_hi)  # the crossing lies somewhere in a sampling gap
        support = len(bt) / n_rep if n_rep else math.nan
        crossings.append(Crossing(tk, lo, hi, sk, support))
    return ReversalResult(tuple(crossings))


def polar_reversals(time, north_br_gauss, south_br_gauss, settings: ReversalSettings | None = None,
                    smoother: Smoother | None = None) -> dict:
    """Reversals of north, south and the axial dipole ``(N - S)/2`` of one table.

    Parameters
    ----------
    time : array_like
        Decimal years, datetime64 or ISO strings.
    north_br_gauss, south_br_gauss : array_like
        Cap means, gauss (NaN where missing).

    Returns
    -------
    dict
        ``{"north": ReversalResult, "south": ..., "dipole": ...}``; the dipole
        uses the times where both poles have a value.
    """
    n = np.asarray(north_br_gauss, dtype=float)
    s = np.asarray(south_br_gauss, dtype=float)
    dipole = 0.5 * (n - s)  # axial dipole proxy (DESIGN.md)
    return {"north": find_reversals(time, n, settings, smoother),
            "south": find_reversals(time, s, settings, smoother),
            "dipole": find_reversals(time, dipole, settings, smoother)}


def series_reversals(series, settings: ReversalSettings | None = None, smoother: Smoother | None = None) -> dict:
    """:func:`polar_reversals` of a PolarSeries Dataset's per-rotation means.

    Uses ``rotation_time`` and ``north/south_br_rotation_gauss``; the smoother
    defaults to the one recorded in the Dataset's attributes.
    """
    if smoother is None:
        a = series.attrs
        try:
            smoother = Smoother(a["smoothing"], float(a["smoothing_width"]), a["smoothing_width_unit"],
                                float(a.get("max_gap_years", 2.0)))
        except KeyError:
            smoother = Smoother()
    return polar_reversals(series["rotation_time"].values, series["north_br_rotation_gauss"].values,
                           series["south_br_rotation_gauss"].values, settings, smoother)


def band_reversals(band_means: dict, settings: ReversalSettings | None = None,
                   smoother: Smoother | None = None) -> dict:
    """Reversal epochs of each band's cap mean (from :func:`pipeline.aggregator.band_cap_means`).

    Returns
    -------
    dict
        ``{"north": {"55": ReversalResult, ...}, "south": {...}}`` keyed by
        the boundary in degrees as text.
    """
    out = {}
    for pole, bands in band_means.items():
        out[pole] = {f"{float(L):g}": find_reversals(da["rotation_time"].values, da.values, settings, smoother)
                     for L, da in bands.items()}
    return out
