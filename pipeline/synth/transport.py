"""Axisymmetric surface flux transport: Br(latitude, t) on a sphere.

The azimuthally averaged radial field obeys (Leighton 1964, ApJ 140, 1547;
Wang, Nash & Sheeley 1989, Science 245, 712; review: Jiang et al. 2014,
Space Science Reviews 186, 491, eq. 1 averaged over longitude)

    dB/dt = -1/(R sin th) d/dth (u sin th B)
            + eta/(R^2 sin th) d/dth (sin th dB/dth) - B/tau + S(th, t)

with colatitude ``th``, meridional flow ``u`` (positive southward, i.e.
toward increasing colatitude), supergranular diffusivity ``eta``, an
optional exponential decay time ``tau`` and a source ``S``.

Discretisation: finite volumes of equal width in colatitude.  The unknown is
the cell-mean field ``B_i``; the cell flux is ``Phi_i = A_i B_i`` with the ring
area ``A_i = 2 pi R^2 (cos th_(i-1/2) - cos th_(i+1/2))``.  Each interior face
carries the flux ``F = 2 pi R sin th_f [u_f (B_l + B_r)/2 - eta (B_r - B_l)/(R dth)]``
(central differences), the poles carry none (``sin th = 0``), so without decay
the total signed flux ``sum A_i B_i`` is conserved exactly by the spatial
operator and, because ``a^T L = 0`` survives every matrix product of the
theta-method, by each time step to round-off.

Time stepping: the theta-method ``(I - theta dt L) B' = (I + (1 - theta) dt L) B``
with a constant operator, so the one-step matrix is precomputed once and a
step is a dense matrix-vector product (fast for a few hundred cells).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["TransportGrid", "TransportModel", "FLOW_PROFILES", "TIME_SCHEMES", "make_grid",
           "meridional_flow_m_s", "transport_operator", "step_matrix", "deposit_ring",
           "legendre_cell_means", "RSUN_M", "SECONDS_PER_DAY"]

RSUN_M = 6.957e8  # IAU 2015 Resolution B3 nominal solar radius
SECONDS_PER_DAY = 86400.0
_KM2 = 1.0e6


@dataclass(frozen=True)
class TransportGrid:
    """Finite-volume cells of equal width in colatitude.

    Attributes
    ----------
    edges_colat_rad : ndarray
        ``n + 1`` cell edges, 0 (north pole) to pi (south pole), radians.
    radius_m : float
        Radius of the sphere, metres.
    """

    edges_colat_rad: np.ndarray
    radius_m: float = RSUN_M

    @property
    def n(self) -> int:
        return self.edges_colat_rad.size - 1

    @property
    def centres_colat_rad(self) -> np.ndarray:
        e = self.edges_colat_rad
        return 0.5 * (e[1:] + e[:-1])

    @property
    def latitude_deg(self) -> np.ndarray:
        """Cell-centre latitudes, degrees, north pole first (descending)."""
        return 90.0 - np.rad2deg(self.centres_colat_rad)

    @property
    def area_m2(self) -> np.ndarray:
        """Ring areas ``2 pi R^2 (cos th_(i-1/2) - cos th_(i+1/2))``, m^2."""
        e = self.edges_colat_rad
        return 2.0 * np.pi * self.radius_m ** 2 * (np.cos(e[:-1]) - np.cos(e[1:]))


def make_grid(n_cells: int = 180, radius_m: float = RSUN_M) -> TransportGrid:
    """Equal-colatitude grid of ``n_cells`` cells (180 gives 1-degree cells)."""
    n_cells = int(n_cells)
    if n_cells < 8:
        raise ValueError(f"n_cells: got {n_cells}; need at least 8 cells (e.g. 180 for 1-degree cells)")
    return TransportGrid(np.linspace(0.0, np.pi, n_cells + 1), float(radius_m))


def _flow_sin2lat(colat_rad, peak_m_s):
    # poleward u = v0 sin(2 lat): Wang, Nash & Sheeley 1989 style profile; u_theta = -v0 sin(2 th)
    return -peak_m_s * np.sin(2.0 * colat_rad)


def _flow_cut75(colat_rad, peak_m_s):
    # u = v0 sin(pi lat / 75 deg) for |lat| < 75 deg, 0 beyond (van Ballegooijen, Cartledge &
    # Priest 1998, ApJ 501, 866; used in Jiang et al. 2014, Space Sci. Rev. 186, 491)
    lat = np.pi / 2 - colat_rad
    lim = np.deg2rad(75.0)
    v = np.where(np.abs(lat) < lim, peak_m_s * np.sin(np.pi * lat / lim), 0.0)
    return -v


#: meridional-flow profiles by name: ``f(colatitude_rad, peak_m_s) -> u_theta (m/s, southward +)``
FLOW_PROFILES = {"sin2lat": _flow_sin2lat, "cut75": _flow_cut75}

#: time schemes by name -> implicitness theta of the theta-method
TIME_SCHEMES = {"crank_nicolson": 0.5, "backward_euler": 1.0}


def meridional_flow_m_s(colat_rad, peak_m_s: float, profile: str = "sin2lat") -> np.ndarray:
    """Meridional flow ``u_theta`` (m/s, positive toward the south pole) at colatitudes.

    Parameters
    ----------
    colat_rad : array_like
        Colatitudes, radians.
    peak_m_s : float
        Peak poleward speed, m/s.
    profile : str
        One of :data:`FLOW_PROFILES`.
    """
    try:
        f = FLOW_PROFILES[profile]
    except KeyError:
        raise ValueError(f"profile: got {profile!r}; valid choices are {', '.join(sorted(FLOW_PROFILES))}") from None
    return f(np.asarray(colat_rad, dtype=float), float(peak_m_s))


@dataclass(frozen=True)
class TransportModel:
    """Parameters of the flux-transport model.

    Attributes
    ----------
    diffusivity_km2_s : float
        Supergranular diffusivity eta, km^2/s (about 250-600; Jiang et al. 2014).
    flow_peak_m_s : float
        Peak poleward meridional flow, m/s (about 10-15).
    flow_profile : str
        Name in :data:`FLOW_PROFILES`.
    decay_years : float or None
        Exponential decay time tau of the surface field (None: no decay).
    n_cells : int
        Cells in colatitude.
    dt_days : float
        Time step, days.
    scheme : str
        Name in :data:`TIME_SCHEMES`.
    """

    diffusivity_km2_s: float = 450.0
    flow_peak_m_s: float = 12.0
    flow_profile: str = "sin2lat"
    decay_years: float | None = 10.0
    n_cells: int = 180
    dt_days: float = 5.0
    scheme: str = "crank_nicolson"

    def __post_init__(self):
        from pipeline.config import check_choice, check_number

        check_number("diffusivity_km2_s", self.diffusivity_km2_s, lo=0.0)
        check_number("flow_peak_m_s", self.flow_peak_m_s, lo=-100.0, hi=100.0)
        check_choice("flow_profile", self.flow_profile, FLOW_PROFILES)
        if self.decay_years is not None:
            check_number("decay_years", self.decay_years, lo=0.0, lo_open=True)
        check_number("n_cells", self.n_cells, lo=8, integer=True)
        check_number("dt_days", self.dt_days, lo=0.0, lo_open=True)
        check_choice("scheme", self.scheme, TIME_SCHEMES)


def transport_operator(grid: TransportGrid, model: TransportModel) -> np.ndarray:
    """The matrix ``L`` of ``dB/dt = L B`` (1/s) for the cell-mean field.

    Notes
    -----
    Face flux ``F_f = 2 pi R sin th_f [u_f (B_l + B_r)/2 - eta (B_r - B_l)/(R dth)]``
    (finite-volume form of Jiang et al. 2014, Space Sci. Rev. 186, 491, eq. 1
    averaged in longitude); ``dPhi_l/dt -= F_f``, ``dPhi_r/dt += F_f``;
    decay ``-B/tau``.
    """
    n = grid.n
    e = grid.edges_colat_rad
    r = grid.radius_m
    dth = np.diff(e)
    area = grid.area_m2
    eta = model.diffusivity_km2_s * _KM2
    faces = e[1:-1]
    u = meridional_flow_m_s(faces, model.flow_peak_m_s, model.flow_profile)
    ring = 2.0 * np.pi * r * np.sin(faces)
    h = 0.5 * (dth[1:] + dth[:-1])
    # F_f = alpha B_l + beta B_r (Jiang et al. 2014, eq. 1, flux form)
    alpha = ring * (0.5 * u + eta / (r * h))
    beta = ring * (0.5 * u - eta / (r * h))
    flux_op = np.zeros((n, n))
    idx = np.arange(n - 1)
    flux_op[idx, idx] -= alpha
    flux_op[idx, idx + 1] -= beta
    flux_op[idx + 1, idx] += alpha
    flux_op[idx + 1, idx + 1] += beta
    op = flux_op / area[:, None]
    if model.decay_years is not None:
        op -= np.eye(n) / (model.decay_years * 365.25 * SECONDS_PER_DAY)
    return op


def step_matrix(grid: TransportGrid, model: TransportModel, dt_days: float | None = None) -> np.ndarray:
    """One theta-method step ``B' = M B`` (dimensionless matrix).

    Notes
    -----
    ``M = (I - theta dt L)^-1 (I + (1 - theta) dt L)``; theta = 1/2 is
    Crank-Nicolson (second order), theta = 1 backward Euler (L-stable).
    """
    theta = TIME_SCHEMES[model.scheme]
    dt = (model.dt_days if dt_days is None else dt_days) * SECONDS_PER_DAY
    op = transport_operator(grid, model)
    eye = np.eye(grid.n)
    return np.linalg.solve(eye - theta * dt * op, eye + (1.0 - theta) * dt * op)


def deposit_ring(grid: TransportGrid, latitude_deg, flux_mx, width_deg: float, span: int = 8):
    """Spread signed fluxes over cells as Gaussian rings in latitude, conserving each flux.

    Parameters
    ----------
    grid : TransportGrid
    latitude_deg, flux_mx : ndarray
        Centre latitude (degrees) and signed flux (Mx) of each ring.
    width_deg : float
        Gaussian width in latitude, degrees.
    span : int
        Cells on each side of the nearest cell that receive flux.

    Returns
    -------
    cells : ndarray of int, shape (k, 2 span + 1)
    delta_br_gauss : ndarray, same shape
        Field increments; ``sum(delta * area_cm2)`` over a row equals its flux exactly
        (weights normalised over the cells that receive them).
    """
    lat = np.asarray(latitude_deg, dtype=float)
    flux = np.asarray(flux_mx, dtype=float)
    colat = np.deg2rad(90.0 - lat)
    step = np.pi / grid.n
    near = np.clip(np.floor(colat / step).astype(int), 0, grid.n - 1)
    cells = np.clip(near[:, None] + np.arange(-span, span + 1)[None, :], 0, grid.n - 1)
    lat_c = grid.latitude_deg[cells]
    area_cm2 = grid.area_m2[cells] * 1.0e4
    w = np.exp(-0.5 * ((lat_c - lat[:, None]) / width_deg) ** 2) * area_cm2
    # clipped duplicates at the poles: keep only the first occurrence of a cell in a row
    dup = np.zeros_like(cells, dtype=bool)
    dup[:, 1:] = cells[:, 1:] == cells[:, :-1]
    w[dup] = 0.0
    w /= w.sum(axis=1, keepdims=True)
    return cells, flux[:, None] * w / area_cm2


def legendre_cell_means(grid: TransportGrid, degree: int) -> np.ndarray:
    """Exact cell means of the Legendre polynomial ``P_l(cos th)``.

    Notes
    -----
    ``int P_l(x) dx = (P_(l+1)(x) - P_(l-1)(x)) / (2 l + 1)`` (Abramowitz &
    Stegun 1964, Handbook of Mathematical Functions, 8.5.3 / 22.8), divided by
    the cell's width in ``x = cos th``.
    """
    from scipy.special import eval_legendre

    x = np.cos(grid.edges_colat_rad)
    l = int(degree)
    if l < 1:
        raise ValueError(f"degree: got {degree!r}; use a degree >= 1")
    prim = (eval_legendre(l + 1, x) - eval_legendre(l - 1, x)) / (2 * l + 1)
    return (prim[:-1] - prim[1:]) / (x[:-1] - x[1:])
