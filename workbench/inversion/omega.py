"""QG vertical motion from the Q-vector form of the omega equation.

    sigma lap(omega) + f0**2 d2(omega)/dp2 = -2 div(Q)  [+ f0 beta d(v_g)/dp]

with ``Q = -(R_d/p) (dV_g/dx . grad T, dV_g/dy . grad T)`` (Hoskins, Draghici
& Davies 1978, QJRMS 104, 31-38), the geostrophic wind with the constant f0
from the geopotential, ``omega = 0`` on all boundaries (bottom, top and
lateral).  The beta term is dropped by default (``include_beta=False``; the
output's attrs say which).

Discretisation: the operator's flux-form spherical Laplacian; the vertical
second difference on the non-uniform levels (interface spacing
``d_{k+1/2} = p_k - p_{k+1}``, cell width ``(p_{k-1} - p_{k+1})/2``) at the
interior levels.  Q and its divergence use second-order centred differences
in the spherical metric (dx = a cos(lat) dlon, dy = a dlat; divergence
``(a cos lat)^-1 [dQ1/dlon + d(Q2 cos lat)/dlat]``), the Q components
themselves in the local Cartesian form.  Solved by the same direct method
as the inversion (vertical eigenmodes with Dirichlet top/bottom x DST/FFT x
tridiagonal), see :class:`~workbench.inversion.solver.SeparableSolver`.

Omega attributable to a piece (:func:`piece_omega`): Q is bilinear in the
flow, so piece contributions do not add.  We define the piece's omega as the
total omega minus the omega of the flow without the piece's balanced
geopotential: ``omega(Phi) - omega(Phi - Phi_piece)``, the ascent/descent
that would be lost if the piece were removed.
"""
from __future__ import annotations

import threading
from collections import OrderedDict

import numpy as np
import scipy.sparse as sp
import xarray as xr

from workbench.errors import GridError
from workbench.inversion.fields import _deriv, grid_for, hydrostatic_temperature, spatial_dims
from workbench.inversion.operator import QGGrid, horizontal_matrix
from workbench.inversion.solver import SeparableSolver
from workbench.units import EARTH_RADIUS, OMEGA, RD

__all__ = [
    "qg_omega",
    "piece_omega",
    "q_vector",
    "omega_forcing",
    "OmegaSolver",
    "get_omega_solver",
    "assemble_omega_operator",
]


def _omega_vertical(grid: QGGrid):
    """Weights w_k = sigma_k h_k and the symmetric second-difference T on interior levels 1..nz-2."""
    p = grid.pressure
    d = p[:-1] - p[1:]  # d_{k+1/2}, length nz-1
    h = 0.5 * (p[:-2] - p[2:])  # interior cell widths, length nz-2
    inv_d = 1.0 / d
    n = grid.nz - 2
    T = np.zeros((n, n))
    idx = np.arange(n)
    T[idx, idx] = -(inv_d[:-1] + inv_d[1:])
    T[idx[:-1], idx[:-1] + 1] = inv_d[1:-1]
    T[idx[:-1] + 1, idx[:-1]] = inv_d[1:-1]
    return grid.sigma[1:-1] * h, T, h


class OmegaSolver:
    """Direct solver of ``sigma lap(w) + f0^2 d2w/dp2 = F`` with w = 0 on all boundaries."""

    def __init__(self, grid: QGGrid, workers: int | None = None):
        if grid.nz < 3:
            raise GridError("pressure: the omega equation needs at least 3 levels (omega = 0 at bottom and top).")
        self.grid = grid
        w, T, _ = _omega_vertical(grid)
        self._engine = SeparableSolver(grid, w, T, grid.f0 * grid.f0, workers=workers)

    def solve(self, forcing):
        """omega (..., nz, ny, nx) from the forcing F (..., nz, ny, nx); boundary values of F are ignored."""
        g = self.grid
        F = np.asarray(forcing, dtype=float)
        if F.shape[-3:] != g.shape:
            raise GridError(f"forcing: shape {F.shape} does not end with the grid shape {g.shape}.")
        ls = g.lon_slice
        r = F[..., 1:-1, 1:-1, ls] / g.sigma[1:-1, None, None]
        if not np.all(np.isfinite(r)):
            raise GridError(
                "omega forcing: NaN or infinite values at interior nodes (missing geopotential or temperature); "
                "fill them (e.g. below ground) before computing QG omega."
            )
        x = self._engine.solve_interior(r)
        out = np.zeros(x.shape[:-3] + g.shape)
        out[..., 1:-1, 1:-1, ls] = x
        return out


_CACHE: "OrderedDict[tuple, OmegaSolver]" = OrderedDict()
_LOCK = threading.Lock()


def get_omega_solver(grid: QGGrid) -> OmegaSolver:
    """Cached :class:`OmegaSolver` per ``grid.key`` (4 kept)."""
    with _LOCK:
        s = _CACHE.get(grid.key)
        if s is not None:
            _CACHE.move_to_end(grid.key)
            return s
    s = OmegaSolver(grid)
    with _LOCK:
        _CACHE[grid.key] = s
        while len(_CACHE) > 4:
            _CACHE.popitem(last=False)
    return s


def assemble_omega_operator(grid: QGGrid):
    """Sparse CSR matrix of ``sigma lap + f0^2 d2/dp2`` on the unknowns (nz-2, ny-2, nx_interior), C order."""
    _, nyi, nxi = grid.interior_shape
    w, T, h = _omega_vertical(grid)
    lap_h = horizontal_matrix(grid)
    vert = sp.diags(1.0 / h) @ sp.csr_matrix(T)
    mat = sp.kron(sp.diags(grid.sigma[1:-1]), lap_h) + grid.f0**2 * sp.kron(vert, sp.identity(nyi * nxi))
    return sp.csr_matrix(mat)


def _ddx(a, grid):
    return _deriv(a, np.deg2rad(grid.lon), -1, periodic=grid.periodic) / (
        EARTH_RADIUS * np.cos(grid.phi)[:, None]
    )


def _ddy(a, grid):
    return _deriv(a, grid.phi, -2) / EARTH_RADIUS


def q_vector(grid: QGGrid, phi, temperature=None):
    """Q vector (Q1, Q2) (m2 kg-1 s-1) and the geostrophic wind (u_g, v_g) from geopotential (numpy).

    ``temperature`` default: hydrostatic, ``T = -(p/R_d) dphi/dp`` (differentiated in ln p).
    """
    phi = np.asarray(phi, dtype=float)
    p = grid.pressure
    if temperature is None:
        temperature = hydrostatic_temperature(phi, p)
    t = np.asarray(temperature, dtype=float)
    ug = -_ddy(phi, grid) / grid.f0
    vg = _ddx(phi, grid) / grid.f0
    tx, ty = _ddx(t, grid), _ddy(t, grid)
    fac = -(RD / p)[:, None, None]
    q1 = fac * (_ddx(ug, grid) * tx + _ddx(vg, grid) * ty)
    q2 = fac * (_ddy(ug, grid) * tx + _ddy(vg, grid) * ty)
    return q1, q2, ug, vg


def omega_forcing(grid: QGGrid, phi, temperature=None, include_beta=False):
    """Right-hand side ``-2 div Q (+ f0 beta dv_g/dp)`` (numpy, Pa-1 s-3 ... in the equation's units)."""
    q1, q2, _, vg = q_vector(grid, phi, temperature)
    cos = np.cos(grid.phi)[:, None]
    div = (
        _deriv(q1, np.deg2rad(grid.lon), -1, periodic=grid.periodic) + _deriv(q2 * cos, grid.phi, -2)
    ) / (EARTH_RADIUS * cos)
    F = -2.0 * div
    if include_beta:
        lat0 = np.arcsin(np.clip(grid.f0 / (2.0 * OMEGA), -1.0, 1.0))
        beta = 2.0 * OMEGA * np.cos(lat0) / EARTH_RADIUS
        F = F + grid.f0 * beta * np.gradient(vg, grid.pressure, axis=-3, edge_order=2)
    return F


def _omega_da(template, values, include_beta, definition=None):
    attrs = dict(
        standard_name="lagrangian_tendency_of_air_pressure",
        long_name="quasi-geostrophic vertical motion (omega)",
        units="Pa s-1",
        equation="sigma lap(omega) + f0^2 d2omega/dp2 = -2 div Q" + (" + f0 beta dvg/dp" if include_beta else ""),
        beta_term="included" if include_beta else "dropped",
        boundary_condition="omega = 0 on all boundaries",
        caution="Diagnostic analysis of model or analysis data, not a forecast or warning.",
    )
    if definition:
        attrs["definition"] = definition
    return xr.DataArray(values, dims=template.dims, coords=template.coords, name="qg_omega", attrs=attrs)


def qg_omega(geopotential: xr.DataArray, sigma, f0=None, temperature=None, include_beta=False) -> xr.DataArray:
    """QG omega (Pa s-1) of the geostrophic flow of ``geopotential`` (m2 s-2).

    Parameters
    ----------
    geopotential : DataArray (..., pressure, latitude, longitude), full field
        (or anomaly plus reference; only its gradients matter).
    sigma : DataArray over pressure (or array), reference static stability.
    f0 : float, optional; default the Coriolis parameter at the central latitude.
    temperature : DataArray like geopotential, optional; default hydrostatic
        from the geopotential.
    include_beta : bool
        Add ``f0 beta dv_g/dp`` (beta at the latitude where f = f0); default dropped.
    """
    phi = spatial_dims(geopotential, "geopotential")
    grid = grid_for(phi, sigma, f0)
    t = None
    if temperature is not None:
        t = spatial_dims(temperature, "temperature").values
    F = omega_forcing(grid, phi.values, t, include_beta)
    w = get_omega_solver(grid).solve(F)
    return _omega_da(phi, w, include_beta)


def piece_omega(total_geopotential, piece_geopotential, sigma, f0=None, include_beta=False) -> xr.DataArray:
    """Omega attributable to a piece: ``omega(Phi) - omega(Phi - Phi_piece)`` (Pa s-1).

    Both omegas use the hydrostatic temperature of their own geopotential.
    Because Q is bilinear in the flow, the omegas of a set of pieces do not
    add up to the total omega.
    """
    tot = spatial_dims(total_geopotential, "total_geopotential")
    pc = spatial_dims(piece_geopotential, "piece_geopotential")
    if pc.shape[-3:] != tot.shape[-3:]:
        raise GridError("piece_geopotential: not on the same grid as total_geopotential; use the piece's inversion.")
    grid = grid_for(tot, sigma, f0)
    solver = get_omega_solver(grid)
    full = tot.values
    without = full - pc.values
    F = np.stack(np.broadcast_arrays(omega_forcing(grid, full, None, include_beta),
                                     omega_forcing(grid, without, None, include_beta)))
    w = solver.solve(F)
    return _omega_da(
        tot if tot.ndim >= pc.ndim else pc,
        w[0] - w[1],
        include_beta,
        definition="omega(total) - omega(total minus the piece's balanced geopotential)",
    )
