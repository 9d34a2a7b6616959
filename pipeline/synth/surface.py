"""The star's surface field at one instant: Br(latitude, Carrington longitude).

``Br = B_axi(lat) + active regions + network``:

* ``B_axi`` is the transported axisymmetric field (linear in latitude between
  cell centres, flat beyond the outermost centres) - the truth the caps measure;
* active regions: the bipoles emerged in the last two rotations (the same
  regions that feed the transport model), each polarity a Gaussian patch
  that spreads and fades with age (cosmetic: display only; their flux is in
  ``B_axi`` as rings already);
* network: a smooth random mixed-polarity pattern with zero mean on every
  latitude circle (so it leaves every axisymmetric mean unchanged),
  refreshed each Carrington rotation with linear blending in between.

The polar field is thus smooth plus zero-mean structure; the non-axisymmetric
active regions stay at low latitudes.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from pipeline.synth.star import StarHistory

__all__ = ["SurfaceOptions", "surface_field", "network_map", "CARRINGTON_DAYS"]

CARRINGTON_DAYS = 27.2753  # synodic Carrington rotation period (common practice, no source)
_RSUN_CM = 6.957e10


@dataclass(frozen=True)
class SurfaceOptions:
    """What the surface holds besides the axisymmetric field.

    Attributes
    ----------
    regions : bool
        Draw the recent active regions.
    network_gauss : float
        RMS of the network pattern (Br, gauss); 0 for none.
    region_memory_days : float
        Regions older than this are no longer drawn.
    region_fade_days : float
        e-folding time of a drawn region's peak field.
    """

    regions: bool = True
    network_gauss: float = 3.0
    region_memory_days: float = 2 * CARRINGTON_DAYS
    region_fade_days: float = 20.0


@lru_cache(maxsize=8)
def network_map(seed: int, rotation_index: int, n_lat: int = 90, n_lon: int = 180) -> np.ndarray:
    """Unit-RMS random pattern on a latitude x longitude grid with zero mean on each row.

    Cells of ``180/n_lat`` degrees; rows from -90 to +90, columns 0..360
    Carrington longitude.  Smoothed over one cell (periodic in longitude).
    """
    from scipy.ndimage import gaussian_filter

    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 5, int(rotation_index)]))
    m = gaussian_filter(rng.standard_normal((n_lat, n_lon)), sigma=1.0, mode=("nearest", "wrap"))
    m -= m.mean(axis=1, keepdims=True)
    m /= np.sqrt((m ** 2).mean())
    m.setflags(write=False)
    return m


def _bilinear(grid: np.ndarray, lat_deg, lon_deg) -> np.ndarray:
    n_lat, n_lon = grid.shape
    y = (np.asarray(lat_deg) + 90.0) / 180.0 * n_lat - 0.5
    x = np.mod(np.asarray(lon_deg), 360.0) / 360.0 * n_lon - 0.5
    y = np.clip(y, 0.0, n_lat - 1.0)
    y0 = np.minimum(np.floor(y).astype(int), n_lat - 2)
    fy = y - y0
    x0 = np.floor(x).astype(int)
    fx = x - x0
    x0 %= n_lon
    x1 = (x0 + 1) % n_lon
    return ((1 - fy) * ((1 - fx) * grid[y0, x0] + fx * grid[y0, x1])
            + fy * ((1 - fx) * grid[y0 + 1, x0] + fx * grid[y0 + 1, x1]))


def _unit(lat_deg, lon_deg):
    la, lo = np.deg2rad(lat_deg), np.deg2rad(lon_deg)
    return np.stack([np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)], axis=-1)


def _regions_field(history: StarHistory, time_days: float, lat, lon, opts: SurfaceOptions) -> np.ndarray:
    reg = history.regions
    t = reg["time_days"]
    i0, i1 = np.searchsorted(t, [time_days - opts.region_memory_days, time_days], side="right")
    out = np.zeros(np.shape(lat))
    if i1 <= i0:
        return out
    sl = slice(i0, i1)
    age = time_days - t[sl]
    flux = reg["flux_mx"][sl] * np.exp(-age / opts.region_fade_days)
    sigma_deg = 0.8 + 0.04 * age  # patches spread as they age (common practice, no source)
    half_lon = 0.5 * reg["separation_deg"][sl] * np.cos(np.deg2rad(reg["tilt_deg"][sl]))
    lon_c = reg["lon_deg"][sl]
    sign = reg["lead_sign"][sl].astype(float)
    # leading polarity westward = toward smaller Carrington longitude (common practice, no source)
    centres_lat = np.concatenate([reg["lead_lat_deg"][sl], reg["follow_lat_deg"][sl]])
    centres_lon = np.concatenate([lon_c - half_lon, lon_c + half_lon])
    amp = np.concatenate([sign * flux, -sign * flux]) / (2 * np.pi * (np.deg2rad(np.tile(sigma_deg, 2)) * _RSUN_CM) ** 2)
    inv2s2 = 1.0 / (2 * np.deg2rad(np.tile(sigma_deg, 2)) ** 2)
    band = np.abs(lat) < 55.0
    if not band.any():
        return out
    p = _unit(lat[band], lon[band])
    c = _unit(centres_lat, centres_lon)
    acc = np.zeros(p.shape[0])
    for k0 in range(0, c.shape[0], 64):
        cc = c[k0:k0 + 64]
        d2 = 2.0 * (1.0 - p @ cc.T)  # chord^2 ~ angle^2 (radians) for nearby points
        acc += np.exp(-d2 * inv2s2[k0:k0 + 64]) @ amp[k0:k0 + 64]
    out[band] = acc
    return out


def surface_field(history: StarHistory, time_days: float, opts: SurfaceOptions = SurfaceOptions()):
    """``br(latitude_deg, carrington_longitude_deg) -> gauss`` at one instant.

    Parameters
    ----------
    history : StarHistory
    time_days : float
        Days since :data:`pipeline.synth.star.EPOCH`.
    opts : SurfaceOptions

    Returns
    -------
    callable
        Suitable for :func:`pipeline.synth.instrument.render_los`.
    """
    profile = history.profile_at(time_days)
    lat_nodes = history.grid.latitude_deg[::-1]
    br_nodes = profile[::-1]
    phase = time_days / CARRINGTON_DAYS
    k = int(np.floor(phase))
    w = phase - k

    def br(lat_deg, lon_deg):
        lat_deg = np.asarray(lat_deg, dtype=float)
        lon_deg = np.asarray(lon_deg, dtype=float)
        out = np.interp(lat_deg, lat_nodes, br_nodes)
        if opts.network_gauss > 0:
            net = (1 - w) * _bilinear(network_map(history.seed, k), lat_deg, lon_deg) \
                + w * _bilinear(network_map(history.seed, k + 1), lat_deg, lon_deg)
            out = out + opts.network_gauss * net
        if opts.regions:
            out = out + _regions_field(history, time_days, lat_deg, lon_deg, opts)
        return out

    br.profile_lat_deg = lat_nodes
    br.profile_br_gauss = br_nodes
    return br
