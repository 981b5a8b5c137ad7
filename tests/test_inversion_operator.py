"""The discrete QG operator: grid validation, the stencil against analytic derivatives, and the
sparse assembly against the stencil."""
from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from workbench.errors import DomainError, GridError
from workbench.inversion.operator import QGGrid, apply_qg_operator, assemble_operator, horizontal_laplacian
from workbench.units import EARTH_RADIUS, KAPPA, P0, RD

P_LEVELS = np.array([1000, 925, 850, 700, 600, 500, 400, 300, 250, 200, 150, 100.0]) * 100.0


def sigma_profile(p):
    # a fixture profile (invented), positive and increasing upward like a real atmosphere
    return 2.0e-6 * (P_LEVELS[0] / p) ** 1.5


def make_grid(lat=np.linspace(35.0, 60.0, 11), lon=np.linspace(-20.0, 20.0, 17), p=P_LEVELS, f0=1.0e-4):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return QGGrid(lat, lon, p, sigma_profile(p), f0)


# ----------------------------------------------------------------------------- validation


def test_grid_rejects_equator_sigma_and_bad_axes():
    lon = np.linspace(-20, 20, 9)
    with pytest.raises(DomainError, match="equator"):
        QGGrid(np.linspace(-5, 20, 6), lon, P_LEVELS, sigma_profile(P_LEVELS), 1e-4)
    sig = sigma_profile(P_LEVELS).copy()
    sig[[2, 5]] = [-1e-7, 0.0]
    with pytest.raises(DomainError, match=r"850 hPa, 500 hPa.*stably stratified"):
        QGGrid(np.linspace(35, 60, 6), lon, P_LEVELS, sig, 1e-4)
    with pytest.raises(GridError, match="uniform"):
        QGGrid(np.linspace(35, 60, 6), np.array([0, 1, 2, 4, 5.0]), P_LEVELS, sigma_profile(P_LEVELS), 1e-4)
    with pytest.raises(GridError, match="ascending"):
        QGGrid(np.linspace(60, 35, 6), lon, P_LEVELS, sigma_profile(P_LEVELS), 1e-4)
    with pytest.raises(GridError, match="decreasing"):
        QGGrid(np.linspace(35, 60, 6), lon, P_LEVELS[::-1], sigma_profile(P_LEVELS), 1e-4)
    with pytest.raises(GridError, match="at least 3"):
        QGGrid(np.linspace(35, 60, 2), lon, P_LEVELS, sigma_profile(P_LEVELS), 1e-4)
    with pytest.raises(DomainError, match="non-zero"):
        QGGrid(np.linspace(35, 60, 6), lon, P_LEVELS, sigma_profile(P_LEVELS), 0.0)
    with pytest.raises(DomainError, match="wrong sign"):
        QGGrid(np.linspace(-60, -35, 6), lon, P_LEVELS, sigma_profile(P_LEVELS), 1e-4)


def test_grid_warns_when_f_varies_by_more_than_two():
    # f = 2 Omega sin(lat): sin(70)/sin(20) = 2.75 > 2 (arithmetic)
    with pytest.warns(UserWarning, match="factor"):
        QGGrid(np.linspace(20, 70, 6), np.linspace(0, 10, 5), P_LEVELS, sigma_profile(P_LEVELS), 1e-4)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        QGGrid(np.linspace(35, 60, 6), np.linspace(0, 10, 5), P_LEVELS, sigma_profile(P_LEVELS), 1e-4)


def test_periodic_flag_and_key():
    g = make_grid(lon=np.arange(0.0, 360.0, 15.0))
    assert g.periodic and g.interior_shape == (P_LEVELS.size, 9, 24)
    h = make_grid(lon=np.arange(0.0, 345.0, 15.0))
    assert not h.periodic
    assert make_grid() == make_grid() and hash(make_grid()) == hash(make_grid())
    assert make_grid(f0=1.1e-4).key != make_grid().key


# ----------------------------------------------------------------------------- the stencil


def test_horizontal_laplacian_converges_to_spherical_harmonic_eigenvalue():
    # Spherical harmonics: lap Y_l^m = -l(l+1)/a^2 Y_l^m (standard potential theory). Take
    # Y_2^1 ~ sin(lat) cos(lat) cos(lon): eigenvalue -6/a^2. Second-order scheme: error / 4 per halving.
    errs = []
    for n in (21, 41, 81):
        lat = np.linspace(30.0, 70.0, n)
        lon = np.linspace(-40.0, 40.0, n)
        g = make_grid(lat=lat, lon=lon)
        la, lo = np.meshgrid(np.deg2rad(lat), np.deg2rad(lon), indexing="ij")
        y = np.sin(la) * np.cos(la) * np.cos(lo)
        lap = horizontal_laplacian(g, y)
        errs.append(np.nanmax(np.abs(lap - (-6.0 / EARTH_RADIUS**2) * y)) / (6.0 / EARTH_RADIUS**2))
    assert errs[-1] < 1e-4
    assert errs[0] / errs[1] > 3.5 and errs[1] / errs[2] > 3.5


def test_vertical_operator_exact_for_quadratic_in_p():
    # Calculus: for phi = c p^2 and constant sigma, d/dp[(f0/sigma) dphi/dp] = 2 c f0 / sigma, and a
    # second-order finite-volume scheme with exact boundary fluxes reproduces it exactly on any
    # (non-uniform) levels. The boundary theta' comes from hydrostatics dphi/dp = -(R_d/p) Pi theta
    # (Holton & Hakim ch. 6).
    lat, lon = np.linspace(40, 50, 5), np.linspace(0, 10, 5)
    sig = np.full(P_LEVELS.size, 3.0e-6)
    g = QGGrid(lat, lon, P_LEVELS, sig, 1.0e-4)
    c = 1.0e-6
    phi = np.broadcast_to((c * P_LEVELS**2)[:, None, None], g.shape)
    dphidp = 2 * c * P_LEVELS
    theta = -(P_LEVELS / RD) * dphidp / (P_LEVELS / P0) ** KAPPA
    q = apply_qg_operator(g, phi, np.full((5, 5), theta[0]), np.full((5, 5), theta[-1]))
    inner = q[:, 1:-1, 1:-1]
    np.testing.assert_allclose(inner, 2 * c * 1.0e-4 / 3.0e-6, rtol=1e-10)
    assert np.isnan(q[:, 0, :]).all() and np.isnan(q[:, :, -1]).all()


# ----------------------------------------------------------------------------- sparse assembly


@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), periodic=st.booleans())
def test_assembled_matrix_equals_stencil(seed, periodic):
    # Two independent codings of the DEVELOPERS.md discretisation (Kronecker sparse assembly vs
    # array stencil) must agree on any field, with the boundary data moved to the right-hand side.
    rng = np.random.default_rng(seed)
    lat = np.sort(rng.uniform(30, 70, 7))
    lon = np.arange(0.0, 360.0, 40.0) if periodic else np.linspace(-30, 30, 8)
    g = make_grid(lat=lat, lon=lon)
    phi = rng.standard_normal(g.shape)
    bt, tt = rng.standard_normal(g.shape[1:]), rng.standard_normal(g.shape[1:])
    q = apply_qg_operator(g, phi, bt, tt)
    A = assemble_operator(g)
    x = phi[:, 1:-1, g.lon_slice].ravel()
    lhs = A.matrix @ x
    rhs = A.rhs(np.nan_to_num(q), bt, tt, phi)
    np.testing.assert_allclose(lhs, rhs, rtol=1e-10, atol=1e-12 * np.abs(rhs).max())
    assert A.matrix.shape == (x.size, x.size)
    np.testing.assert_array_equal(A.expand(x, phi), phi)
