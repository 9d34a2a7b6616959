"""Polarity-reversal epochs of the polar fields, with honest intervals.

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

Intervals (every one at the level ``confidence``, default 0.9)
--------------------------------------------------------------
**Noise.**  A moving-block residual bootstrap (Efron & Tibshirani 1993, An
Introduction to the Bootstrap, ch. 9; Kuensch 1989, Ann. Stat. 17, 1217):

- the residuals are taken about a *less-smoothed* fit (the series smoother at
  ``noise_fit_width_factor`` of its width, default one half), so that the
  replicates' own truth ``W f`` is close to the estimate's and the
  replicates are not smoothed twice;
- they are rescaled by ``sqrt(n / (n - tr(2H - H H^T)))`` for the variance the
  fit absorbed (the error degrees of freedom of a linear smoother ``H``;
  Hastie & Tibshirani 1990, Generalized Additive Models, sec. 3.5);
- they are resampled in moving blocks at least ``min_block_rotations`` long
  (default 13, one year of rotations, so the annual B0 ripple and the
  fill-induced errors stay inside one block) and at least the residuals'
  integrated autocorrelation time ``1 + 2 sum rho_k`` (summed while
  ``rho_k > 0``; Geyer 1992, Statist. Sci. 7, 473);
- correlated one-sigma errors given with the series (the B0 fill's errors,
  which the residuals cannot see because neighbouring fills share their
  neighbours) enter each replicate as ``e_k z_j`` with one standard normal
  ``z_j`` per half-year;
- each replicate is smoothed, its persistent crossings found, and each is
  matched to a crossing of the data (same direction, nearest, within half
  the distance to the neighbouring crossings).  ``support`` is the fraction
  of replicates with a match.  The interval is the *basic* bootstrap
  interval ``[t - q_hi, t - q_lo]`` of the offsets ``d = t* - t_ref`` of the
  replicate epochs from the replicates' truth ``t_ref`` (the crossing of
  the smoothed fit) (Davison & Hinkley 1997, Bootstrap Methods and their
  Application, eq. 5.6).  Nothing clamps it to the point estimate.
- A crossing inside a sampling gap wider than 1.5 typical spacings has its
  noise interval widened to the gap's ends: the data only say it happened
  inside the gap.
- Fewer than two matched replicates, or replicates that do not vary, leave
  the crossing ``resolved = False`` with a reason; its interval is then the
  systematic one widened to at least half the persistence on each side
  (the persistence rule cannot place a crossing more finely), never a point.

**Systematics.**  The same crossing found by a small ensemble of defensible
analysis choices, each re-run on the same data (members): the smoothing
width at one half and twice the default (here), and, from the measured
records, the other applicable B0 methods, the cap boundary at +-5 deg and
the other zero-offset treatment (:mod:`pipeline.systematics`).  The
systematic interval is the range of the point estimate and the members'
matched epochs.

**Total.**  ``low = t - sqrt(a_n^2 + a_s^2)`` and ``high = t + sqrt(b_n^2 +
b_s^2)``, with ``a, b`` the lower and upper half-widths of the noise (n) and
systematic (s) intervals: independent components combined in quadrature
(JCGM 100:2008, Guide to the Expression of Uncertainty in Measurement,
sec. 5.1.2), treating the ensemble's range as a half-width at the same
level; the total always holds both parts.

The default persistence (0.4 yr) sits below the ~0.5 yr that a six-month
polarity episode still lasts after the default smoothing, and above the
length of the short runs that smoothed noise and the damped annual ripple
make near a slow crossing.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np

from pipeline.config import check_number
from pipeline.smoothing import Smoother, rotations_to_years, smoothing_matrix
from pipeline.timeutil import decimal_year, iso_date, to_datetime64

__all__ = ["ReversalSettings", "Crossing", "ReversalResult", "find_reversals", "persistent_crossings",
           "polar_reversals", "series_reversals", "band_reversals", "decimal_years_of",
           "correlation_time_samples", "held_out_fit", "combine_half_widths", "smoothing_members", "series_smoother"]

#: Length of the blocks over which one standard normal scales the correlated (fill) errors, years.
CORRELATED_ERROR_BLOCK_YEARS = 0.5


@dataclass(frozen=True)
class ReversalSettings:
    """How reversals are found (configuration section ``[reversals]``).

    Attributes
    ----------
    min_persistence_years : float
        A new sign must hold this long to count (years).
    confidence : float
        Level of every interval (0-1), stated beside each as ``level``.
    n_bootstrap : int
        Bootstrap replicates (0: no bootstrap; the crossings are then
        ``resolved = False``).
    min_block_rotations : float
        Shortest moving block of residuals (Carrington rotations); the block
        is also at least the residuals' correlation time.
    noise_fit_width_factor : float
        FWHM of the held-out local-quadratic fit the residuals are taken
        about, as a multiple of the series smoother's width.
    systematics : bool
        Re-run the smoothing-width members (and take the members given by
        the caller) for the systematic part of the interval.
    seed : int
        Seed of the bootstrap's random generator (results are reproducible).
    grid_step_rotations : float
        Step of the smoothing grid (Carrington rotations).
    """

    min_persistence_years: float = 0.4
    confidence: float = 0.9
    n_bootstrap: int = 300
    min_block_rotations: float = 13.0
    noise_fit_width_factor: float = 2.0
    systematics: bool = True
    seed: int = 0
    grid_step_rotations: float = 1.0

    def __post_init__(self):
        from pipeline.config import ConfigError

        check_number("reversals.min_persistence_years", self.min_persistence_years, lo=0.0)
        check_number("reversals.confidence", self.confidence, lo=0.0, hi=0.999, lo_open=True)
        check_number("reversals.n_bootstrap", self.n_bootstrap, lo=0, hi=100000, integer=True)
        check_number("reversals.min_block_rotations", self.min_block_rotations, lo=1.0, hi=200.0)
        check_number("reversals.noise_fit_width_factor", self.noise_fit_width_factor, lo=0.5, hi=10.0)
        if not isinstance(self.systematics, bool):
            raise ConfigError(f"reversals.systematics: got {self.systematics!r}; expected true or false")
        check_number("reversals.seed", self.seed, lo=0, integer=True)
        check_number("reversals.grid_step_rotations", self.grid_step_rotations, lo=0.01, hi=13.0)


def _r4(v):
    return None if v is None or not math.isfinite(v) else round(float(v), 4)


@dataclass(frozen=True)
class Crossing:
    """One persistent sign change and its intervals.

    Attributes
    ----------
    time, low, high : float
        Epoch and total interval bounds, decimal years.
    sign_after : int
        +1 or -1.
    support : float
        Fraction of bootstrap replicates with a matching crossing (NaN without
        bootstrap).
    noise_low, noise_high : float
        Bootstrap (noise) interval, decimal years (NaN when not resolved).
    systematic_low, systematic_high : float
        Range of the point estimate and the ensemble members' epochs.
    members : tuple of (str, float or None)
        Each ensemble member's matched epoch (None: no matching crossing).
    resolved : bool
        False when the replicates cannot place the crossing (``reason`` says why).
    reason : str or None
    level : float
        Level of the intervals (the settings' ``confidence``).
    """

    time: float
    low: float
    high: float
    sign_after: int
    support: float = math.nan
    noise_low: float = math.nan
    noise_high: float = math.nan
    systematic_low: float = math.nan
    systematic_high: float = math.nan
    members: tuple = ()
    resolved: bool = True
    reason: str | None = None
    level: float = 0.9

    @property
    def time_iso(self) -> str:
        """``YYYY-MM-DD`` of the epoch."""
        return iso_date(float(self.time))

    def to_dict(self) -> dict:
        """The JSON object of one crossing (decimal years; every interval with its ``level``)."""
        level = round(float(self.level), 4)
        noise = None
        if self.resolved and math.isfinite(self.noise_low):
            noise = {"low": _r4(self.noise_low), "high": _r4(self.noise_high), "level": level}
        return {"time": _r4(self.time), "low": _r4(self.low), "high": _r4(self.high), "level": level,
                "time_iso": self.time_iso, "sign_after": int(self.sign_after),
                "resolved": bool(self.resolved), "reason": self.reason,
                "support": None if not math.isfinite(self.support) else round(float(self.support), 3),
                "noise_interval": noise,
                "systematic_interval": {"low": _r4(self.systematic_low), "high": _r4(self.systematic_high),
                                        "level": level},
                "ensemble": {name: _r4(v) for name, v in self.members}}


@dataclass(frozen=True)
class ReversalResult:
    """Every persistent crossing of one series and the final one."""

    crossings: tuple = field(default_factory=tuple)
    level: float = 0.9
    block_rotations: float = math.nan
    members_skipped: tuple = ()

    @property
    def final(self) -> Crossing | None:
        """The last crossing (the sign holds after it to the end of the data), or None."""
        return self.crossings[-1] if self.crossings else None

    def to_dict(self) -> dict:
        """``{"crossings": [...], "final": {...} or None, "level", "bootstrap_block_rotations", "members_skipped"}``."""
        return {"crossings": [c.to_dict() for c in self.crossings],
                "final": None if self.final is None else self.final.to_dict(),
                "level": round(float(self.level), 4),
                "bootstrap_block_rotations": None if not math.isfinite(self.block_rotations)
                else round(float(self.block_rotations), 1),
                "members_skipped": {name: why for name, why in self.members_skipped}}


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


def correlation_time_samples(residuals) -> float:
    """Integrated autocorrelation time of a series, in samples (>= 1).

    Notes
    -----
    ``tau = 1 + 2 sum_k rho_k`` over the initial run of positive sample
    autocorrelations (Geyer 1992, Statistical Science 7, 473, the initial
    positive sequence, taken here term by term).  White noise gives 1; an
    AR(1) process of coefficient phi gives ``(1 + phi) / (1 - phi)``.
    """
    r = np.asarray(residuals, dtype=float)
    r = r[np.isfinite(r)]
    n = r.size
    if n < 4:
        return 1.0
    r = r - r.mean()
    var = float(np.dot(r, r)) / n
    if var <= 0:
        return 1.0
    tau = 1.0
    for k in range(1, n // 2):
        rho = float(np.dot(r[:-k], r[k:])) / (n * var)
        if rho <= 0:
            break
        tau += 2.0 * rho
    return tau


def combine_half_widths(time, noise_low, noise_high, systematic_low, systematic_high):
    """Total interval from the noise and systematic intervals (quadrature of one-sided half-widths).

    Notes
    -----
    Independent components in quadrature (JCGM 100:2008, GUM, sec. 5.1.2).
    The total always holds both intervals.
    """
    a_n = max(time - noise_low, 0.0)
    b_n = max(noise_high - time, 0.0)
    a_s = max(time - systematic_low, 0.0)
    b_s = max(systematic_high - time, 0.0)
    low = min(noise_low, systematic_low, time - math.hypot(a_n, a_s))
    high = max(noise_high, systematic_high, time + math.hypot(b_n, b_s))
    return low, high


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


def _half_gaps(times):
    times = np.asarray(times, dtype=float)
    half_gap = np.full(times.size, np.inf)
    if times.size > 1:
        d = np.diff(times) / 2.0
        half_gap = np.minimum(np.concatenate([[np.inf], d]), np.concatenate([d, [np.inf]]))
    return half_gap


def _match(found, candidates):
    """For each found (epoch, sign), the nearest candidate epoch of the same sign within half the gap, or None."""
    half_gap = _half_gaps([c[0] for c in found])
    out = []
    for (tk, sk), hg in zip(found, half_gap):
        best = None
        for tr, sr in candidates:
            if sr == sk and abs(tr - tk) < hg and (best is None or abs(tr - tk) < abs(best - tk)):
                best = tr
        out.append(best)
    return out


def _clean(time, values, extra=None):
    t = decimal_years_of(time)
    x = np.asarray(values, dtype=np.float64).ravel()
    if t.size != x.size:
        raise ValueError(f"time and values: lengths {t.size} and {x.size} differ; give one value per time")
    e = None if extra is None else np.asarray(extra, dtype=np.float64).ravel()
    if e is not None and e.size != x.size:
        raise ValueError(f"correlated_error_gauss: length {e.size}, expected {x.size} (one per time)")
    ok = np.isfinite(t) & np.isfinite(x)
    t, x = t[ok], x[ok]
    order = np.argsort(t, kind="stable")
    if e is not None:
        e = e[ok][order]
        e = np.where(np.isfinite(e), e, 0.0)
    return t[order], x[order], e


def smoothing_members(smoother: Smoother) -> dict:
    """The smoothing-width members of the systematic ensemble: ``{name: Smoother}`` at x0.5 and x2."""
    if smoother.method == "none":
        return {}
    return {f"smoothing_width_x{f:g}": dataclasses.replace(smoother, width=smoother.width * f) for f in (0.5, 2.0)}


def _crossings_of(t, x, grid, smoother, min_persistence_years):
    if t.size < 3:
        return []
    s = smoothing_matrix(t, grid, smoother) @ x
    return persistent_crossings(grid, s, min_persistence_years)


def held_out_fit(t_years, values, hold_out_years: float, fwhm_years: float) -> np.ndarray:
    """Local-quadratic fit at each sample from the samples farther than ``hold_out_years`` from it.

    Parameters
    ----------
    t_years : ndarray
        Sample times, decimal years, increasing.
    values : ndarray
        Sample values (any unit), finite.
    hold_out_years : float
        Samples with ``|t_j - t_i| <= hold_out_years`` do not enter the fit at ``t_i``.
    fwhm_years : float
        FWHM of the Gaussian kernel weights (years).

    Returns
    -------
    ndarray
        The fit (NaN where too few samples are left).

    Notes
    -----
    Local polynomial regression (Fan & Gijbels 1996, Local Polynomial
    Modelling and its Applications, Chapman & Hall, ch. 3) with the
    neighbourhood of each point left out, as in leave-(2l+1)-out
    cross-validation under correlated errors (Chu & Marron 1991, Ann. Stat.
    19, 1906): the residual at ``t_i`` keeps the noise near ``t_i``, which a
    fit that saw it would have absorbed.
    """
    t = np.asarray(t_years, dtype=float)
    x = np.asarray(values, dtype=float)
    sig = fwhm_years / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    out = np.full(t.size, np.nan)
    for i in range(t.size):
        d = t - t[i]
        w = np.exp(-0.5 * (d / sig) ** 2) * (np.abs(d) > hold_out_years)
        if np.count_nonzero(w > 1e-12) < 4:
            continue
        X = np.stack([np.ones_like(d), d, d * d], axis=1)
        a = X.T @ (w[:, None] * X)
        try:
            out[i] = np.linalg.solve(a, X.T @ (w * x))[0]
        except np.linalg.LinAlgError:
            continue
    return out


def _noise_bootstrap(t, x, corr_err, grid, w_grid, found, settings, smoother):
    """Per found crossing: matched replicate offsets from the replicates' truth; the block (rotations)."""
    n_rep = settings.n_bootstrap
    if n_rep <= 0 or smoother.method == "none":
        return [None] * len(found), math.nan
    rot = rotations_to_years(1.0)
    width = smoother.width_years
    n = t.size
    spacing = float(np.median(np.diff(t))) if n > 1 else rot
    hold = 0.5 * width + 0.5 * rot
    fit = resid = None
    for _ in range(2):  # second pass: hold out the residuals' correlation time as well
        fit = held_out_fit(t, x, hold, max(settings.noise_fit_width_factor * width, 3.0 * hold))
        if not np.isfinite(fit).any():
            return [[] for _ in found], math.nan
        fit = np.where(np.isfinite(fit), fit, np.interp(t, t[np.isfinite(fit)], fit[np.isfinite(fit)]))
        resid = x - fit
        resid = resid - resid.mean()
        extra = 0.5 * (correlation_time_samples(resid) - 1.0) * spacing
        if extra <= 0.5 * rot:
            break
        hold = 0.5 * width + 0.5 * rot + extra
    block = max(int(math.ceil(settings.min_block_rotations * rot / spacing - 1e-9)),
                int(math.ceil(correlation_time_samples(resid) - 1e-9)))
    block = max(1, min(block, max(n // 2, 1)))
    rng = np.random.default_rng(settings.seed)
    idx = _block_indices(rng, n, block, n_rep)
    x_star = fit[None, :] + resid[idx]
    if corr_err is not None and np.any(corr_err > 0):
        seg = np.floor((t - t[0]) / CORRELATED_ERROR_BLOCK_YEARS).astype(int)
        z = rng.standard_normal((n_rep, int(seg.max()) + 1))
        x_star = x_star + corr_err[None, :] * z[:, seg]
    s_star = x_star @ w_grid.T
    ref = _match(found, persistent_crossings(grid, w_grid @ fit, settings.min_persistence_years))
    offsets = [[] for _ in found]
    for r in range(n_rep):
        rep = persistent_crossings(grid, s_star[r], settings.min_persistence_years)
        for k, tr in enumerate(_match(found, rep)):
            if tr is not None:
                offsets[k].append(tr - (ref[k] if ref[k] is not None else found[k][0]))
    return offsets, block * spacing / rot


def find_reversals(time, values, settings: ReversalSettings | None = None, smoother: Smoother | None = None,
                   members: dict | None = None, correlated_error_gauss=None,
                   members_skipped: dict | None = None) -> ReversalResult:
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
    members : dict, optional
        Systematic-ensemble members made by other analysis choices of the
        same quantity: ``{name: (time, values)}``, smoothed with ``smoother``.
        The smoothing-width members are added here when
        ``settings.systematics``.
    correlated_error_gauss : array_like, optional
        One-sigma errors per value that are correlated in time (the B0 fill's),
        same length as ``values``; they enter the replicates.
    members_skipped : dict, optional
        ``{name: reason}`` of members that did not apply (reported as is).

    Returns
    -------
    ReversalResult
        ``.crossings`` (tuple of :class:`Crossing`), ``.final``, ``.to_dict()``.

    Notes
    -----
    See the module docstring: smooth ``s = W x`` (Nadaraya-Watson),
    persistent crossings of ``s``, a moving-block residual bootstrap about a
    less-smoothed fit for the noise interval, the ensemble's range for the
    systematic one, combined in quadrature.
    """
    settings = settings or ReversalSettings()
    smoother = smoother or Smoother()
    skipped = tuple(sorted((members_skipped or {}).items()))
    t, x, corr = _clean(time, values, correlated_error_gauss)
    level = settings.confidence
    if t.size < 3:
        return ReversalResult((), level, math.nan, skipped)
    step = rotations_to_years(settings.grid_step_rotations)
    grid = np.arange(t[0], t[-1] + 0.5 * step, step)
    w_grid = smoothing_matrix(t, grid, smoother)
    found = persistent_crossings(grid, w_grid @ x, settings.min_persistence_years)
    if not found:
        return ReversalResult((), level, math.nan, skipped)
    offsets, block_rot = _noise_bootstrap(t, x, corr, grid, w_grid, found, settings, smoother)

    member_epochs = {}
    if settings.systematics:
        for name, sm in smoothing_members(smoother).items():
            member_epochs[name] = _match(found, _crossings_of(t, x, grid, sm, settings.min_persistence_years))
    for name, (mt, mx) in (members or {}).items():
        tt, xx, _ = _clean(mt, mx)
        member_epochs[name] = _match(found, _crossings_of(tt, xx, grid, smoother, settings.min_persistence_years))

    spacing = float(np.median(np.diff(t)))
    alpha = 1.0 - level
    n_rep = settings.n_bootstrap
    crossings = []
    for k, (tk, sk) in enumerate(found):
        epochs = [(name, ep[k]) for name, ep in member_epochs.items()]
        seen = [v for _, v in epochs if v is not None]
        sys_lo, sys_hi = min([tk] + seen), max([tk] + seen)
        off = offsets[k]
        support = len(off) / n_rep if off is not None and n_rep else math.nan
        resolved, reason = True, None
        if off is None:
            resolved = False
            reason = ("the 'none' smoother leaves no residuals to resample" if smoother.method == "none"
                      else "no bootstrap (reversals.n_bootstrap = 0)")
        elif len(off) < 2:
            resolved, reason = False, f"only {len(off)} of {n_rep} bootstrap replicates show this crossing"
        else:
            q_lo, q_hi = np.quantile(off, [alpha / 2.0, 1.0 - alpha / 2.0])
            n_lo, n_hi = tk - float(q_hi), tk - float(q_lo)  # basic bootstrap (Davison & Hinkley 1997, eq. 5.6)
            if not n_hi > n_lo:
                resolved, reason = False, "the bootstrap replicates do not vary"
        g_lo, g_hi = _gap_bracket(t, tk)
        in_gap = spacing > 0 and g_hi - g_lo > 1.5 * spacing
        if resolved:
            if in_gap:  # the crossing lies somewhere in a sampling gap
                n_lo, n_hi = min(n_lo, g_lo), max(n_hi, g_hi)
            low, high = combine_half_widths(tk, n_lo, n_hi, sys_lo, sys_hi)
        else:
            n_lo = n_hi = math.nan
            half = 0.5 * settings.min_persistence_years
            low, high = min(sys_lo, tk - half), max(sys_hi, tk + half)
            if in_gap:
                low, high = min(low, g_lo), max(high, g_hi)
        crossings.append(Crossing(tk, low, high, sk, support, n_lo, n_hi, sys_lo, sys_hi, tuple(epochs),
                                  resolved, reason, level))
    return ReversalResult(tuple(crossings), level, block_rot, skipped)


def polar_reversals(time, north_br_gauss, south_br_gauss, settings: ReversalSettings | None = None,
                    smoother: Smoother | None = None, members: dict | None = None, correlated_errors=None,
                    members_skipped: dict | None = None) -> dict:
    """Reversals of north, south and the axial dipole ``(N - S)/2`` of one table.

    Parameters
    ----------
    time : array_like
        Decimal years, datetime64 or ISO strings.
    north_br_gauss, south_br_gauss : array_like
        Cap means, gauss (NaN where missing).
    members : dict, optional
        ``{name: (time, north, south)}``: ensemble members (see :func:`find_reversals`).
    correlated_errors : tuple of array_like, optional
        ``(north_error, south_error)``, one-sigma correlated (fill) errors, gauss;
        the dipole's is ``sqrt(eN^2 + eS^2) / 2`` (the poles are filled in
        different seasons).

    Returns
    -------
    dict
        ``{"north": ReversalResult, "south": ..., "dipole": ...}``; the dipole
        uses the times where both poles have a value.
    """
    n = np.asarray(north_br_gauss, dtype=float)
    s = np.asarray(south_br_gauss, dtype=float)
    dipole = 0.5 * (n - s)  # axial dipole proxy (DESIGN.md)
    en = es = ed = None
    if correlated_errors is not None:
        en, es = (np.asarray(e, dtype=float) for e in correlated_errors)
        ed = 0.5 * np.hypot(en, es)
    out = {}
    for k, (name, v, e) in enumerate((("north", n, en), ("south", s, es), ("dipole", dipole, ed))):
        mem = {}
        for m, (mt, mn, ms) in (members or {}).items():
            mn, ms = np.asarray(mn, dtype=float), np.asarray(ms, dtype=float)
            mem[m] = (mt, (mn, ms, 0.5 * (mn - ms))[k])
        out[name] = find_reversals(time, v, settings, smoother, mem, e, members_skipped)
    return out


def _series_columns(ds):
    return (ds["rotation_time"].values, ds["north_br_rotation_gauss"].values, ds["south_br_rotation_gauss"].values)


def series_smoother(series) -> Smoother:
    """The smoother recorded in a PolarSeries Dataset's attributes (default: Gaussian FWHM 6 rotations)."""
    a = series.attrs
    try:
        return Smoother(a["smoothing"], float(a["smoothing_width"]), a["smoothing_width_unit"],
                        float(a.get("max_gap_years", 2.0)))
    except KeyError:
        return Smoother()


def series_reversals(series, settings: ReversalSettings | None = None, smoother: Smoother | None = None,
                     members: dict | None = None, members_skipped: dict | None = None) -> dict:
    """:func:`polar_reversals` of a PolarSeries Dataset's per-rotation means.

    Uses ``rotation_time``, ``north/south_br_rotation_gauss`` and, where the
    Dataset has them, the per-rotation fill errors
    ``north/south_br_rotation_fill_error_gauss`` (they enter the replicates);
    the smoother defaults to the one recorded in the Dataset's attributes.
    ``members`` maps names to the PolarSeries of other analysis choices.
    """
    smoother = smoother or series_smoother(series)
    corr = None
    if "north_br_rotation_fill_error_gauss" in series and "south_br_rotation_fill_error_gauss" in series:
        corr = (series["north_br_rotation_fill_error_gauss"].values,
                series["south_br_rotation_fill_error_gauss"].values)
    mem = {name: _series_columns(ds) for name, ds in (members or {}).items()}
    return polar_reversals(*_series_columns(series), settings, smoother, mem, corr, members_skipped)


def band_reversals(band_means: dict, settings: ReversalSettings | None = None,
                   smoother: Smoother | None = None, members: dict | None = None,
                   band_errors: dict | None = None, members_skipped: dict | None = None) -> dict:
    """Reversal epochs of each band's cap mean (from :func:`pipeline.aggregator.band_cap_means`).

    Parameters
    ----------
    band_means : dict
        ``{"north": {L: DataArray(rotation)}, "south": {...}}``, gauss.
    members : dict, optional
        ``{name: band_means-like dict}`` of other analysis choices.
    band_errors : dict, optional
        Same shape as ``band_means``: correlated (fill) one-sigma errors.

    Returns
    -------
    dict
        ``{"north": {"55": ReversalResult, ...}, "south": {...}}`` keyed by
        the boundary in degrees as text.
    """
    out = {}
    for pole, bands in band_means.items():
        out[pole] = {}
        for L, da in bands.items():
            mem = {}
            for name, mb in (members or {}).items():
                m = mb.get(pole, {}).get(L)
                if m is not None:
                    mem[name] = (m["rotation_time"].values, m.values)
            err = None
            if band_errors is not None and band_errors.get(pole, {}).get(L) is not None:
                err = band_errors[pole][L].values
            out[pole][f"{float(L):g}"] = find_reversals(da["rotation_time"].values, da.values, settings, smoother,
                                                        mem, err, members_skipped)
    return out
