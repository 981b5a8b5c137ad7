"""QG omega (Q-vector form) and the omega attributable to a piece."""
from __future__ import annotations

import warnings

import numpy as np
import xarray as xr
from scipy.sparse.linalg import spsolve

from workbench.inversion.omega import (
    OmegaSolver,
    assemble_omega_operator,
    omega_forcing,
    piece_omega,
    qg_omega,
)
from workbench.inversion.operator import QGGrid
from workbench.units import EARTH_RADIUS, coriolis

P = np.array([1000, 950, 900, 850, 800, 700, 600, 500, 400, 300, 250, 200, 150, 100.0]) * 100.0
LAT = np.linspace(30.0, 60.0, 31)
LON = np.linspace(-45.0, 45.0, 61)
F0 = float(coriolis(45.0))


def sigma(p=P):
    return xr.DataArray(2.0e-6 * (p[0] / p) ** 1.5, dims="pressure", coords={"pressure": p})  # fixture profile


def as_da(values, p=P, lat=LAT, lon=LON):
    return xr.DataArray(values, dims=("pressure", "latitude", "longitude"),
                        coords=dict(pressure=p, latitude=lat, longitude=lon))


def baroclinic_trough(amp=1500.0):
    """Invented fixture: westerly shear U(p) = 10 + 20 (1 - p/p0) m/s in thermal-wind balance with
    a poleward temperature decrease, plus an upper trough (phi' < 0) deepening with height."""
    Pg, Yg, Xg = np.meshgrid(P, np.deg2rad(LAT), np.deg2rad(LON), indexing="ij")
    U = 10.0 + 20.0 * (1.0 - Pg / P[0])
    base = 9.81 * 7000.0 * np.log(P[0] / Pg)
    zonal = -F0 * U * EARTH_RADIUS * (Yg - np.deg2rad(45.0))
    trough = -amp * (1.0 - Pg / P[0]) * np.exp(-((Xg / np.deg2rad(12.0)) ** 2) - ((Yg - np.deg2rad(45.0)) / np.deg2rad(7.0)) ** 2)
    return base + zonal, trough


def test_omega_solver_matches_spsolve():
    # Reference: scipy.sparse.linalg.spsolve on the same assembled omega operator
    # (sigma lap + f0^2 d2/dp2, omega = 0 on all boundaries), small grid, 1e-9 relative.
    rng = np.random.default_rng(4)
    lat = np.sort(rng.uniform(35, 60, 10))
    lon = np.linspace(-20, 20, 12)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        g = QGGrid(lat, lon, P, sigma().values, F0)
    F = rng.standard_normal(g.shape) * 1e-17
    w = OmegaSolver(g).solve(F)
    A = assemble_omega_operator(g)
    x = spsolve(A.tocsc(), F[1:-1, 1:-1, 1:-1].ravel()).reshape(g.nz - 2, g.ny - 2, g.nx - 2)
    assert np.abs(w[1:-1, 1:-1, 1:-1] - x).max() <= 1e-9 * np.abs(x).max()
    assert (w[0] == 0).all() and (w[-1] == 0).all() and (w[:, 0] == 0).all() and (w[:, :, -1] == 0).all()


def test_ascent_ahead_of_upper_trough():
    # Textbook QG theory (Holton & Hakim, ch. 6): in westerly shear, air ascends (omega < 0) ahead
    # (east) of an upper trough and descends (omega > 0) behind it (west), at mid-levels.
    base, trough = baroclinic_trough()
    w = qg_omega(as_da(base + trough), sigma(), F0)
    assert w.attrs["units"] == "Pa s-1" and w.attrs["beta_term"] == "dropped"
    mid = w.sel(pressure=50000.0, latitude=45.0)
    east = float(mid.sel(longitude=slice(3.0, 20.0)).min())
    west = float(mid.sel(longitude=slice(-20.0, -3.0)).max())
    assert east < 0 < west
    # the extremes sit east and west of the trough axis (longitude 0)
    assert float(mid.idxmin()) > 0 > float(mid.idxmax())
    # magnitude a few tenths of a Pa/s at most for this weak wave (common practice: synoptic
    # omega ~ 0.1-1 Pa s-1)
    assert 1e-3 < abs(east) < 2.0


def test_steady_zonal_flow_has_no_qg_vertical_motion():
    # Q-vector theory (Hoskins, Draghici & Davies 1978): a zonal flow in thermal-wind balance with
    # no longitude dependence has Q = 0, hence omega = 0.
    base, _ = baroclinic_trough()
    w = qg_omega(as_da(base), sigma(), F0)
    assert np.abs(w.values).max() < 1e-12


def test_omega_is_quadratic_in_the_flow_and_piece_definition():
    # Q = -(R_d/p)(dVg/dx . grad T, dVg/dy . grad T) is bilinear in the flow (Hoskins, Draghici &
    # Davies 1978) and the operator is linear, so omega(c phi) = c^2 omega(phi) with hydrostatic T.
    base, trough = baroclinic_trough()
    total = as_da(base + trough)
    w1 = qg_omega(total, sigma(), F0).values
    w2 = qg_omega(2.0 * total, sigma(), F0).values
    np.testing.assert_allclose(w2, 4.0 * w1, rtol=1e-9, atol=1e-12 * np.abs(w1).max())
    # piece omega = omega(total) - omega(total minus piece): the whole flow as the piece gives the
    # total omega; an empty piece gives zero.
    np.testing.assert_allclose(piece_omega(total, total, sigma(), F0).values, w1, atol=1e-12 * np.abs(w1).max())
    assert np.abs(piece_omega(total, 0.0 * total, sigma(), F0).values).max() == 0.0
    pw = piece_omega(total, as_da(trough), sigma(), F0)
    assert "minus the piece" in pw.attrs["definition"]
    # without the trough the flow is zonal and has no omega, so the trough's omega is the total
    np.testing.assert_allclose(pw.values, w1, atol=1e-9 * np.abs(w1).max())


def test_beta_term_option():
    base, trough = baroclinic_trough()
    total = as_da(base + trough)
    wb = qg_omega(total, sigma(), F0, include_beta=True)
    w0 = qg_omega(total, sigma(), F0)
    assert wb.attrs["beta_term"] == "included" and "beta" in wb.attrs["equation"]
    assert np.abs(wb.values - w0.values).max() > 0
    # the beta forcing f0 beta dvg/dp is linear in phi: the difference doubles with the flow
    g = QGGrid(LAT, LON, P, sigma().values, F0)
    d1 = omega_forcing(g, (base + trough), include_beta=True) - omega_forcing(g, base + trough)
    d2 = omega_forcing(g, 2 * (base + trough), include_beta=True) - omega_forcing(g, 2 * (base + trough))
    np.testing.assert_allclose(d2, 2 * d1, rtol=1e-6, atol=1e-12 * np.abs(d1).max())
