"""Flux-transport solver: analytic diffusion on a sphere, flux conservation, deposits."""

import numpy as np
import pytest

from pipeline.synth.transport import (TransportModel, deposit_ring, legendre_cell_means, make_grid,
                                      meridional_flow_m_s, step_matrix, transport_operator)

YEAR_S = 365.25 * 86400.0


def _project(grid, b, mode):
    w = grid.area_m2
    return float((b * mode * w).sum() / (mode * mode * w).sum())


@pytest.mark.parametrize("scheme", ["crank_nicolson", "backward_euler"])
@pytest.mark.parametrize("degree", [1, 2, 4])
def test_legendre_mode_decays_as_handbook_solution(scheme, degree):
    # Pure diffusion on a sphere: P_l(cos th) is an eigenfunction of the surface Laplacian with
    # eigenvalue -l(l+1)/R^2, so B = P_l exp(-l(l+1) eta t / R^2) (handbook solution of the
    # diffusion equation on a sphere, e.g. Arfken & Weber, Mathematical Methods for Physicists,
    # spherical harmonics section).  Tolerance 1% (issue 3).
    grid = make_grid(180)
    eta_km2_s = 500.0
    model = TransportModel(diffusivity_km2_s=eta_km2_s, flow_peak_m_s=0.0, decay_years=None,
                           dt_days=5.0, scheme=scheme)
    mat = step_matrix(grid, model)
    mode = legendre_cell_means(grid, degree)
    rate = degree * (degree + 1) * eta_km2_s * 1e6 / grid.radius_m ** 2
    n_steps = int(round(1.5 / (rate * 5 * 86400.0)))  # 1.5 e-folding times
    b = mode.copy()
    for _ in range(n_steps):
        b = mat @ b
    expected = np.exp(-rate * n_steps * 5 * 86400.0)
    assert _project(grid, b, mode) == pytest.approx(expected, rel=0.01)
    # the shape stays the Legendre mode (no leakage into other modes beyond 1%)
    assert np.max(np.abs(b - expected * mode)) < 0.01 * expected


def test_total_signed_flux_conserved_without_decay_or_sources():
    # Finite-volume form: faces exchange flux, the poles carry none, so sum(A_i B_i) is constant;
    # with a net-zero start it stays zero to round-off (issue 3; conservation law of the
    # transport equation, Jiang et al. 2014, Space Sci. Rev. 186, 491, eq. 1).
    grid = make_grid(180)
    model = TransportModel(diffusivity_km2_s=300.0, flow_peak_m_s=15.0, decay_years=None, dt_days=5.0)
    mat = step_matrix(grid, model)
    rng = np.random.default_rng(3)
    b = rng.normal(0.0, 10.0, grid.n)
    b -= (b * grid.area_m2).sum() / grid.area_m2.sum()
    scale = (np.abs(b) * grid.area_m2).sum()
    for _ in range(4000):  # 55 years
        b = mat @ b
    assert abs((b * grid.area_m2).sum()) / scale < 1e-12
    # and the operator itself annihilates the area vector: a^T L = 0
    op = transport_operator(grid, model)
    assert np.max(np.abs(grid.area_m2 @ op)) / np.max(np.abs(op * grid.area_m2[:, None])) < 1e-13


def test_decay_term_gives_exponential_decay():
    # dB/dt = -B / tau alone: B(t) = B0 exp(-t / tau) (handbook ODE); Crank-Nicolson to 0.1%.
    grid = make_grid(90)
    model = TransportModel(diffusivity_km2_s=0.0, flow_peak_m_s=0.0, decay_years=5.0, dt_days=2.0)
    mat = step_matrix(grid, model)
    b = np.ones(grid.n)
    n = 1826  # ~10 years
    for _ in range(n):
        b = mat @ b
    assert b.mean() == pytest.approx(np.exp(-n * 2.0 / 365.25 / 5.0), rel=1e-3)


def test_flow_builds_polar_concentration_from_uniform_band():
    # A poleward flow carries flux of one sign toward its pole (advection; common practice, no source)
    grid = make_grid(180)
    model = TransportModel(diffusivity_km2_s=250.0, flow_peak_m_s=15.0, decay_years=None)
    mat = step_matrix(grid, model)
    lat = grid.latitude_deg
    b = np.where((lat > 20) & (lat < 40), 1.0, 0.0)
    b -= np.where((lat < -20) & (lat > -40), 1.0, 0.0)
    for _ in range(730):  # 10 years
        b = mat @ b
    assert b[lat > 70].mean() > 5 * abs(b[(lat > 20) & (lat < 40)].mean())


def test_deposit_ring_conserves_each_flux():
    # every ring's deposited field x area sums back to its flux (conservative source; regression only)
    grid = make_grid(180)
    lat = np.array([89.7, 15.0, -3.0, -89.9])
    flux = np.array([1e21, -2e22, 5e20, 3e21])
    cells, delta = deposit_ring(grid, lat, flux, 2.0)
    total = (delta * grid.area_m2[cells] * 1e4).sum(axis=1)
    assert np.allclose(total, flux, rtol=1e-12)


def test_flow_profiles_poleward_and_unknown_name():
    colat = np.deg2rad([45.0, 135.0])
    u = meridional_flow_m_s(colat, 12.0, "sin2lat")
    assert u[0] == pytest.approx(-12.0) and u[1] == pytest.approx(12.0)  # toward each pole
    assert np.all(meridional_flow_m_s(np.deg2rad([5.0, 175.0]), 12.0, "cut75") == 0.0)
    with pytest.raises(ValueError, match="profile: got 'bogus'; valid choices are cut75, sin2lat"):
        meridional_flow_m_s(colat, 12.0, "bogus")


def test_model_validation_names_the_key():
    from pipeline.config import ConfigError

    with pytest.raises(ConfigError, match="scheme: got 'rk4'"):
        TransportModel(scheme="rk4")
    with pytest.raises(ConfigError, match="dt_days: got -1"):
        TransportModel(dt_days=-1)
