"""The synthetic star *Tessaly*: a history of cycles, emerging regions and its surface field.

One call of :func:`star_history` runs the whole history of the star (from
:attr:`StarParameters.history_start_yr` to :attr:`StarParameters.history_end_yr`)
for a seed and caches it in memory, so every observation span of the same
seed sees the same star.  The history is built cycle by cycle:

1. cycle ``n`` (start ``t0_n``, peak sunspot number ``A_n``, its length, its
   north/south share and lag, its Joy's-law factor) emits tilted bipolar
   regions at a rate proportional to its sunspot number (Hathaway, Wilson &
   Reichmann 1994, Solar Physics 151, 177 shape), at latitudes drifting to the
   equator (Hathaway 2011, Solar Physics 273, 221), with Joy's-law tilts plus
   scatter and Hale's polarities (Hale et al. 1919, ApJ 49, 153), plus a few
   large "rogue" regions of random tilt that make occasional multiple
   reversals possible;
2. the axisymmetric flux-transport model (:mod:`pipeline.synth.transport`)
   carries the field to the start of cycle ``n + 1``;
3. a Babcock-Leighton recurrence sets ``A_(n+1)`` from the polar field
   reached there: ``log A_(n+1) = log A_ref + g log(D / D_ref) + sigma z``
   with ``D`` the mean |axial dipole proxy| of the last year (Babcock 1961,
   ApJ 133, 572; Leighton 1969, ApJ 156, 1; the precursor relation of
   Schatten et al. 1978, GRL 5, 411).  ``g < 1`` keeps the amplitudes
   stationary.

Polar fields therefore build up, reverse and peak by the transport physics;
nothing draws a polar-field curve.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np

from pipeline.synth.activity import (cycle_sunspot_number, emergence_latitude_deg, joy_tilt_deg,
                                     monthly_noise, smooth_13_month)
from pipeline.synth.transport import TransportGrid, TransportModel, deposit_ring, make_grid, step_matrix

__all__ = ["StarParameters", "StarHistory", "star_history", "cap_mean_gauss", "days_to_datetime64",
           "datetime64_to_days", "EPOCH"]

#: internal clock: days since this instant (UTC)
EPOCH = np.datetime64("1970-01-01T00:00:00", "ns")
_DAY_NS = 86400 * 10 ** 9
_YEAR_DAYS = 365.25


@dataclass(frozen=True)
class StarParameters:
    """Everything that defines the star apart from the seed.

    Times in decimal years, fields in gauss, fluxes in maxwell, angles in degrees.
    """

    name: str = "Tessaly"
    history_start_yr: float = 1700.0
    history_end_yr: float = 2135.0
    mean_period_yr: float = 11.0
    period_sd_yr: float = 0.7
    period_per_amplitude_yr: float = -0.012  # strong cycles are shorter (common practice, no source)
    min_period_yr: float = 9.0
    max_period_yr: float = 14.0
    reference_amplitude: float = 140.0
    reference_precursor_gauss: float = 6.0
    recurrence_exponent: float = 0.6
    recurrence_scatter: float = 0.07
    hemisphere_share_sd: float = 0.05
    hemisphere_lag_sd_yr: float = 0.3
    regions_per_sunspot_day: float = 0.015
    region_flux_median_mx: float = 2.0e21
    region_flux_log_sd: float = 0.8
    latitude_scatter_deg: float = 5.0
    tilt_coefficient_deg: float = 32.1
    tilt_scatter_deg: float = 15.0
    cycle_tilt_log_sd: float = 0.25
    ring_width_deg: float = 2.0
    rogue_regions_per_cycle: float = 8.0
    rogue_flux_median_mx: float = 3.0e22
    initial_polar_gauss: float = 5.0
    cycle_duration_yr: float = 18.0
    transport: TransportModel = field(default_factory=TransportModel)


@dataclass(frozen=True)
class StarHistory:
    """The star's whole history for one seed (arrays are read-only views; do not modify).

    Attributes
    ----------
    params : StarParameters
    seed : int
    grid : TransportGrid
    time_days : ndarray
        Days since :data:`EPOCH` of each stored field (every transport step).
    br_gauss : ndarray, shape (time, cell)
        Axisymmetric Br, cells from the north pole southward.
    north_gauss, south_gauss : ndarray
        True whole-cap means over latitude >= 60 / <= -60 degrees.
    cycles : tuple of dict
        Generator parameters per cycle: ``cycle, start_yr, peak_parameter,
        period_yr, north_share, lag_yr, tilt_factor, driving_precursor_gauss``.
    regions : dict of ndarray
        One entry per emerged region: ``time_days, lead_lat_deg, follow_lat_deg,
        lon_deg, flux_mx, lead_sign, hemisphere, separation_deg, tilt_deg, cycle``.
    month_start : ndarray of datetime64
    month_mid_yr, sunspot_true, sunspot_observed, sunspot_smooth : ndarray
    """

    params: StarParameters
    seed: int
    grid: TransportGrid
    time_days: np.ndarray
    br_gauss: np.ndarray
    north_gauss: np.ndarray
    south_gauss: np.ndarray
    cycles: tuple
    regions: dict
    month_start: np.ndarray
    month_mid_yr: np.ndarray
    sunspot_true: np.ndarray
    sunspot_observed: np.ndarray
    sunspot_smooth: np.ndarray

    @property
    def times(self) -> np.ndarray:
        """datetime64[ns] of each stored field."""
        return days_to_datetime64(self.time_days)

    @property
    def time_yr(self) -> np.ndarray:
        from pipeline.timeutil import decimal_year

        return decimal_year(self.times)

    @property
    def dipole_gauss(self) -> np.ndarray:
        """Axial dipole proxy ``(north - south) / 2`` (DESIGN.md), gauss."""
        return 0.5 * (self.north_gauss - self.south_gauss)

    def profile_at(self, time_days: float) -> np.ndarray:
        """Br of each cell at any time, linear in time between stored steps, gauss."""
        t = float(time_days)
        k = int(np.clip(np.searchsorted(self.time_days, t, side="right") - 1, 0, self.time_days.size - 2))
        w = (t - self.time_days[k]) / (self.time_days[k + 1] - self.time_days[k])
        w = min(max(w, 0.0), 1.0)
        return (1.0 - w) * self.br_gauss[k] + w * self.br_gauss[k + 1]


def days_to_datetime64(days) -> np.ndarray:
    """Days since :data:`EPOCH` -> datetime64[ns]."""
    return EPOCH + np.round(np.asarray(days, dtype=float) * _DAY_NS).astype("timedelta64[ns]")


def datetime64_to_days(t) -> np.ndarray | float:
    """datetime64 (or ISO) -> days since :data:`EPOCH`."""
    from pipeline.timeutil import to_datetime64

    out = (to_datetime64(t) - EPOCH).astype(np.float64) / _DAY_NS
    return float(out) if np.ndim(out) == 0 else out


def cap_mean_gauss(grid: TransportGrid, br_gauss: np.ndarray, cap_latitude_deg: float = 60.0):
    """Whole-cap area-weighted means (north, south) of cell fields, gauss.

    Cells whose centre lies poleward of the cap latitude form the cap; with
    1-degree cells and a whole-degree cap latitude this is the exact cap.
    """
    lat = grid.latitude_deg
    area = grid.area_m2
    n = lat >= cap_latitude_deg
    s = lat <= -cap_latitude_deg
    br = np.asarray(br_gauss)
    return br[..., n] @ area[n] / area[n].sum(), br[..., s] @ area[s] / area[s].sum()


def _rng(seed: int, *stream: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence([int(seed), *map(int, stream)]))


def _cycle_regions(p: StarParameters, seed: int, number: int, start_yr: float, peak: float, share: float,
                   lag_yr: float, tilt_factor: float, step_yr: np.ndarray, dt_days: float):
    """All regions of one cycle: per-step Poisson counts, then per-region draws."""
    rng = _rng(seed, 2, number)
    parity = 1 if number % 2 == 0 else -1  # Hale et al. 1919: leading polarity alternates each cycle
    out = []
    for hemi, frac, lag in ((1, share, -0.5 * lag_yr), (-1, 1.0 - share, 0.5 * lag_yr)):
        sel = (step_yr >= start_yr + lag) & (step_yr < start_yr + lag + p.cycle_duration_yr)
        steps = np.flatnonzero(sel)
        rate = frac * cycle_sunspot_number(step_yr[steps], start_yr + lag, peak)
        counts = rng.poisson(p.regions_per_sunspot_day * dt_days * rate)
        step_of = np.repeat(steps, counts)
        m = step_of.size
        frac_in_step = rng.random(m)
        age_yr = step_yr[step_of] - (start_yr + lag)
        lat = np.clip(emergence_latitude_deg(age_yr) + p.latitude_scatter_deg * rng.standard_normal(m), 1.0, 45.0)
        # Joy's law (Stenflo & Kosovichev 2012) scaled per cycle, plus random scatter
        tilt = tilt_factor * joy_tilt_deg(lat, p.tilt_coefficient_deg) + p.tilt_scatter_deg * rng.standard_normal(m)
        flux = p.region_flux_median_mx * np.exp(p.region_flux_log_sd * rng.standard_normal(m))
        # rogue regions: big complexes of random tilt (half of them against Joy's law)
        n_rogue = rng.poisson(0.5 * p.rogue_regions_per_cycle)
        if n_rogue and steps.size:
            w = rate / rate.sum() if rate.sum() > 0 else None
            rs = rng.choice(steps, size=n_rogue, p=w)
            step_of = np.concatenate([step_of, rs])
            frac_in_step = np.concatenate([frac_in_step, rng.random(n_rogue)])
            lat = np.concatenate([lat, rng.uniform(12.0, 32.0, n_rogue)])
            tilt = np.concatenate([tilt, rng.uniform(-40.0, 40.0, n_rogue)])
            flux = np.concatenate([flux, p.rogue_flux_median_mx * np.exp(0.5 * rng.standard_normal(n_rogue))])
            m = step_of.size
        sep = 2.5 * (flux / 1.0e21) ** 0.3  # footpoint separation grows with flux (common practice, no source)
        half = 0.5 * sep * np.sin(np.deg2rad(tilt))
        out.append(dict(
            step=step_of, frac=frac_in_step,
            lead_lat_deg=hemi * (lat - half), follow_lat_deg=hemi * (lat + half),
            lon_deg=rng.uniform(0.0, 360.0, m), flux_mx=flux,
            lead_sign=np.full(m, parity * hemi, dtype=np.int8), hemisphere=np.full(m, hemi, dtype=np.int8),
            separation_deg=sep, tilt_deg=tilt,
            cycle=np.full(m, number, dtype=np.int32)))
    return {k: np.concatenate([o[k] for o in out]) for k in out[0]}


def _add_sources(source: np.ndarray, grid: TransportGrid, regions: dict, width_deg: float) -> None:
    """Deposit both polarities of every region into the per-step source array (gauss)."""
    n_steps, n = source.shape
    for lat_key, sign in (("lead_lat_deg", 1.0), ("follow_lat_deg", -1.0)):
        flux = sign * regions["lead_sign"] * regions["flux_mx"]
        cells, delta = deposit_ring(grid, regions[lat_key], flux, width_deg)
        flat = (regions["step"][:, None] * n + cells).ravel()
        source += np.bincount(flat, weights=delta.ravel(), minlength=n_steps * n).reshape(n_steps, n)


def _initial_field(grid: TransportGrid, polar_gauss: float) -> np.ndarray:
    lat = np.deg2rad(grid.latitude_deg)
    return polar_gauss * np.sign(lat) * np.abs(np.sin(lat)) ** 7


@lru_cache(maxsize=4)
def star_history(seed: int = 1, params: StarParameters = StarParameters()) -> StarHistory:
    """Run the star's whole history for a seed (cached in memory: one run per seed and parameters).

    Parameters
    ----------
    seed : int
        Seeds every random draw of the history.
    params : StarParameters

    Returns
    -------
    StarHistory

    Notes
    -----
    Per transport step ``B_(k+1) = M (B_k + S_k)`` with the one-step matrix
    ``M`` of :func:`pipeline.synth.transport.step_matrix` and ``S_k`` the rings
    of the regions emerging in step ``k``.  At the start of each cycle the
    Babcock-Leighton recurrence sets the next amplitude,
    ``A_(n+1) = A_ref (D / D_ref)^g exp(sigma z)``, ``z ~ N(0, 1)``, with ``D`` the
    mean |(north - south)/2| of the last year (Babcock 1961, ApJ 133, 572;
    Leighton 1969, ApJ 156, 1); the cycle's length is
    ``P = P0 + k (A - A_ref) + sigma_P z`` clipped to 9-14 yr.

    References
    ----------
    Hathaway, Wilson & Reichmann 1994, Solar Physics 151, 177 (cycle shape).
    Hathaway 2011, Solar Physics 273, 221 (equatorward drift).
    Jiang et al. 2014, Space Science Reviews 186, 491 (surface flux transport).
    """
    from pipeline.timeutil import decimal_year, from_decimal_year

    seed = int(seed)
    p = params
    model = p.transport
    grid = make_grid(model.n_cells)
    dt = model.dt_days
    t_begin = datetime64_to_days(from_decimal_year(p.history_start_yr))
    t_end = datetime64_to_days(from_decimal_year(p.history_end_yr))
    n_steps = int(np.ceil((t_end - t_begin) / dt))
    time_days = t_begin + dt * np.arange(n_steps + 1)
    step_yr = decimal_year(days_to_datetime64(time_days))
    mat = step_matrix(grid, model)
    source = np.zeros((n_steps + 1, grid.n))
    br = np.empty((n_steps + 1, grid.n))
    br[0] = _initial_field(grid, p.initial_polar_gauss)
    area = grid.area_m2
    lat = grid.latitude_deg
    cap_n, cap_s = lat >= 60.0, lat <= -60.0
    wn, ws = area[cap_n] / area[cap_n].sum(), area[cap_s] / area[cap_s].sum()

    rng = _rng(seed, 1)
    cycles, region_parts = [], []
    start = p.history_start_yr + rng.uniform(0.5, 1.5)
    peak = p.reference_amplitude * np.exp(p.recurrence_scatter * rng.standard_normal())
    driving = None
    k_done = 0
    number = 1
    while start < p.history_end_yr:
        period = float(np.clip(p.mean_period_yr + p.period_per_amplitude_yr * (peak - p.reference_amplitude)
                               + p.period_sd_yr * rng.standard_normal(), p.min_period_yr, p.max_period_yr))
        share = float(np.clip(0.5 + p.hemisphere_share_sd * rng.standard_normal(), 0.35, 0.65))
        lag = float(p.hemisphere_lag_sd_yr * rng.standard_normal())
        tilt_factor = float(np.exp(p.cycle_tilt_log_sd * rng.standard_normal()))
        regions = _cycle_regions(p, seed, number, start, peak, share, lag, tilt_factor, step_yr, dt)
        _add_sources(source, grid, regions, p.ring_width_deg)
        region_parts.append(regions)
        cycles.append(dict(cycle=number, start_yr=float(start), peak_parameter=float(peak), period_yr=period,
                           north_share=share, lag_yr=lag, tilt_factor=tilt_factor,
                           driving_precursor_gauss=driving))
        next_start = start + period
        k_next = int(min(np.searchsorted(step_yr, next_start), n_steps))
        for k in range(k_done, k_next):  # B_(k+1) = M (B_k + S_k)
            br[k + 1] = mat @ (br[k] + source[k])
        k_done = k_next
        if k_done >= n_steps:
            break
        window = (step_yr > next_start - 1.0) & (step_yr <= step_yr[k_done])
        dip = 0.5 * (br[window][:, cap_n] @ wn - br[window][:, cap_s] @ ws)
        driving = float(np.mean(np.abs(dip)))
        # Babcock-Leighton recurrence (Babcock 1961; Leighton 1969): the next cycle's strength
        # follows the polar field at its start
        peak = float(p.reference_amplitude * (driving / p.reference_precursor_gauss) ** p.recurrence_exponent
                     * np.exp(p.recurrence_scatter * rng.standard_normal()))
        start = next_start
        number += 1
    for k in range(k_done, n_steps):
        br[k + 1] = mat @ (br[k] + source[k])

    north, south = br[:, cap_n] @ wn, br[:, cap_s] @ ws
    regions = {k: np.concatenate([r[k] for r in region_parts]) for k in region_parts[0]}
    regions["time_days"] = time_days[regions.pop("step")] + dt * regions.pop("frac")
    order = np.argsort(regions["time_days"], kind="stable")
    regions = {k: v[order] for k, v in regions.items()}

    month_start, month_mid_yr, true_ssn = _monthly_true(p, cycles)
    observed = monthly_noise(true_ssn, _rng(seed, 3))
    smooth = smooth_13_month(observed)
    arrays = [time_days, br, north, south, month_start, month_mid_yr, true_ssn, observed, smooth,
              *regions.values()]
    for a in arrays:
        a.setflags(write=False)
    return StarHistory(p, seed, grid, time_days, br, north, south, tuple(cycles), regions, month_start,
                       month_mid_yr, true_ssn, observed, smooth)


def _monthly_true(p: StarParameters, cycles) -> tuple:
    """Month starts, month-centre decimal years and the noise-free sunspot number (sum of cycles)."""
    from pipeline.timeutil import decimal_year

    y0 = int(np.floor(p.history_start_yr))
    y1 = int(np.floor(p.history_end_yr))
    months = np.arange(np.datetime64(f"{y0}-01", "M"), np.datetime64(f"{y1}-01", "M"))
    start = months.astype("datetime64[ns]")
    end = (months + 1).astype("datetime64[ns]")
    mid = start + (end - start) // 2
    mid_yr = decimal_year(mid)
    total = np.zeros(mid_yr.size)
    for c in cycles:
        lag = c["lag_yr"]
        total += c["north_share"] * cycle_sunspot_number(mid_yr, c["start_yr"] - 0.5 * lag, c["peak_parameter"])
        total += (1 - c["north_share"]) * cycle_sunspot_number(mid_yr, c["start_yr"] + 0.5 * lag,
                                                               c["peak_parameter"])
    return start, mid_yr, total
