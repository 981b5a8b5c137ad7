"""The discrete quasi-geostrophic (QG) potential-vorticity operator.

The anomaly operator is

    L(phi) = (1/f0) lap(phi) + d/dp[(f0/sigma) dphi/dp]

on a latitude-longitude-pressure grid, discretised exactly as DEVELOPERS.md
("QG discretisation") prescribes:

* horizontal: flux-form spherical Laplacian, uniform longitude spacing,
  latitude possibly non-uniform; the first and last latitude and longitude
  are Dirichlet nodes (a zonally periodic grid has no longitude boundary);
* vertical: finite volume on the levels with interfaces at the level
  midpoints; the lowest and highest cells are half cells whose outer face is
  the boundary level itself.  The flux through an outer face is
  ``F_b = (f0/sigma_b) (-R_d/p_b) Pi_b theta'_b`` (boundary theta' acts as a PV
  sheet); ``theta' = 0`` is the homogeneous Neumann case.

Multiplying by f0 gives ``f0 L = lap + f0**2 V`` with
``V = d/dp[(1/sigma) d/dp]``; ``V = H^-1 T`` with ``H`` the (positive) cell
thicknesses and ``T`` symmetric, negative semi-definite.  The fast solver
(:mod:`workbench.inversion.solver`) diagonalises ``H^-1/2 T H^-1/2``.

Three entry points:

* :class:`QGGrid` -- validated grid geometry and the reference state;
* :func:`apply_qg_operator` -- the stencil, phi -> q' (NaN on lateral
  boundary nodes);
* :func:`assemble_operator` -- the same operator as a sparse CSR matrix on the
  interior unknowns, with helpers that build the right-hand side and put a
  solution back on the full grid (for spsolve / PyAMG cross-checks).

Arrays are numpy, float64, shape ``(..., nz, ny, nx)`` with pressure
decreasing along ``nz`` (index 0 is the lowest level).
"""
from __future__ import annotations

import hashlib
import warnings
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from workbench.errors import DomainError, GridError
from workbench.units import EARTH_RADIUS, KAPPA, OMEGA, P0, RD

__all__ = [
    "QGGrid",
    "apply_qg_operator",
    "assemble_operator",
    "AssembledOperator",
    "horizontal_laplacian",
    "horizontal_matrix",
    "boundary_terms",
    "subtract_boundary_terms",
    "boundary_flux",
]


def _as_1d(name, values):
    arr = np.array(values, dtype=np.float64).ravel()
    if arr.ndim != 1 or arr.size == 0:
        raise GridError(f"{name}: expected a 1-D array of coordinates, got shape {np.shape(values)}.")
    if not np.all(np.isfinite(arr)):
        raise GridError(f"{name}: coordinates contain NaN or infinite values; give finite values.")
    arr.setflags(write=False)
    return arr


class QGGrid:
    """Geometry and reference state of one QG inversion grid.

    Parameters
    ----------
    lat : array (ny,)
        Latitude in degrees north, strictly ascending, all in one hemisphere
        (the domain must not reach the equator).  May be non-uniform.
    lon : array (nx,)
        Longitude in degrees east, strictly ascending with uniform spacing.
        If ``lon[-1] + dlon == lon[0] + 360`` the grid is zonally periodic.
    pressure : array (nz,)
        Pressure in Pa, strictly decreasing (index 0 is the lowest level).
    sigma : array (nz,)
        Reference static stability at the levels, m2 s-2 Pa-2; must be > 0.
    f0 : float
        Constant Coriolis parameter (s-1), non-zero, with the hemisphere's sign.

    Attributes
    ----------
    nz, ny, nx : int
    periodic : bool
        True when the longitudes cover exactly 360 degrees.
    dlam : float
        Longitude spacing in radians.
    phi : array (ny,)
        Latitude in radians.
    key : tuple
        Hashable identity of (grid, sigma, f0), used for caching solvers.

    Raises
    ------
    GridError
        Unsorted or non-uniform axes, fewer than 3 points on an axis.
    DomainError
        sigma <= 0 somewhere, f0 == 0, a domain that reaches the equator,
        or f0 of the wrong sign for the hemisphere.
    """

    def __init__(self, lat, lon, pressure, sigma, f0):
        lat = _as_1d("latitude", lat)
        lon = _as_1d("longitude", lon)
        pressure = _as_1d("pressure", pressure)
        sigma = _as_1d("static_stability (sigma)", sigma)
        for name, arr in (("latitude", lat), ("longitude", lon), ("pressure", pressure)):
            if arr.size < 3:
                raise GridError(
                    f"{name}: the QG inversion needs at least 3 points on each axis, got {arr.size}; "
                    "use a larger domain or more levels."
                )
        if not np.all(np.diff(lat) > 0):
            raise GridError("latitude: must be strictly ascending (south to north); sort the data by latitude.")
        if not np.all(np.diff(lon) > 0):
            raise GridError(
                "longitude: must be strictly ascending and contiguous; sort the data by longitude "
                "(roll data that cross the dateline so that longitudes increase without a jump)."
            )
        if not np.all(np.diff(pressure) < 0):
            raise GridError(
                "pressure: must be strictly decreasing (index 0 the lowest level, in Pa); "
                "reverse the level order."
            )
        if np.any(pressure <= 0):
            raise GridError("pressure: values must be positive (Pa).")
        dlon = np.diff(lon)
        if not np.allclose(dlon, dlon[0], rtol=1e-6, atol=1e-9):
            raise GridError(
                f"longitude: spacing must be uniform for the QG inversion (found spacings from "
                f"{dlon.min():g} to {dlon.max():g} degrees); regrid to a regular longitude grid."
            )
        if lon[-1] - lon[0] > 360.0 + 1e-6:
            raise GridError("longitude: the domain spans more than 360 degrees; drop the repeated longitudes.")
        if sigma.shape != pressure.shape:
            raise GridError(
                f"static_stability (sigma): has {sigma.size} values but there are {pressure.size} pressure "
                "levels; give sigma at every level."
            )
        bad = np.flatnonzero(~(sigma > 0))
        if bad.size:
            levels = ", ".join(f"{pressure[k] / 100.0:g} hPa" for k in bad)
            raise DomainError(
                f"static_stability (sigma): must be > 0 at every level but is <= 0 or missing at {levels}. "
                "The QG inversion needs a stably stratified reference state; use a larger averaging area, "
                "drop those levels, or give a reference sigma profile."
            )
        f0 = float(f0)
        if not np.isfinite(f0) or f0 == 0.0:
            raise DomainError("f0: the Coriolis parameter must be finite and non-zero; give f0 in s-1.")
        if lat[0] <= 0.0 <= lat[-1]:
            raise DomainError(
                f"latitude: the domain ({lat[0]:g} to {lat[-1]:g} degrees) reaches the equator, where f changes "
                "sign and QG theory does not hold; choose a domain within one hemisphere."
            )
        if np.any(np.abs(lat) > 90.0):
            raise GridError("latitude: values must lie within -90 and 90 degrees.")
        if np.sign(f0) != np.sign(lat[0]):
            raise DomainError(
                f"f0: {f0:g} s-1 has the wrong sign for a domain at {lat[0]:g} to {lat[-1]:g} degrees; "
                "f0 is negative in the southern hemisphere."
            )
        fabs = np.abs(2.0 * OMEGA * np.sin(np.deg2rad(lat)))
        if fabs.max() > 2.0 * fabs.min():
            warnings.warn(
                f"latitude: |f| varies by a factor {fabs.max() / fabs.min():.2f} (> 2) across the domain "
                f"({lat[0]:g} to {lat[-1]:g} degrees); constant-f0 QG inversion is a rough approximation here.",
                stacklevel=2,
            )

        self.lat = lat
        self.lon = lon
        self.pressure = pressure
        self.sigma = sigma
        self.f0 = f0
        self.nz, self.ny, self.nx = pressure.size, lat.size, lon.size
        self.dlon_deg = float(dlon.mean())
        self.dlam = np.deg2rad(self.dlon_deg)
        self.periodic = bool(abs(lon[-1] + self.dlon_deg - (lon[0] + 360.0)) < 1e-6 * 360.0)
        self.phi = np.deg2rad(lat)
        self.phi.setflags(write=False)
        self.a = EARTH_RADIUS

        h = hashlib.sha1()
        for arr in (lat, lon, pressure, sigma):
            h.update(np.ascontiguousarray(arr).tobytes())
        h.update(np.float64(f0).tobytes())
        self.key = (self.nz, self.ny, self.nx, self.periodic, h.hexdigest())

        self._vertical = None
        self._horizontal = None

    # ------------------------------------------------------------------ identity
    def __eq__(self, other):
        return isinstance(other, QGGrid) and other.key == self.key

    def __hash__(self):
        return hash(self.key)

    def __repr__(self):
        return (
            f"QGGrid(nz={self.nz}, ny={self.ny}, nx={self.nx}, lat={self.lat[0]:g}..{self.lat[-1]:g}, "
            f"lon={self.lon[0]:g}..{self.lon[-1]:g}, p={self.pressure[0] / 100:g}..{self.pressure[-1] / 100:g} hPa, "
            f"f0={self.f0:.4g}, periodic={self.periodic})"
        )

    @property
    def shape(self):
        """Full grid shape (nz, ny, nx)."""
        return (self.nz, self.ny, self.nx)

    @property
    def interior_shape(self):
        """Shape of the unknowns: (nz, ny-2, nx-2), or (nz, ny-2, nx) when periodic."""
        return (self.nz, self.ny - 2, self.nx if self.periodic else self.nx - 2)

    @property
    def lon_slice(self):
        """Slice of the interior (unknown) longitudes."""
        return slice(None) if self.periodic else slice(1, -1)

    # ------------------------------------------------------------------ vertical
    def vertical(self):
        """Vertical finite-volume coefficients (cached).

        Returns a dict with
        ``h`` (nz,) cell thickness in Pa (> 0; half cells at bottom and top),
        ``g`` (nz-1,) interface coefficients ``1/(sigma_{k+1/2} (p_k - p_{k+1}))``,
        ``T`` symmetric tridiagonal (nz, nz) dense array with ``V = diag(1/h) T``,
        ``exner`` (nz,) Pi = (p/p0)^kappa.
        """
        if self._vertical is None:
            p = self.pressure
            pm = 0.5 * (p[:-1] + p[1:])  # interfaces k+1/2
            edges = np.concatenate([[p[0]], pm, [p[-1]]])
            h = edges[:-1] - edges[1:]
            sig_half = 0.5 * (self.sigma[:-1] + self.sigma[1:])
            g = 1.0 / (sig_half * (p[:-1] - p[1:]))
            nz = self.nz
            T = np.zeros((nz, nz))
            idx = np.arange(nz - 1)
            T[idx, idx + 1] = g
            T[idx + 1, idx] = g
            T[idx, idx] -= g
            T[idx + 1, idx + 1] -= g
            self._vertical = dict(h=h, g=g, T=T, exner=(p / P0) ** KAPPA)
        return self._vertical

    # ---------------------------------------------------------------- horizontal
    def horizontal(self):
        """Horizontal Laplacian coefficients at the interior latitudes (cached).

        Returns a dict with, for interior rows j = 1..ny-2 (arrays of length ny-2):
        ``south``, ``north`` coefficients of P[j-1], P[j+1] in the meridional part,
        ``merid_diag`` its diagonal, and ``zonal`` = 1/(a^2 cos^2(phi_j) dlam^2),
        the factor of the zonal second difference.
        """
        if self._horizontal is None:
            a, phi = self.a, self.phi
            dphi = np.diff(phi)  # phi_{j+1} - phi_j, length ny-1
            cos_half = np.cos(0.5 * (phi[:-1] + phi[1:]))
            cj = np.cos(phi[1:-1])
            dj = 0.5 * (phi[2:] - phi[:-2])
            north = cos_half[1:] / (dphi[1:] * dj) / (a * a * cj)
            south = cos_half[:-1] / (dphi[:-1] * dj) / (a * a * cj)
            zonal = 1.0 / (a * a * cj * cj * self.dlam * self.dlam)
            self._horizontal = dict(south=south, north=north, merid_diag=-(south + north), zonal=zonal)
        return self._horizontal


def _check_shape(grid, name, arr, trailing):
    arr = np.asarray(arr, dtype=np.float64)
    if arr.shape[-len(trailing):] != tuple(trailing):
        raise GridError(
            f"{name}: shape {arr.shape} does not end with the grid shape {tuple(trailing)}; "
            "give the field on the inversion grid (dims ..., pressure, latitude, longitude)."
        )
    return arr


def horizontal_laplacian(grid, field):
    """Flux-form spherical Laplacian of ``field`` (..., ny, nx) at the interior rows.

    Returns an array of shape (..., ny, nx) with NaN on the lateral boundary
    nodes (first/last latitude; first/last longitude unless periodic).
    """
    hc = grid.horizontal()
    f = np.asarray(field, dtype=np.float64)
    out = np.full(f.shape, np.nan)
    c = f[..., 1:-1, :]
    merid = (
        hc["north"][:, None] * f[..., 2:, :] + hc["south"][:, None] * f[..., :-2, :] + hc["merid_diag"][:, None] * c
    )
    if grid.periodic:
        zon = np.roll(c, -1, axis=-1) + np.roll(c, 1, axis=-1) - 2.0 * c
        out[..., 1:-1, :] = merid + hc["zonal"][:, None] * zon
    else:
        zon = c[..., 2:] + c[..., :-2] - 2.0 * c[..., 1:-1]
        out[..., 1:-1, 1:-1] = merid[..., 1:-1] + hc["zonal"][:, None] * zon
    return out


def boundary_flux(grid, theta, level):
    """Outer-face flux ``F_b = (f0/sigma_b)(-R_d/p_b) Pi_b theta'_b`` at ``level`` 0 or -1."""
    p = grid.pressure[level]
    pi = (p / P0) ** KAPPA
    return (grid.f0 / grid.sigma[level]) * (-RD / p) * pi * np.asarray(theta, dtype=np.float64)


def apply_qg_operator(grid, phi, bottom_theta=None, top_theta=None):
    """QG PV anomaly q' = L(phi') of a geopotential anomaly on the grid.

    Parameters
    ----------
    grid : QGGrid
    phi : array (..., nz, ny, nx)
        Geopotential anomaly (m2 s-2).
    bottom_theta, top_theta : array (..., ny, nx) or None
        Potential-temperature anomaly (K) on the lowest / highest level that
        sets the outer-face flux of the half cells; None means 0 (homogeneous
        Neumann).

    Returns
    -------
    q : array (..., nz, ny, nx)
        QG PV anomaly (s-1), NaN on the lateral boundary nodes.  Inverting q
        with the same boundary theta' and phi's lateral values returns phi.
    """
    phi = _check_shape(grid, "phi", phi, grid.shape)
    f0 = grid.f0
    vc = grid.vertical()
    h, g = vc["h"], vc["g"]
    # vertical part: (1/h_k)[g_{k+1/2}(P_{k+1}-P_k) - g_{k-1/2}(P_k-P_{k-1})] times f0
    flux = g[:, None, None] * (phi[..., 1:, :, :] - phi[..., :-1, :, :])  # (..., nz-1, ny, nx)
    div = np.zeros(phi.shape)
    div[..., :-1, :, :] += flux
    div[..., 1:, :, :] -= flux
    vert = f0 * div / h[:, None, None]
    if bottom_theta is not None:
        bt = _check_shape(grid, "bottom_theta", bottom_theta, grid.shape[1:])
        vert[..., 0, :, :] += boundary_flux(grid, bt, 0) / h[0]
    if top_theta is not None:
        tt = _check_shape(grid, "top_theta", top_theta, grid.shape[1:])
        vert[..., -1, :, :] -= boundary_flux(grid, tt, -1) / h[-1]
    return horizontal_laplacian(grid, phi) / f0 + vert


# ---------------------------------------------------------------------------
# sparse assembly
# ---------------------------------------------------------------------------


@dataclass
class AssembledOperator:
    """The QG operator on the interior unknowns as a sparse matrix.

    ``matrix @ x == b`` where ``x`` is phi at the unknown nodes (C order of
    ``grid.interior_shape``) and ``b = rhs(q, ...)``; ``expand(x, lateral)``
    returns phi on the full grid.
    """

    grid: QGGrid
    matrix: sp.csr_matrix

    @property
    def shape(self):
        return self.grid.interior_shape

    def rhs(self, q, bottom_theta=None, top_theta=None, lateral=None):
        """Right-hand side vector for one field q (nz, ny, nx): q minus the boundary terms."""
        grid = self.grid
        q = _check_shape(grid, "q", q, grid.shape)
        if q.ndim != 3:
            raise GridError("q: assemble_operator works on one (nz, ny, nx) field at a time.")
        js, ls = slice(1, -1), grid.lon_slice
        b = np.array(q[:, js, ls], dtype=np.float64)
        subtract_boundary_terms(grid, b, bottom_theta, top_theta, lateral)
        return b.ravel()

    def spd_scaling(self):
        """Row weights d with ``diag(d) @ matrix`` symmetric positive definite.

        ``d = -f0 h_k cos(phi_j) (phi_{j+1} - phi_{j-1})/2`` (cell thickness x
        latitude-cell area factor); use it for solvers that need a symmetric
        positive-definite matrix (conjugate gradients, smoothed-aggregation AMG):
        solve ``(diag(d) A) x = d * b``.
        """
        g = self.grid
        nz, nyi, nxi = g.interior_shape
        h = g.vertical()["h"]
        dj = 0.5 * (g.phi[2:] - g.phi[:-2]) * np.cos(g.phi[1:-1])
        w = -g.f0 * h[:, None, None] * dj[None, :, None] * np.ones((1, 1, nxi))
        return w.ravel()

    def expand(self, x, lateral=None):
        """Full-grid phi from the interior solution x (lateral Dirichlet values from ``lateral``)."""
        grid = self.grid
        out = np.zeros(grid.shape) if lateral is None else np.array(lateral, dtype=np.float64)
        out[:, 1:-1, grid.lon_slice] = np.asarray(x).reshape(grid.interior_shape)
        return out


def boundary_terms(grid, bottom_theta=None, top_theta=None, lateral=None):
    """The known part of L at the interior nodes: what the boundary data add to L.

    ``L(phi) = L_int(phi at the unknowns) + boundary_terms(...)``, so the
    linear system on the unknowns is ``L_int x = q - boundary_terms``.  The
    boundary theta' enter as ``+F_b/h_0`` in the lowest cell and ``-F_t/h_top``
    in the highest; the lateral Dirichlet values through the horizontal stencil
    (only at the interior nodes next to the lateral boundary).
    Returns an array (..., nz, ny, nx) (values at lateral nodes are meaningless).
    """
    lead = ()
    for arr, n in ((bottom_theta, 2), (top_theta, 2), (lateral, 3)):
        if arr is not None:
            lead = np.broadcast_shapes(lead, np.shape(arr)[:-n])
    out = np.zeros(lead + grid.shape)
    subtract_boundary_terms(grid, out[..., 1:-1, grid.lon_slice], bottom_theta, top_theta, lateral, sign=-1.0)
    return out


def subtract_boundary_terms(grid, rhs, bottom_theta=None, top_theta=None, lateral=None, sign=1.0):
    """In place: ``rhs -= sign * boundary_terms`` on the unknowns (rhs shape (..., *grid.interior_shape)).

    Touches only the lowest and highest level (theta') and the rows/columns next
    to the lateral boundary (lateral data), so it costs O(boundary), not O(volume).
    """
    vc = grid.vertical()
    js, ls = slice(1, -1), grid.lon_slice
    if bottom_theta is not None:
        bt = _check_shape(grid, "bottom_theta", bottom_theta, grid.shape[1:])
        rhs[..., 0, :, :] -= sign * (boundary_flux(grid, bt[..., js, ls], 0) / vc["h"][0])
    if top_theta is not None:
        tt = _check_shape(grid, "top_theta", top_theta, grid.shape[1:])
        rhs[..., -1, :, :] += sign * (boundary_flux(grid, tt[..., js, ls], -1) / vc["h"][-1])
    if lateral is not None:
        lat = _check_shape(grid, "lateral", lateral, grid.shape)
        hc = grid.horizontal()
        c = sign / grid.f0
        # meridional neighbours: row 1 sees row 0, row ny-2 sees row ny-1
        rhs[..., :, 0, :] -= (c * hc["south"][0]) * lat[..., :, 0, ls]
        rhs[..., :, -1, :] -= (c * hc["north"][-1]) * lat[..., :, -1, ls]
        if not grid.periodic:
            # zonal neighbours: column 1 sees column 0, column nx-2 sees column nx-1
            rhs[..., :, :, 0] -= (c * hc["zonal"]) * lat[..., :, 1:-1, 0]
            rhs[..., :, :, -1] -= (c * hc["zonal"]) * lat[..., :, 1:-1, -1]
    return rhs


def horizontal_matrix(grid):
    """Sparse CSR matrix of the horizontal Laplacian on the interior nodes (C order (ny-2, nx_interior))."""
    _, nyi, nxi = grid.interior_shape
    hc = grid.horizontal()
    merid = sp.diags(
        [hc["south"][1:], hc["merid_diag"], hc["north"][:-1]], [-1, 0, 1], shape=(nyi, nyi), format="csr"
    )
    d2 = sp.diags([np.ones(nxi - 1), -2.0 * np.ones(nxi), np.ones(nxi - 1)], [-1, 0, 1], shape=(nxi, nxi), format="lil")
    if grid.periodic:
        d2[0, nxi - 1] = 1.0
        d2[nxi - 1, 0] = 1.0
    d2 = d2.tocsr()
    return sp.csr_matrix(sp.kron(merid, sp.identity(nxi)) + sp.kron(sp.diags(hc["zonal"]), d2))


def assemble_operator(grid):
    """Sparse CSR matrix of L on the interior unknowns, built from 1-D Kronecker factors.

    The unknowns are phi at every level and at the interior horizontal nodes
    (``grid.interior_shape``, C order).  Returns an :class:`AssembledOperator`
    with ``.matrix`` and the helpers ``.rhs(q, bottom_theta, top_theta,
    lateral)`` and ``.expand(x, lateral)``.  Meant for cross-checks with
    ``scipy.sparse.linalg.spsolve`` or PyAMG on small grids.
    """
    nz, nyi, nxi = grid.interior_shape
    vc = grid.vertical()
    lap_h = horizontal_matrix(grid)
    vert = sp.diags(1.0 / vc["h"]) @ sp.csr_matrix(vc["T"])
    mat = sp.kron(sp.identity(nz), lap_h) / grid.f0 + grid.f0 * sp.kron(vert, sp.identity(nyi * nxi))
    return AssembledOperator(grid=grid, matrix=sp.csr_matrix(mat))
