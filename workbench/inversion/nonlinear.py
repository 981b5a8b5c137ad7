"""Nonlinear-balance (Charney balance) inversion of Ertel PV with f varying with latitude.

Computation only (no plotting, no widgets).  See DEVELOPERS.md, "Nonlinear balance".

Equations (Davis & Emanuel 1991, Mon. Wea. Rev. 119, 1929-1953, their balance and PV
equations, written on the sphere).  Vertical coordinate: the Exner function
``pi = c_p (p/p0)^kappa``, so that ``theta = -dPhi/dpi`` (hydrostatic).  Unknowns: the
geopotential Phi and the streamfunction psi of the nondivergent balanced wind
(``u = -(1/a) dpsi/dlat``, ``v = (1/(a cos lat)) dpsi/dlon``).

* PV equation (Ertel PV, hydrostatic, nondivergent wind):
  ``q = (g kappa pi / p) [ (f + lap psi) Phi_pipi - grad(psi_pi) . grad(Phi_pi) ]``;
* balance equation (divergence equation with D = dD/dt = 0, vertical advection dropped),
  exact on the sphere for a nondivergent wind:
  ``lap Phi = div(f grad psi) + 2 det(H psi) - |grad psi|^2 / a^2``, where ``H psi`` is the
  covariant Hessian of psi (on a plane the last term vanishes and this is the familiar
  ``lap Phi = div(f grad psi) + 2 (psi_xx psi_yy - psi_xy^2)``).  The identity used is
  ``div((V.grad)V) = -2 det(H psi) + |V|^2/a^2`` (Ricci identity on a sphere of radius a);
* boundaries: ``dPhi/dpi = -theta`` on the lowest and highest level (Neumann), Phi and psi
  given on the lateral boundary nodes.

f = 2 Omega sin(lat) (or a constant, for f-plane checks).  ``f`` is positive in the northern
hemisphere; the system is elliptic where ``f q > 0`` and ``f (f + zeta) > 0``.

Discretisation on the normalised grid (unknowns on the nodes, lateral nodes Dirichlet):
``lap`` is the flux-form spherical Laplacian of the QG operator; ``div(f grad psi)`` the
same with f at the half latitudes; ``H_yy = psi_latlat/a^2``, ``H_xx = lap psi - H_yy``,
``H_xy = (psi_lonlat + tan(lat) psi_lon)/(a^2 cos lat)``; first derivatives centred (second
order on the non-uniform latitudes); ``Phi_pipi`` finite volume on the levels with half cells
whose outer face carries ``-theta`` (as the QG operator does with its boundary PV sheets);
``Phi_pi`` centred in pi, ``-theta`` on the boundary levels; ``psi_pi`` centred, one-sided
second order on the boundary levels.

Solver: inexact Newton (Eisenstat-Walker forcing) with a right-preconditioned GMRES on the
exact Jacobian (the system is quadratic), the inner solves in single precision (residual and
state in double), preconditioned by the linearisation with the level-mean Phi_pipi and the
row-mean absolute vorticity in place of f.  The preconditioner is two
separable direct solves on the engine of :class:`~workbench.inversion.solver.SeparableSolver`
(vertical eigenmodes x sine/Fourier transform in longitude x one tridiagonal sweep in
latitude, the latitude-dependent f folded into the sweep):
``(lap + f^2 S^-1 D_pipi) dPhi = f r1/(C S) + r2`` and ``div(f grad dpsi) = lap dPhi - r2``.

Pieces (Davis 1992, J. Atmos. Sci. 49, 1397-1411, piecewise inversion linearised about the
full balanced state): every piece's forcing (Ertel PV anomaly in its mask, boundary theta',
lateral Phi'/psi') is inverted with the tangent-linear system at the full balanced state;
the pieces add up exactly to the linear response to the whole anomaly, and
``"nonlinear remainder"`` = full anomaly - sum of the linear pieces is returned as its own
entry, so the attribution table shows it as a row.
"""
from __future__ import annotations

import json
import time as _time
import warnings
from dataclasses import dataclass, field

import numpy as np
import scipy.fft as sfft
import xarray as xr

from workbench.errors import DomainError, InputError, PieceError
from workbench.inversion.fields import _ATTRS, central_f0, hydrostatic_temperature, spatial_dims
from workbench.inversion.kernels import JACOBIAN_COEFFICIENTS, jacobian_apply, padded, terms_and_residual
from workbench.places import point_label
from workbench.inversion.operator import QGGrid, horizontal_laplacian
from workbench.inversion.solver import SeparableSolver, _blas_threads
from workbench.units import CP, EARTH_RADIUS, G, KAPPA, OMEGA, P0, PVU

__all__ = [
    "BalanceGrid",
    "BalanceResult",
    "solve_balance",
    "balance_residual",
    "ertel_pv_nb",
    "boundary_streamfunction",
    "streamfunction",
    "nonlinear_fields",
    "invert_nonlinear_pieces",
    "case_balanced_state",
    "balance_quality",
    "bench_nonlinear",
    "NONLINEAR_REMAINDER",
    "DEFAULT_TOL",
]

#: Name of the attribution row / results entry holding full minus the sum of linear pieces.
NONLINEAR_REMAINDER = "nonlinear remainder"
#: Default stopping tolerance on the relative residual (see :func:`solve_balance`).
DEFAULT_TOL = 1e-6


# ---------------------------------------------------------------------------
# grid and discrete operators
# ---------------------------------------------------------------------------


class BalanceGrid:
    """Geometry of the nonlinear-balance system on a latitude-longitude-pressure grid.

    Parameters
    ----------
    lat, lon, pressure : arrays as for :class:`~workbench.inversion.operator.QGGrid`
        (latitude ascending, one hemisphere; longitude uniform; pressure in Pa, decreasing).
    f : None or float
        None: ``f = 2 Omega sin(lat)``; a number: constant f (f-plane; for checks).
    """

    def __init__(self, lat, lon, pressure, f=None):
        lat = np.asarray(lat, dtype=float)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # |f| may vary by more than 2: f varies here anyway
            self.qg = QGGrid(lat, lon, pressure, np.ones(np.size(pressure)), central_f0(lat))
        g = self.qg
        self.lat, self.lon, self.pressure = g.lat, g.lon, g.pressure
        self.nz, self.ny, self.nx = g.shape
        self.shape = g.shape
        self.interior_shape = g.interior_shape
        self.periodic = g.periodic
        self.ls = g.lon_slice
        self.a = EARTH_RADIUS
        self.phi = g.phi
        self.dlam = g.dlam
        self.f_plane = f is not None
        if f is None:
            self.f = 2.0 * OMEGA * np.sin(self.phi)
            self.f_half = 2.0 * OMEGA * np.sin(0.5 * (self.phi[1:] + self.phi[:-1]))
        else:
            f = float(f)
            if not np.isfinite(f) or f == 0.0 or np.sign(f) != np.sign(lat[0]):
                raise DomainError(f"f: a constant Coriolis parameter must be finite, non-zero and have the "
                                  f"sign of the hemisphere (got {f:g} s-1 for latitudes {lat[0]:g}..{lat[-1]:g}).")
            self.f = np.full(self.ny, f)
            self.f_half = np.full(self.ny - 1, f)
        self.sign = 1.0 if self.f[0] > 0 else -1.0
        self.f0 = float(np.mean(self.f))
        p = self.pressure
        self.pi = CP * (p / P0) ** KAPPA
        self.C = G * KAPPA * self.pi / p  # q = C [ ... ]
        dpi = np.diff(self.pi)  # negative
        hs = np.empty(self.nz)
        hs[0], hs[-1] = 0.5 * dpi[0], 0.5 * dpi[-1]
        hs[1:-1] = 0.5 * (self.pi[2:] - self.pi[:-2])
        self.dpi, self.hs = dpi, hs  # signed
        # symmetric negative semi-definite T with D_pipi = diag(1/|hs|) T
        gpos = 1.0 / np.abs(dpi)
        T = np.zeros((self.nz, self.nz))
        k = np.arange(self.nz - 1)
        T[k, k + 1] = gpos
        T[k + 1, k] = gpos
        T[k, k] -= gpos
        T[k + 1, k + 1] -= gpos
        self.T, self.hpos = T, np.abs(hs)
        # horizontal geometry at the interior rows
        hc = g.horizontal()
        self.hc = hc
        j = slice(1, -1)
        self.cos = np.cos(self.phi)[j][:, None]
        self.tan = np.tan(self.phi)[j][:, None]
        self.fi = self.f[j][:, None]
        self.divf = dict(
            south=hc["south"] * self.f_half[:-1],
            north=hc["north"] * self.f_half[1:],
            zonal=hc["zonal"] * self.f[j],
        )
        self.divf["merid_diag"] = -(self.divf["south"] + self.divf["north"])
        ph = self.phi
        hm, hp = ph[1:-1] - ph[:-2], ph[2:] - ph[1:-1]
        self._dphi_w = (-hp / (hm * (hm + hp)), (hp - hm) / (hm * hp), hm / (hp * (hm + hp)))
        self._d2phi_w = (2.0 / (hm * (hm + hp)), -2.0 / (hm * hp), 2.0 / (hp * (hm + hp)))
        self.uniform_lat = bool(np.all(np.abs(self._dphi_w[1]) < 1e-12 * np.abs(self._dphi_w[0])))
        self.rx = 1.0 / (2.0 * self.dlam * self.a * self.cos)  # raw centred lon difference -> d/dx
        D = np.gradient(np.eye(self.nz), self.pi, axis=0, edge_order=2)  # d/dpi (np.gradient's weights)
        self._dpi_matrix = D
        self._dphi_w_a = tuple(w / self.a for w in self._dphi_w)
        self._d2phi_w_a2 = tuple(w / self.a ** 2 for w in self._d2phi_w)

    @property
    def key(self):
        return (self.qg.key, self.f_plane, float(self.f[0]))

    # --- horizontal derivatives at the interior nodes ------------------------------------
    def d_lon_rows(self, a):
        """d/dlon (per radian) at the interior longitudes, every latitude row: (..., ny, nxi)."""
        if self.periodic:
            return (np.roll(a, -1, axis=-1) - np.roll(a, 1, axis=-1)) / (2.0 * self.dlam)
        return (a[..., 2:] - a[..., :-2]) / (2.0 * self.dlam)

    def d_lat(self, b):
        """d/dlat (per radian) at the interior rows of b (..., ny, m): (..., ny-2, m)."""
        w0, w1, w2 = self._dphi_w
        return w0[:, None] * b[..., :-2, :] + w1[:, None] * b[..., 1:-1, :] + w2[:, None] * b[..., 2:, :]

    def d2_lat(self, b):
        w0, w1, w2 = self._d2phi_w
        return w0[:, None] * b[..., :-2, :] + w1[:, None] * b[..., 1:-1, :] + w2[:, None] * b[..., 2:, :]

    def lap(self, a):
        """Flux-form spherical Laplacian at the interior nodes (..., nz, nyi, nxi)."""
        return self._flux_form(a, self.hc)

    def div_f_grad(self, a):
        """div(f grad a) in flux form (f at the half latitudes) at the interior nodes."""
        return self._flux_form(a, self.divf)

    def _flux_form(self, a, co):
        """north (a[j+1]-a[j]) - south (a[j]-a[j-1]) + zonal (second difference), in place."""
        north, south, zonal = (co[k][:, None] for k in ("north", "south", "zonal"))
        if self.periodic:
            c = a[..., 1:-1, :]
            out = a[..., 2:, :] - c
            out *= north
            t = c - a[..., :-2, :]
            t *= south
            out -= t
            np.add(np.roll(c, -1, axis=-1), np.roll(c, 1, axis=-1), out=t)
        else:
            c = a[..., 1:-1, 1:-1]
            out = a[..., 2:, 1:-1] - c
            out *= north
            t = c - a[..., :-2, 1:-1]
            t *= south
            out -= t
            np.add(a[..., 1:-1, 2:], a[..., 1:-1, :-2], out=t)
        t -= c
        t -= c
        t *= zonal
        out += t
        return out

    def interior(self, a):
        return a[..., 1:-1, self.ls]

    def coefficients(self, dtype):
        """(Laplacian, div(f grad)) flux-form coefficient dicts cast to ``dtype`` (cached), so
        that the single-precision inner solves stay in single precision."""
        dtype = np.dtype(dtype)
        cache = self.__dict__.setdefault("_coeff_cache", {})
        if dtype not in cache:
            cache[dtype] = tuple({k: np.asarray(v, dtype) for k, v in co.items()} for co in (self.hc, self.divf))
        return cache[dtype]

    # --- vertical -------------------------------------------------------------------------
    def d_pi(self, a):
        """d/dpi at the levels, second order (one-sided second order on the end levels; the
        weights of ``np.gradient(a, pi, edge_order=2)``)."""
        D = self._dpi_matrix
        if self.nz < 3:
            return np.gradient(a, self.pi, axis=-3, edge_order=2)
        out = np.empty(np.shape(a))
        o = out[..., 1:-1, :, :]
        k = np.arange(1, self.nz - 1)
        np.multiply(D[k, k - 1][:, None, None], a[..., :-2, :, :], out=o)
        o += D[k, k][:, None, None] * a[..., 1:-1, :, :]
        o += D[k, k + 1][:, None, None] * a[..., 2:, :, :]
        out[..., 0, :, :] = D[0, 0] * a[..., 0, :, :] + D[0, 1] * a[..., 1, :, :] + D[0, 2] * a[..., 2, :, :]
        out[..., -1, :, :] = (D[-1, -3] * a[..., -3, :, :] + D[-1, -2] * a[..., -2, :, :]
                              + D[-1, -1] * a[..., -1, :, :])
        return out

    def lap_and_div_f_grad(self, a, coeffs=None, outs=None, work=None):
        """(lap a, div(f grad a)) at the interior nodes, sharing the differences of a
        (``coeffs``: the coefficient dicts, default the grid's float64 (Laplacian, div(f grad));
        ``outs``: arrays of the interior shape to write into; ``work``: four scratch arrays)."""
        coeffs = coeffs or (self.hc, self.divf)
        sh = a.shape[:-2] + (self.ny - 2, self.qg.interior_shape[-1])
        dn, ds, dz, t = work if work is not None else (np.empty(sh, a.dtype) for _ in range(4))
        if self.periodic:
            c = a[..., 1:-1, :]
            np.add(c[..., 2:], c[..., :-2], out=dz[..., 1:-1])
            np.add(c[..., 1], c[..., -1], out=dz[..., 0])
            np.add(c[..., 0], c[..., -2], out=dz[..., -1])
            np.subtract(a[..., 2:, :], c, out=dn)
            np.subtract(c, a[..., :-2, :], out=ds)
        else:
            c = a[..., 1:-1, 1:-1]
            np.add(a[..., 1:-1, 2:], a[..., 1:-1, :-2], out=dz)
            np.subtract(a[..., 2:, 1:-1], c, out=dn)
            np.subtract(c, a[..., :-2, 1:-1], out=ds)
        dz -= c
        dz -= c
        outs = outs or tuple(np.empty(sh, a.dtype) for _ in coeffs)
        for co, o in zip(coeffs, outs):
            np.multiply(dn, co["north"][:, None], out=o)
            np.multiply(ds, co["south"][:, None], out=t)
            o -= t
            np.multiply(dz, co["zonal"][:, None], out=t)
            o += t
        return tuple(outs)

    def d2_pi(self, a, theta_b, theta_t):
        """Phi_pipi by finite volume; the outer faces carry dPhi/dpi = -theta."""
        grad = (a[..., 1:, :, :] - a[..., :-1, :, :]) / self.dpi[:, None, None]  # faces k+1/2
        out = np.empty(a.shape)
        out[..., 1:-1, :, :] = grad[..., 1:, :, :] - grad[..., :-1, :, :]
        out[..., 0, :, :] = grad[..., 0, :, :] + theta_b
        out[..., -1, :, :] = -theta_t - grad[..., -1, :, :]
        return out / self.hs[:, None, None]


def _zero2(grid):
    return np.zeros(grid.shape[1:])


def _terms(grid, Phi, psi, theta_b, theta_t, ws=None):
    """Derived quantities at the interior nodes shared by the residual and the Jacobian.

    The same stencils as the grid's derivative methods, written with the metric factors
    folded into per-row weights and the differences of psi shared between its Laplacian and
    div(f grad psi) (fewer passes over the 3-D fields: this runs once per Newton step).
    ``ws``: a dict of arrays from an earlier call that may be written over (the results then
    live in those arrays); None allocates new ones."""
    g = grid
    a = g.a
    ls = g.ls
    Phi = np.asarray(Phi, float)
    psi = np.asarray(psi, float)
    theta_b, theta_t = np.asarray(theta_b, float), np.asarray(theta_t, float)
    lead = Phi.shape[:-3]
    nz, nyi, nxi = g.interior_shape
    ish = lead + g.interior_shape

    def arr(key, shape=ish):
        if ws is None:
            return np.empty(shape)
        b = ws.get(key)
        if b is None or b.shape != shape:
            b = ws[key] = np.empty(shape)
        return b

    tmp = arr("tmp", lead + g.shape)
    D = g._dpi_matrix

    def dpi(b, out):
        """d/dpi (np.gradient's second-order weights) of a full-grid field into out"""
        k = np.arange(1, nz - 1)
        o, t = out[..., 1:-1, :, :], tmp[..., 1:-1, :, :]
        np.multiply(b[..., :-2, :, :], D[k, k - 1][:, None, None], out=o)
        np.multiply(b[..., 1:-1, :, :], D[k, k][:, None, None], out=t)
        o += t
        np.multiply(b[..., 2:, :, :], D[k, k + 1][:, None, None], out=t)
        o += t
        out[..., 0, :, :] = D[0, 0] * b[..., 0, :, :] + D[0, 1] * b[..., 1, :, :] + D[0, 2] * b[..., 2, :, :]
        out[..., -1, :, :] = (D[-1, -3] * b[..., -3, :, :] + D[-1, -2] * b[..., -2, :, :]
                              + D[-1, -1] * b[..., -1, :, :])
        return out

    Pp = dpi(Phi, arr("Pp", lead + g.shape))
    Pp[..., 0, :, :] = -theta_b
    Pp[..., -1, :, :] = -theta_t
    sp_ = dpi(psi, arr("sp", lead + g.shape))
    # Phi_pipi by finite volume at the interior nodes; the outer faces carry dPhi/dpi = -theta
    Pi = Phi[..., 1:-1, ls]
    grad = tmp[..., :nz - 1, 1:-1, ls]
    np.subtract(Pi[..., 1:, :, :], Pi[..., :-1, :, :], out=grad)
    grad *= (1.0 / g.dpi)[:, None, None]
    Spp = arr("Spp")
    np.subtract(grad[..., 1:, :, :], grad[..., :-1, :, :], out=Spp[..., 1:-1, :, :])
    np.add(grad[..., 0, :, :], theta_b[..., 1:-1, ls], out=Spp[..., 0, :, :])
    np.subtract(-theta_t[..., 1:-1, ls], grad[..., -1, :, :], out=Spp[..., -1, :, :])
    Spp *= (1.0 / g.hs)[:, None, None]
    rx = g.rx  # 1 / (2 dlam a cos lat) at the interior rows

    def gx(b, key):
        """d/dx at the interior nodes (raw centred longitude difference times rx)"""
        out = arr(key)
        c = b[..., 1:-1, :]
        if g.periodic:
            np.subtract(c[..., 2:], c[..., :-2], out=out[..., 1:-1])
            np.subtract(c[..., 1], c[..., -1], out=out[..., 0])
            np.subtract(c[..., 0], c[..., -2], out=out[..., -1])
        else:
            np.subtract(c[..., 2:], c[..., :-2], out=out)
        out *= rx
        return out

    def lat(b, w, key, first=True):
        """w[0] b[j-1] + w[1] b[j] + w[2] b[j+1] at the interior rows (b: all rows); ``first``:
        first-derivative weights (w[1] = 0 and w[0] = -w[2] on uniform latitudes)"""
        out = arr(key)
        if first and g.uniform_lat:
            np.subtract(b[..., 2:, :], b[..., :-2, :], out=out)
            out *= w[2][:, None]
            return out
        t = tmp[..., :nz, :nyi, :nxi]
        np.multiply(b[..., :-2, :], w[0][:, None], out=out)
        np.multiply(b[..., 1:-1, :], w[1][:, None], out=t)
        out += t
        np.multiply(b[..., 2:, :], w[2][:, None], out=t)
        out += t
        return out

    wy = g._dphi_w_a  # d/dlat weights / a

    work = tuple(arr(k) for k in ("w1", "w2", "w3", "w4"))
    zeta, divf = g.lap_and_div_f_grad(psi, outs=(arr("zeta"), arr("divf")), work=work)
    (lapPhi,) = g.lap_and_div_f_grad(Phi, coeffs=(g.hc,), outs=(arr("lapPhi"),), work=work)
    psx = gx(psi, "psx")
    psy = lat(psi[..., ls], wy, "psy")
    hyy = lat(psi[..., ls], g._d2phi_w_a2, "hyy", first=False)
    hxx = arr("hxx")
    np.subtract(zeta, hyy, out=hxx)
    # hxy = (d/dlat of the raw lon difference) rx / a + tan psx / a
    sx_rows = arr("sx_rows", lead + (nz, g.ny, nxi))
    if g.periodic:
        np.subtract(psi[..., 2:], psi[..., :-2], out=sx_rows[..., 1:-1])
        np.subtract(psi[..., 1], psi[..., -1], out=sx_rows[..., 0])
        np.subtract(psi[..., 0], psi[..., -2], out=sx_rows[..., -1])
    else:
        np.subtract(psi[..., 2:], psi[..., :-2], out=sx_rows)
    hxy = lat(sx_rows, g._dphi_w, "hxy")
    hxy *= rx / a
    t = tmp[..., :nz, :nyi, :nxi]
    np.multiply(psx, g.tan / a, out=t)
    hxy += t
    return dict(
        Spp=Spp, Ppx=gx(Pp, "Ppx"), Ppy=lat(Pp[..., ls], wy, "Ppy"), spx=gx(sp_, "spx"),
        spy=lat(sp_[..., ls], wy, "spy"), zeta=zeta, hxx=hxx, hyy=hyy, hxy=hxy, psx=psx, psy=psy,
        lapPhi=lapPhi, divf=divf,
    )


def _eta(grid, d, eta_floor):
    """Absolute vorticity at the interior nodes, floored (sign of f) when ``eta_floor`` is set."""
    eta = grid.fi + d["zeta"]
    if eta_floor is None:
        return eta, None
    lo = eta_floor * np.abs(grid.fi)
    clipped = grid.sign * eta < lo
    return np.where(clipped, grid.sign * lo, eta), clipped


def _pv(grid, d, eta):
    C = grid.C[:, None, None]
    return C * (eta * d["Spp"] - (d["spx"] * d["Ppx"] + d["spy"] * d["Ppy"]))


def _balance(grid, d):
    a = grid.a
    return (d["lapPhi"] - d["divf"] - 2.0 * (d["hxx"] * d["hyy"] - d["hxy"] ** 2)
            + (d["psx"] ** 2 + d["psy"] ** 2) / a ** 2)


def ertel_pv_nb(grid: BalanceGrid, Phi, psi, theta_b, theta_t):
    """Ertel PV (K m2 kg-1 s-1) of (Phi, psi) with the inversion's own stencil, NaN on the lateral nodes."""
    d = _terms(grid, np.asarray(Phi, float), np.asarray(psi, float), theta_b, theta_t)
    out = np.full(grid.shape, np.nan)
    out[..., 1:-1, grid.ls] = _pv(grid, d, grid.fi + d["zeta"])
    return out


def balance_residual(grid: BalanceGrid, Phi, psi, q, theta_b, theta_t, eta_floor=None):
    """(E1, E2) at the interior nodes: PV residual (K m2 kg-1 s-1) and balance residual (s-2)."""
    d = _terms(grid, Phi, psi, theta_b, theta_t)
    eta, _ = _eta(grid, d, eta_floor)
    return _pv(grid, d, eta) - grid.interior(q), _balance(grid, d)


def _jvp(grid, d, eta, clipped, dPhi, dpsi, dtb, dtt):
    """Tangent-linear (E1, E2) at the state with terms ``d`` for full-grid increments."""
    e = _terms(grid, dPhi, dpsi, dtb, dtt)
    dzeta = e["zeta"] if clipped is None else np.where(clipped, 0.0, e["zeta"])
    C = grid.C[:, None, None]
    r1 = C * (eta * e["Spp"] + dzeta * d["Spp"]
              - (d["spx"] * e["Ppx"] + e["spx"] * d["Ppx"] + d["spy"] * e["Ppy"] + e["spy"] * d["Ppy"]))
    r2 = (e["lapPhi"] - e["divf"]
          - 2.0 * (d["hxx"] * e["hyy"] + e["hxx"] * d["hyy"] - 2.0 * d["hxy"] * e["hxy"])
          + 2.0 * (d["psx"] * e["psx"] + d["psy"] * e["psy"]) / grid.a ** 2)
    return r1, r2


class _Jacobian:
    """The tangent-linear operator of :func:`_jvp` at one state, with its coefficients
    precomputed: every product is a fixed set of shifted multiply-adds on the increments
    (vertical three-point weights, latitude weights per row, horizontal coefficients folded
    with the metric factors) instead of re-deriving all terms of the state.  Increments are
    zero on the lateral nodes and the boundary theta is not perturbed (the Newton and piece
    solves).  ``dtype`` float32 gives the single-precision products of the inner solves
    (coefficients are formed in float64 and stored in ``dtype``)."""

    def __init__(self, grid, d, eta, clipped, dtype=np.float64, reuse=None, coefficients=None):
        """``coefficients``: the products' coefficient arrays already formed (in ``dtype``, by
        :func:`workbench.inversion.kernels.terms_and_residual`); then ``d``, ``eta`` and
        ``clipped`` are not used."""
        g = self.g = grid
        a = g.a
        dt = self.dtype = np.dtype(dtype)
        # the arrays of an operator no longer needed (the previous Newton step's) are written over
        # instead of allocating new ones (measured: fresh arrays cost more than the arithmetic)
        old = reuse.__dict__ if reuse is not None and reuse.g is g and reuse.dtype == dt else {}
        C = g.C[:, None, None]
        D = np.gradient(np.eye(g.nz), g.pi, axis=0, edge_order=2)  # d/dpi as a matrix (np.gradient's weights)
        self._dpi_end = [float(x) for x in (D[0, 0], D[0, 1], D[0, 2], D[-1, -3], D[-1, -2], D[-1, -1])]
        self._dpi_w = [np.asarray(x, dt)[:, None, None] for x in
                       (np.diagonal(D, -1)[:-1], np.diagonal(D)[1:-1], np.diagonal(D, 1)[1:])]
        self._uniform = bool(np.all(np.abs(g._dphi_w[1]) < 1e-12 * np.abs(g._dphi_w[0])))
        self._w = [np.asarray(w, dt)[:, None] for w in g._dphi_w]  # d/dlat weights per interior row
        self._v = [np.asarray(w, dt)[:, None] for w in g._d2phi_w]  # d2/dlat2 weights
        inv_x = 1.0 / (2.0 * g.dlam * a * g.cos)  # raw centred lon difference -> d/dx
        shape = g.interior_shape

        def c(name, x, factor):
            """x * factor written straight into ``dtype`` (one pass over the field)"""
            out = old.get(name)
            if out is None:
                out = np.empty(shape, dt)
            np.multiply(x, factor, out=out, casting="same_kind" if dt == np.float64 else "unsafe")
            setattr(self, name, out)

        if coefficients is not None:
            for name in JACOBIAN_COEFFICIENTS:
                setattr(self, name, coefficients[name])
        else:
            self._coefficients(d, eta, clipped, c, C, inv_x)
        self._hc, self._divf = g.coefficients(dt)
        self._rdpi = (1.0 / g.dpi).astype(dt)[:, None, None]
        self._rhs = (1.0 / g.hs).astype(dt)[:, None, None]
        self._X = old["_X"] if "_X" in old else np.zeros(g.shape, dt)  # lateral nodes stay 0
        self._Y = old["_Y"] if "_Y" in old else np.zeros(g.shape, dt)
        self._work = old.get("_work", {})

    def _coefficients(self, d, eta, clipped, c, C, inv_x):
        """The coefficients of the products from the state's terms (NumPy passes)."""
        g, a = self.g, self.g.a
        c("cE", eta, C)
        c("cS", d["Spp"] if clipped is None else np.where(clipped, 0.0, d["Spp"]), C)
        c("cspx", d["spx"], C * inv_x)
        c("cPpx", d["Ppx"], C * inv_x)
        c("cspy", d["spy"], C / a)
        c("cPpy", d["Ppy"], C / a)
        hxx, hyy, hxy = d["hxx"], d["hyy"], d["hxy"]
        c("c_lap", hyy, -2.0)
        c("c_d2", hxx - hyy, -2.0 / a ** 2)
        c("c_lat", d["psy"], 2.0 / a ** 3)
        c("c_xy", hxy, 4.0 / (a * a * g.cos * 2.0 * g.dlam))
        lon = hxy * (4.0 * g.tan / (a * a * g.cos * 2.0 * g.dlam))
        lon += d["psx"] * (2.0 / (a ** 3 * g.cos * 2.0 * g.dlam))
        c("c_lon", lon, 1.0)

    def _dlon(self, b):
        """Raw centred longitude difference b[i+1] - b[i-1] at the interior longitudes."""
        if self.g.periodic:
            return np.roll(b, -1, axis=-1) - np.roll(b, 1, axis=-1)
        return b[..., 2:] - b[..., :-2]

    def _dpi(self, b, ends, out=None):
        lo, md, up = self._dpi_w
        out = np.empty(b.shape, b.dtype) if out is None else out
        tmp = self._buf("dpi_t", b.shape)[1:-1]
        o = out[1:-1]
        np.multiply(lo, b[:-2], out=o)
        np.multiply(md, b[1:-1], out=tmp)
        o += tmp
        np.multiply(up, b[2:], out=tmp)
        o += tmp
        if ends:
            e = self._dpi_end
            out[0] = e[0] * b[0] + e[1] * b[1] + e[2] * b[2]
            out[-1] = e[3] * b[-3] + e[4] * b[-2] + e[5] * b[-1]
        else:
            out[0] = 0.0
            out[-1] = 0.0
        return out

    def _buf(self, name, shape):
        """A work array of this operator, reused by every product (no allocation per product)."""
        b = self._work.get(name)
        if b is None:
            b = self._work[name] = np.empty(shape, self.dtype)
        return b

    def _dlon_into(self, b, out):
        """Raw centred longitude difference b[i+1] - b[i-1] at the interior longitudes, into out."""
        if self.g.periodic:
            np.subtract(b[..., 2:], b[..., :-2], out=out[..., 1:-1])
            np.subtract(b[..., 1], b[..., -1], out=out[..., 0])
            np.subtract(b[..., 0], b[..., -2], out=out[..., -1])
        else:
            np.subtract(b[..., 2:], b[..., :-2], out=out)
        return out

    def _lat_into(self, b, w, out, tmp):
        """w[0] b[j-1] + w[1] b[j] + w[2] b[j+1] at the interior rows (b: all rows), into out."""
        if self._uniform and w is self._w:  # w[0] = -w[2], w[1] = 0
            np.subtract(b[..., 2:, :], b[..., :-2, :], out=out)
            out *= w[2]
            return out
        np.multiply(b[..., :-2, :], w[0], out=out)
        np.multiply(b[..., 2:, :], w[2], out=tmp)
        out += tmp
        np.multiply(b[..., 1:-1, :], w[1], out=tmp)
        out += tmp
        return out

    def _flux_into(self, a, cos, outs, c):
        """Flux-form operators (north/south/zonal coefficient dicts ``cos``) of a at the interior
        nodes into ``outs``, sharing the differences of a; ``c`` the centre view of a."""
        g = self.g
        sh = outs[0].shape
        dn, ds, dz = self._buf("dn", sh), self._buf("ds", sh), self._buf("dz", sh)
        if g.periodic:
            np.subtract(a[..., 2:, :], c, out=dn)
            np.subtract(c, a[..., :-2, :], out=ds)
            np.add(c[..., 2:], c[..., :-2], out=dz[..., 1:-1])
            np.add(c[..., 1], c[..., -1], out=dz[..., 0])
            np.add(c[..., 0], c[..., -2], out=dz[..., -1])
        else:
            np.subtract(a[..., 2:, 1:-1], c, out=dn)
            np.subtract(c, a[..., :-2, 1:-1], out=ds)
            np.add(a[..., 1:-1, 2:], a[..., 1:-1, :-2], out=dz)
        dz -= c
        dz -= c
        t = self._buf("ft", sh)
        for co, out in zip(cos, outs):
            np.multiply(dn, co["north"][:, None], out=out)
            np.multiply(ds, co["south"][:, None], out=t)
            out -= t
            np.multiply(dz, co["zonal"][:, None], out=t)
            out += t
        return outs

    def apply(self, x1, x2):
        """(E1, E2) increments for interior increments (x1, x2) of (Phi, psi), by the compiled
        loop of :func:`workbench.inversion.kernels.jacobian_apply` (the same numbers as
        :meth:`apply_numpy` to round-off).  The two arrays returned are work arrays of this
        operator, overwritten by its next product."""
        g = self.g
        nz, nyi, nxi = ish = g.interior_shape
        buf = self._buf
        # pairs of arrays in one block each (a block of 4 MiB or more gets huge pages: faster
        # to write the first time)
        XY = buf("kXY", (2, nz, nyi + 2, nxi + 2))
        if not self._work.get("k_zeroed"):  # their lateral rows stay 0
            XY[...] = 0.0
            self._work["k_zeroed"] = True
        r = buf("kr", (2,) + ish)
        return jacobian_apply(self, padded(g, x1, XY[0]), padded(g, x2, XY[1]), r[0], r[1])

    def apply_numpy(self, x1, x2):
        """:meth:`apply` written as NumPy passes over the whole field (the readable statement of
        the product, and its check)."""
        g = self.g
        ls = g.ls
        X, Y = self._X, self._Y
        X[..., 1:-1, ls] = x1
        Y[..., 1:-1, ls] = x2
        ish = g.interior_shape
        nz, nyi, nxi = ish
        buf = self._buf
        t, t2 = buf("t", ish), buf("t2", ish)
        r1, r2 = buf("r1", ish), buf("r2", ish)
        # PV equation: Phi_pipi at the interior nodes (finite volume, no boundary flux for increments)
        Xi = X[..., 1:-1, ls]
        grad = buf("grad", (nz - 1, nyi, nxi))
        np.subtract(Xi[1:], Xi[:-1], out=grad)
        grad *= self._rdpi
        spp = buf("spp", ish)
        np.subtract(grad[1:], grad[:-1], out=spp[1:-1])
        spp[0] = grad[0]
        np.negative(grad[-1], out=spp[-1])
        spp *= self._rhs
        np.multiply(self.cE, spp, out=r1)
        lapY, divfY = buf("lapY", ish), buf("divfY", ish)
        cY = Y[..., 1:-1, 1:-1] if not g.periodic else Y[..., 1:-1, :]
        self._flux_into(Y, (self._hc, self._divf), (lapY, divfY), cY)
        np.multiply(self.cS, lapY, out=t)
        r1 += t
        Xp = self._dpi(X, False, out=buf("Xp", g.shape))
        Yp = self._dpi(Y, True, out=buf("Yp", g.shape))
        for P, cx, cy in ((Xp, self.cspx, self.cspy), (Yp, self.cPpx, self.cPpy)):
            self._dlon_into(P[..., 1:-1, :], t)
            t *= cx
            r1 -= t
            self._lat_into(P[..., ls], self._w, t, t2)
            t *= cy
            r1 -= t
        # balance equation
        cX = X[..., 1:-1, 1:-1] if not g.periodic else X[..., 1:-1, :]
        self._flux_into(X, (self._hc,), (r2,), cX)
        r2 -= divfY
        lapY *= self.c_lap
        r2 += lapY
        Yi = Y[..., ls]
        self._lat_into(Yi, self._v, t, t2)
        t *= self.c_d2
        r2 += t
        self._lat_into(Yi, self._w, t, t2)
        t *= self.c_lat
        r2 += t
        dY = self._dlon_into(Y, buf("dY", (nz, g.ny, nxi)))
        self._lat_into(dY, self._w, t, t2)
        t *= self.c_xy
        r2 += t
        np.multiply(dY[..., 1:-1, :], self.c_lon, out=t)
        r2 += t
        return r1, r2


# ---------------------------------------------------------------------------
# separable solves with latitude-dependent coefficients (the preconditioner)
# ---------------------------------------------------------------------------


class _LatSeparable(SeparableSolver):
    """``H x + diag_f(lat)^2 diag(1/w) T x = r`` by the engine of SeparableSolver.

    ``H`` is a flux-form horizontal operator with latitude-dependent coefficients
    (``south``, ``north``, ``merid_diag``, ``zonal`` at the interior rows) and ``cy`` (ny-2,)
    multiplies the vertical eigenvalues row by row; ``T=None`` means no vertical coupling
    (a 2-D solve on every level).  The transforms and the vectorised tridiagonal sweep are
    the parent's.
    """

    def __init__(self, grid: QGGrid, coeffs, w=None, T=None, cy=None, nv=None, workers=None, dtype=np.float64):
        self.grid = grid
        self.workers = workers or 1
        _, nyi, nxi = grid.interior_shape
        if T is None:
            self.nv = int(nv)
            self._fwd = self._inv = None
            lam = np.zeros(self.nv)
        else:
            w = np.asarray(w, dtype=float)
            sw = np.sqrt(w)
            lam, U = np.linalg.eigh(np.asarray(T, float) / sw[:, None] / sw[None, :])
            lam = np.minimum(lam, 0.0)
            self.nv = w.size
            self._fwd = np.ascontiguousarray(U.T * sw[None, :])
            self._inv = np.ascontiguousarray(U / sw[:, None])
        self.eigenvalues = lam
        if grid.periodic:
            nl = grid.nx // 2 + 1
            mu = -4.0 * np.sin(np.pi * np.arange(nl) / grid.nx) ** 2
        else:
            nl = nxi
            mu = -4.0 * np.sin(np.pi * np.arange(1, nl + 1) / (2.0 * (grid.nx - 1))) ** 2
        self._nl = nl
        south, north = coeffs["south"].copy(), coeffs["north"].copy()
        cy = np.zeros(nyi) if cy is None else np.asarray(cy, float)
        diag = (coeffs["merid_diag"][:, None, None] + coeffs["zonal"][:, None, None] * mu[None, None, :]
                + cy[:, None, None] * lam[None, :, None])
        inv_piv, cprime = np.empty_like(diag), np.empty_like(diag)
        inv_piv[0] = 1.0 / diag[0]
        cprime[0] = north[0] * inv_piv[0]
        for j in range(1, nyi):
            inv_piv[j] = 1.0 / (diag[j] - south[j] * cprime[j - 1])
            cprime[j] = north[j] * inv_piv[j]
        dt = np.dtype(dtype)
        self._south, self._inv_piv, self._cprime = south.astype(dt), inv_piv.astype(dt), cprime.astype(dt)
        if self._fwd is not None:
            self._fwd, self._inv = self._fwd.astype(dt), self._inv.astype(dt)

    def solve_into(self, r, out):
        """Solve for one right-hand side (nv, ny-2, nx_interior) into ``out``; ``r`` may be
        overwritten (the transforms run in place where they can)."""
        nv, nyi, nxi = self.nv, r.shape[-2], r.shape[-1]
        if self._fwd is not None:
            y = np.matmul(self._fwd, r.reshape(nv, nyi * nxi)).reshape(nv, nyi, nxi)
        else:
            y = r
        if self.grid.periodic:
            y = sfft.rfft(y, axis=-1, workers=self.workers)
        else:
            y = sfft.dst(y, type=1, axis=-1, workers=self.workers, overwrite_x=True)
        self._sweep(y)
        if self.grid.periodic:
            y = sfft.irfft(y, n=self.grid.nx, axis=-1, workers=self.workers)
        else:
            y = sfft.idst(y, type=1, axis=-1, workers=self.workers, overwrite_x=True)
        if self._fwd is not None:
            np.matmul(self._inv, y.reshape(nv, nyi * nxi), out=out.reshape(nv, nyi * nxi))
        else:
            out[...] = y
        return out

    def _solve_interior(self, r, lead, nv, nyi, nxi):
        if self._fwd is not None:
            return super()._solve_interior(r, lead, nv, nyi, nxi)
        y = np.array(r, dtype=self._south.dtype)
        if self.grid.periodic:
            y = sfft.rfft(y, axis=-1, workers=self.workers)
        else:
            y = sfft.dst(y, type=1, axis=-1, workers=self.workers, overwrite_x=True)
        self._sweep(y)
        if self.grid.periodic:
            return sfft.irfft(y, n=self.grid.nx, axis=-1, workers=self.workers)
        return sfft.idst(y, type=1, axis=-1, workers=self.workers, overwrite_x=True)


class _Preconditioner:
    """Approximate inverse of the Jacobian: a linearisation with coefficients that depend on
    pressure and latitude only, so that both solves are separable.

    ``S`` (nz,) is the level-mean ``Phi_pipi``; ``eta_rows`` (ny,) an absolute vorticity per
    latitude row (default f: the linearisation about rest) and ``s_rows`` (ny-2,) a factor
    of the stability per interior row (default 1).  With ``eta`` in place of f in both
    equations (the balance linearised about a state of solid rotation has ``f + zeta`` as
    its coefficient) the system ``C [eta dPhi_pipi + S s lap dpsi] = r1``,
    ``lap dPhi - div(eta grad dpsi) = r2`` is approximated by
    ``(lap + eta^2/(s S) D_pipi) dPhi = eta r1/(C S s) + r2`` and
    ``div(eta grad dpsi) = lap dPhi - r2``.
    """

    def __init__(self, grid: BalanceGrid, S, eta_rows=None, s_rows=None, dtype=np.float64):
        S = np.asarray(S, float)
        _check_stability(S)
        self.grid, self.S = grid, S
        hc = grid.hc
        eta = grid.f if eta_rows is None else np.asarray(eta_rows, float)
        self.eta_rows = eta
        srow = np.ones(grid.ny - 2) if s_rows is None else np.asarray(s_rows, float)
        eta_half = 0.5 * (eta[1:] + eta[:-1])
        ei = eta[1:-1]
        coeffs = dict(south=hc["south"] * eta_half[:-1], north=hc["north"] * eta_half[1:], zonal=hc["zonal"] * ei)
        coeffs["merid_diag"] = -(coeffs["south"] + coeffs["north"])
        dt = np.dtype(dtype)
        self.A = _LatSeparable(grid.qg, hc, w=grid.hpos * S, T=grid.T, cy=ei ** 2 / srow, dtype=dt)
        self.B = _LatSeparable(grid.qg, coeffs, nv=1, dtype=dt)
        self.scale = ((ei[:, None] / srow[:, None])[None] / (grid.C * S)[:, None, None]).astype(dt)
        self._hc = grid.coefficients(dt)[0]
        gpos = 1.0 / np.abs(grid.dpi)  # the weights of grid.T
        self._gpos = gpos.astype(dt)[:, None, None]
        self._vfac = ((ei ** 2 / srow)[None, :, None] / (grid.hpos * S)[:, None, None]).astype(dt)  # cy / w
        self.applications = 0
        self._full = np.zeros(grid.shape, dt)

    def apply_into(self, v1, v2, a1, a2, out1, out2):
        """``apply(a1 v1, a2 v2)`` written into (out1, out2) with work arrays of its own (the
        inner loop of the Newton solve: no allocation besides the transforms').  The right-hand
        side of the psi solve, ``lap dPhi - r2``, is formed as ``scale r1 - cy S^-1 D_pipi dPhi``
        (what the first solve's equation says ``lap dPhi`` is) instead of applying the Laplacian."""
        g = self.grid
        self.applications += 1
        nz, nyi, nxi = ish = g.interior_shape
        w = self.__dict__.setdefault("_work", {})
        if "rhs" not in w:  # (one block: huge pages, see _Jacobian.apply)
            w["rhs"], w["rb"] = np.empty((2,) + ish, self.scale.dtype)
            w["d"] = np.empty((nz - 1, nyi, nxi), self.scale.dtype)
        rhs, rb, d = w["rhs"], w["rb"], w["d"]
        np.multiply(v1, self.scale * a1, out=rb)
        np.multiply(v2, a2, out=rhs)
        rhs += rb
        self.A.solve_into(rhs, out1)
        # T dPhi (T: the symmetric vertical second difference with weights gpos), then cy / w
        np.subtract(out1[1:], out1[:-1], out=d)
        d *= self._gpos
        rb[0] -= self._vfac[0] * d[0]
        t = rhs[1:-1]
        np.subtract(d[1:], d[:-1], out=t)
        t *= self._vfac[1:-1]
        rb[1:-1] -= t
        rb[-1] += self._vfac[-1] * d[-1]
        self.B.solve_into(rb, out2)
        return out1, out2

    def apply(self, r1, r2):
        g = self.grid
        self.applications += 1
        dPhi = self.A.solve_interior(self.scale * r1 + r2)
        full = self._full
        full[..., 1:-1, g.ls] = dPhi
        rb = g._flux_form(full, self._hc)
        rb -= r2
        dpsi = self.B.solve_interior(rb)
        return dPhi, dpsi


def _check_stability(S):
    if not np.all(S > 0):
        raise DomainError(
            "nonlinear balance: the level-mean static stability d2Phi/dpi2 is not positive at "
            f"{int(np.sum(~(S > 0)))} level(s); the state is statically unstable on average there "
            "and cannot be inverted.")


def _level_mean_stability(g, Spp):
    """Level mean of ``Phi_pipi`` (interior nodes); DomainError where it is not positive."""
    S = Spp.reshape(g.nz, -1).mean(axis=1)
    _check_stability(S)
    return S


def _make_preconditioner(g, Spp, eta, mode="rows", dtype=np.float64):
    """The preconditioner for the linearisation at a state with ``Phi_pipi`` = ``Spp`` and
    absolute vorticity ``eta`` (interior nodes)."""
    S = Spp.reshape(g.nz, -1).mean(axis=1)
    if mode == "rest":
        return _Preconditioner(g, S, dtype=dtype)
    er = eta.mean(axis=(0, 2))
    eta_rows = np.concatenate([[g.f[0]], er, [g.f[-1]]])
    # keep the sign of f and at least a fraction of it (the floor's rule)
    eta_rows = g.sign * np.maximum(g.sign * eta_rows, 0.05 * np.abs(g.f))
    s_rows = None
    if mode == "rows_s":
        s_rows = (Spp.mean(axis=2) / S[:, None]).mean(axis=0)
        s_rows = np.clip(s_rows, 0.2, 5.0)
    return _Preconditioner(g, S, eta_rows=eta_rows, s_rows=s_rows, dtype=dtype)


def _preconditioner_still_fits(P, g, Spp, eta, change=0.1):
    """True when the level-mean stability and the row-mean absolute vorticity of the new state
    differ from those ``P`` was built with by less than ``change`` (relative, max norm): then
    the Newton step keeps ``P`` (measured: same GMRES counts, one set-up instead of three)."""
    S = Spp.reshape(g.nz, -1).mean(axis=1)
    er = eta.mean(axis=(0, 2))
    e_old = P.eta_rows[1:-1]
    return bool(np.all(S > 0) and np.max(np.abs(S - P.S) / P.S) < change
                and np.max(np.abs(er - e_old) / np.abs(g.f[1:-1])) < change)


# ---------------------------------------------------------------------------
# the nonlinear solve
# ---------------------------------------------------------------------------


@dataclass
class BalanceResult:
    """Solution of the nonlinear-balance system (full grid arrays) and how it was reached."""

    Phi: np.ndarray
    psi: np.ndarray
    converged: bool
    residual_history: list
    newton_iterations: int
    gmres_iterations: int
    preconditioner_applications: int
    residual_evaluations: int
    seconds: float
    tol: float
    floored: np.ndarray | None = None  # int8 (nz, ny, nx): 1 PV floored, 2 abs. vorticity floored, 3 both
    n_pv_floored: int = 0
    n_eta_floored: int = 0
    scales: dict = field(default_factory=dict)
    gmres_per_newton: list = field(default_factory=list)  # GMRES iterations of each Newton step
    preconditioner_builds: int = 0  # separable set-ups (kept while the state's means change little)
    inner_precision: str = "single"


def _rms(a):
    return float(np.sqrt(np.mean(np.square(a)))) if a.size else 0.0


def _gmres_right(matvec, precond, b, rtol, maxiter, restart=30, work=None):
    """Right-preconditioned GMRES from x = 0: ``A M y = b``, ``x = M y``.

    The residual it minimises is the true residual ``b - A x`` (right preconditioning), so
    ``rtol`` means what the inexact Newton forcing asks for (``matvec`` may return the same work
    array every time: the loop copies what it keeps).  ``work``: a dict kept by the caller across
    calls, holding the Krylov and preconditioned bases (rows written over instead of allocating
    fresh memory on every call); ``precond`` is then called as ``precond(v, out=row)``.  One operator product and one
    preconditioner application per iteration; the preconditioned directions ``z_k = M v_k``
    are kept (flexible-GMRES storage), so forming x costs no further preconditioner
    application.  Classical Gram-Schmidt, re-orthogonalised once when the new vector lost
    more than 30 % of its norm (the usual criterion; in single precision only when it lost
    99 %).  Works in the dtype of ``b`` (float32 for the single-precision inner solves of
    :func:`solve_balance`).
    Returns (x, iterations, relative residual reached).  SciPy's ``gmres`` preconditions on the
    left (its stopping test is on the preconditioned residual) and spends extra
    preconditioner applications per call, which is why this small loop is used here.
    """
    n = b.size
    dt = b.dtype
    # the new vector typically keeps 15-40 % of its norm here; in double precision (the 1e-10
    # piece solves) that calls for the second pass, in single precision (inner solves to >= 1e-4)
    # one pass keeps the basis orthogonal to ~1e-6, which is enough (measured: same counts)
    reorth = 0.7 if dt == np.float64 else 0.01
    beta0 = float(np.linalg.norm(b))
    x = np.zeros(n, dtype=dt)
    if work is not None:
        for key, rows in (("V", restart + 1), ("Z", restart), ("tmp", 1)):
            if key not in work or work[key].shape != (rows, n) or work[key].dtype != dt:
                work[key] = np.empty((rows, n), dtype=dt)
    tmp = work["tmp"][0] if work is not None else np.empty(n, dtype=dt)
    if beta0 == 0.0:
        return x, 0, 0.0
    its = 0
    r = b
    beta = beta0
    while True:
        m = min(restart, maxiter - its)
        V = work["V"] if work is not None else np.empty((m + 1, n), dtype=dt)
        Z = []
        H = np.zeros((m + 1, m))
        cs, sn = np.zeros(m), np.zeros(m)
        gv = np.zeros(m + 1)
        gv[0] = beta
        np.multiply(r, 1.0 / beta, out=V[0], casting="unsafe")
        k = 0
        for k in range(m):
            z = precond(V[k]) if work is None else precond(V[k], out=work["Z"][k])
            Z.append(z)
            w = matvec(z)
            its += 1
            h = (w @ V[:k + 1].T).astype(float)  # (this layout is the fast BLAS product, measured)
            np.matmul(h.astype(dt), V[:k + 1], out=tmp)
            w -= tmp
            hn = float(np.linalg.norm(w))
            # |w| before the projection from Pythagoras (V orthonormal): no pass of its own
            w0 = float(np.sqrt(hn * hn + h @ h))
            if hn < reorth * w0:  # re-orthogonalise once (CGS2) when cancellation was large
                h2 = (w @ V[:k + 1].T).astype(float)
                np.matmul(h2.astype(dt), V[:k + 1], out=tmp)
                w -= tmp
                h += h2
                hn = float(np.linalg.norm(w))
            H[:k + 1, k] = h
            H[k + 1, k] = hn
            if hn > 0.0:
                np.multiply(w, 1.0 / hn, out=V[k + 1], casting="unsafe")
            for i in range(k):  # previous rotations
                t = cs[i] * H[i, k] + sn[i] * H[i + 1, k]
                H[i + 1, k] = -sn[i] * H[i, k] + cs[i] * H[i + 1, k]
                H[i, k] = t
            den = float(np.hypot(H[k, k], H[k + 1, k]))
            cs[k], sn[k] = (1.0, 0.0) if den == 0.0 else (H[k, k] / den, H[k + 1, k] / den)
            H[k, k] = den
            H[k + 1, k] = 0.0
            gv[k + 1] = -sn[k] * gv[k]
            gv[k] = cs[k] * gv[k]
            if abs(gv[k + 1]) <= rtol * beta0 or hn == 0.0:
                break
        kk = k + 1
        y = np.zeros(kk)
        for i in range(kk - 1, -1, -1):  # back substitution on the rotated Hessenberg matrix
            y[i] = (gv[i] - H[i, i + 1:kk] @ y[i + 1:]) / H[i, i]
        if work is not None:  # x += y Z in one BLAS product over the kept rows
            np.matmul(y.astype(dt), work["Z"][:kk], out=tmp)
            x += tmp
        else:
            for i in range(kk):
                np.multiply(Z[i], dt.type(y[i]), out=tmp)
                x += tmp
        del Z, V
        rel = abs(gv[kk]) / beta0
        if rel <= rtol or its >= maxiter:
            return x, its, rel
        r = b - matvec(x)
        beta = float(np.linalg.norm(r))
        rel = beta / beta0
        if rel <= rtol:
            return x, its, rel


def _where_text(grid, mask):
    k, j, i = np.argwhere(mask)[0]
    return f"{point_label(grid.lon[i], grid.lat[j], None)}, {grid.pressure[k] / 100:g} hPa"


def check_ellipticity(grid, q, eta, pv_floor=None, eta_floor=None):
    """Refuse (DomainError) or floor where ``f q <= 0`` or ``f (f + zeta) <= 0``.

    ``q`` (full grid, K m2 kg-1 s-1), ``eta`` (interior nodes, s-1).  With ``pv_floor`` (PVU)
    the PV is raised to ``pv_floor`` (with the sign of f) where it is below it; the count and
    the mask are returned.  ``eta_floor`` (a fraction of |f|) is applied inside the iteration;
    here it only lets points with the wrong absolute vorticity pass.
    Returns (q_used, pv_mask (full grid bool)).
    """
    s = grid.sign
    qi = grid.interior(q)
    bad_q = ~(s * qi > 0)
    bad_e = ~(s * eta > 0)
    full_q = np.zeros(grid.shape, bool)
    full_q[..., 1:-1, grid.ls] = bad_q
    full_e = np.zeros(grid.shape, bool)
    full_e[..., 1:-1, grid.ls] = bad_e
    hemi = "northern" if s > 0 else "southern"
    msgs = []
    if bad_q.any() and pv_floor is None:
        msgs.append(f"Ertel PV has the wrong sign for the {hemi} hemisphere (<= 0 in the sense of f) at "
                    f"{int(bad_q.sum())} points (e.g. {_where_text(grid, full_q)})")
    if bad_e.any() and eta_floor is None:
        msgs.append(f"absolute vorticity f + zeta has the wrong sign at {int(bad_e.sum())} points "
                    f"(e.g. {_where_text(grid, full_e)})")
    if msgs:
        raise DomainError("nonlinear balance: the system is not elliptic: " + "; ".join(msgs)
                          + ". Accept the floor remedy (floor=True: PV and absolute vorticity raised to a "
                          "small value of the sign of f, points counted and mapped) or use balance='qg'.")
    if pv_floor is None:
        return q, np.zeros(grid.shape, bool)
    lo = pv_floor * PVU
    low = np.zeros(grid.shape, bool)
    low[..., 1:-1, grid.ls] = s * qi < lo
    q2 = np.where(low, s * lo, q)
    return q2, low


def harmonic_extension(grid: BalanceGrid, lateral):
    """Per level, the field with ``lap = 0`` inside and the lateral values of ``lateral``."""
    lateral = np.asarray(lateral, float)
    g = grid
    full = np.array(lateral)
    full[..., 1:-1, g.ls] = 0.0
    B = _LatSeparable(g.qg, g.hc, nv=1)
    full[..., 1:-1, g.ls] = B.solve_interior(-g.lap(full))
    return full


def solve_balance(grid: BalanceGrid, q, theta_b, theta_t, Phi_lateral, psi_lateral, *, guess=None,
                  tol=DEFAULT_TOL, max_newton=20, max_gmres=120, floor=False, pv_floor=0.01, eta_floor=0.05,
                  verbose=False, progress=None, inner_precision="single", ew_gamma=0.9, ew_alpha=2.0,
                  eta0=0.3):
    """Solve the nonlinear-balance system for Phi and psi.

    Parameters
    ----------
    grid : BalanceGrid
    q : array (nz, ny, nx)
        Ertel PV (K m2 kg-1 s-1) at the interior nodes (lateral values ignored).
    theta_b, theta_t : arrays (ny, nx)
        theta (K) on the lowest / highest level (``dPhi/dpi = -theta`` there).
    Phi_lateral, psi_lateral : arrays (nz, ny, nx)
        Dirichlet data: their lateral-boundary values are used.
    guess : (Phi, psi) or None
        First guess (full grid; its lateral values are replaced by the data); default the
        level-by-level harmonic extension of the lateral data.
    tol : float
        Stop when the relative residual ``max(rms(E1)/rms(q), rms(E2)/b)`` (RMS over the
        interior nodes) is <= tol; ``b`` is the largest of rms(lap Phi) and rms(div(f grad psi))
        of the first guess and ``f0^2 rms(q - level mean of q)/rms(q)``.
    floor : bool
        Accept the floor remedy where the system is not elliptic: PV raised to ``pv_floor``
        PVU and f + zeta to ``eta_floor`` |f| (with the sign of f); the changed points are
        counted and mapped in the result.  False: refuse with DomainError.
    progress : callable or None
        ``progress(fraction, text)`` once per Newton step (fraction: log-residual progress
        from the first guess to ``tol``).
    inner_precision : "single" or "double"
        Precision of the inner GMRES solves (Jacobian products, preconditioner, Krylov basis).
        The residual, the state and the stopping test are always float64, so the answer meets
        ``tol`` either way; single precision halves the memory traffic of the inner solves
        (their forcing is then kept >= 1e-4, which single precision resolves).
    ew_gamma, ew_alpha, eta0 : float
        Eisenstat-Walker forcing terms (their choice 2): the first GMRES tolerance ``eta0``,
        then ``ew_gamma (|F_k|/|F_k-1|)^ew_alpha`` with the usual safeguard, at most 0.5.

    Returns
    -------
    BalanceResult
    """
    t_start = _time.perf_counter()
    if inner_precision not in ("single", "double"):
        raise InputError(f"nonlinear balance: inner_precision must be 'single' or 'double' (got {inner_precision!r}).")
    g = grid
    q = np.asarray(q, float)
    theta_b, theta_t = np.asarray(theta_b, float), np.asarray(theta_t, float)
    if guess is None:
        Phi = harmonic_extension(g, Phi_lateral)
        psi = harmonic_extension(g, psi_lateral)
    else:
        Phi, psi = (np.array(a, dtype=float) for a in guess)
    for arr, lat in ((Phi, np.asarray(Phi_lateral, float)), (psi, np.asarray(psi_lateral, float))):
        inner = arr[..., 1:-1, g.ls].copy()
        arr[...] = lat
        arr[..., 1:-1, g.ls] = inner
    for name, arr in (("Ertel PV", g.interior(q)), ("geopotential", Phi), ("streamfunction", psi),
                      ("bottom theta", theta_b), ("top theta", theta_t)):
        if not np.all(np.isfinite(arr)):
            raise InputError(f"nonlinear balance: {name} contains NaN or infinite values; give complete fields.")
    # one set of arrays for the terms: a trial step's are written over the current state's
    # (those are done with once the Newton step's GMRES solve has its right-hand side)
    space = {}
    ef = eta_floor if floor else None
    q_int = np.ascontiguousarray(g.interior(q))
    inner = np.dtype(np.float32 if inner_precision == "single" else np.float64)
    d0, r1_0, r2_0 = terms_and_residual(g, Phi, psi, theta_b, theta_t, q_int, ef, ws=space,
                                        dtype=inner)
    q_used, pv_mask = check_ellipticity(g, q, g.fi + d0["zeta"], pv_floor if floor else None,
                                        eta_floor if floor else None)
    if pv_mask.any():  # the floor raised the PV somewhere: the first residual against the PV used
        q_new = np.ascontiguousarray(g.interior(q_used))
        r1_0 -= q_new - q_int
        q_int = q_new
    qs = _rms(q_int)
    qa = q_int - q_int.reshape(g.nz, -1).mean(axis=1)[:, None, None]
    bs = max(d0["rms_lapPhi"], d0["rms_divf"], g.f0 ** 2 * max(_rms(qa) / max(qs, 1e-300), 1e-6))
    _level_mean_stability(g, d0["Spp"])  # refuses a statically unstable mean state
    n_int = int(np.prod(g.interior_shape))
    counts = dict(gmres=0, res=1, per_step=[], pc=0, pc_builds=0)
    P = Jk = None

    def clipped_of(d):
        return None if ef is None else g.sign * (g.fi + d["zeta"]) < ef * np.abs(g.fi)

    def residual(Phi, psi):
        """Terms, absolute vorticity and residuals of a state (one compiled pass)."""
        counts["res"] += 1
        d, r1, r2 = terms_and_residual(g, Phi, psi, theta_b, theta_t, q_int, ef, ws=space, dtype=inner)
        return d, d["eta"], clipped_of(d), r1, r2

    def rel(d):
        return max(d["rms_r1"] / qs, d["rms_r2"] / bs)

    d, eta, clipped, r1, r2 = d0, d0["eta"], clipped_of(d0), r1_0, r2_0
    if pv_mask.any():
        d0["rms_r1"] = _rms(r1)
    history = [rel(d0)]
    # unknown scales: the preconditioner maps scaled residuals to increments
    eta_k, prev = eta0, history[0]
    newton = 0
    mv_out = np.empty(2 * n_int, inner)
    rhs = np.empty(2 * n_int, inner)
    krylov = {}  # Krylov bases kept across the Newton steps
    # single-precision inner solves cannot resolve relative reductions much below ~1e-6
    rtol_floor = 1e-4 if inner == np.float32 else 0.0
    with _blas_threads(1):
        while history[-1] > tol and newton < max_newton:
            newton += 1
            Jk = _Jacobian(g, None, None, None, dtype=inner, reuse=Jk, coefficients=d["jacobian"])
            if P is None or not _preconditioner_still_fits(P, g, d["Spp"], eta):
                P = _make_preconditioner(g, d["Spp"], eta, dtype=inner)
                counts["pc_builds"] += 1
            s1, s2 = inner.type(1.0 / qs), inner.type(1.0 / bs)
            a1, a2 = inner.type(qs), inner.type(bs)

            def matvec(v, Jk=Jk, out=mv_out, s1=s1, s2=s2):  # GMRES does not keep this array
                j1, j2 = Jk.apply(v[:n_int].reshape(g.interior_shape), v[n_int:].reshape(g.interior_shape))
                np.multiply(j1.reshape(-1), s1, out=out[:n_int])
                np.multiply(j2.reshape(-1), s2, out=out[n_int:])
                return out

            def precond(v, out, P=P, a1=a1, a2=a2):
                ish = g.interior_shape
                P.apply_into(v[:n_int].reshape(ish), v[n_int:].reshape(ish), a1, a2,
                             out[:n_int].reshape(ish), out[n_int:].reshape(ish))
                return out

            np.multiply(r1.reshape(-1), -1.0 / qs, out=rhs[:n_int], casting="unsafe")
            np.multiply(r2.reshape(-1), -1.0 / bs, out=rhs[n_int:], casting="unsafe")
            rtol = min(0.5, max(eta_k, 0.5 * tol / max(history[-1], 1e-300), rtol_floor))
            pc_before = P.applications
            dx, n_it, _rel = _gmres_right(matvec, precond, rhs, rtol, maxiter=max_gmres, work=krylov)
            counts["pc"] += P.applications - pc_before
            counts["gmres"] += n_it
            counts["per_step"].append(n_it)
            dP = dx[:n_int].reshape(g.interior_shape)  # (inner precision; added to float64 below)
            dS = dx[n_int:].reshape(g.interior_shape)
            step, taken = 1.0, 0.0
            interior = (Ellipsis, slice(1, -1), g.ls)
            for _ in range(6):  # backtracking on the residual norm; the state is moved in place
                for arr, inc in ((Phi, dP), (psi, dS)):
                    arr[interior] += inc if step - taken == 1.0 else (step - taken) * inc
                taken = step
                dn, en, cn, r1n, r2n = residual(Phi, psi)
                rn = rel(dn)
                if np.isfinite(rn) and rn < history[-1]:
                    break
                step *= 0.5
            else:  # no step lowers the residual: back to the state before it, and stop
                for arr, inc in ((Phi, dP), (psi, dS)):
                    arr[interior] -= taken * inc
                d, eta, clipped, r1, r2 = residual(Phi, psi)
                break
            d, eta, clipped, r1, r2 = dn, en, cn, r1n, r2n
            history.append(rn)
            if len(history) >= 4 and all(history[-i] > 0.95 * history[-i - 1] for i in (1, 2, 3)):
                break  # stalled: three Newton steps in a row gained less than 5 % each
            if verbose:
                print(f"newton {newton}: relative residual {rn:.3e} (step {step:g}, gmres rtol {rtol:.2g}, "
                      f"{n_it} GMRES)")
            if progress is not None:  # once per outer (Newton) iteration
                h0 = max(history[0], tol * (1.0 + 1e-12))
                frac = float(np.clip(np.log(h0 / rn) / np.log(h0 / tol), 0.0, 1.0)) if rn > 0 else 1.0
                progress(frac, f"Newton step {newton}: relative residual {rn:.2e} (tolerance {tol:g})")
            ratio = rn / prev
            prev = rn
            eta_new = ew_gamma * ratio ** ew_alpha
            if ew_gamma * eta_k ** ew_alpha > 0.1:
                eta_new = max(eta_new, ew_gamma * eta_k ** ew_alpha)
            eta_k = min(0.5, max(eta_new, 1e-12))
    floored = None
    n_pv = int(pv_mask.sum())
    n_eta = 0
    if floor:
        floored = pv_mask.astype(np.int8)
        if clipped is not None:
            ce = np.zeros(g.shape, bool)
            ce[..., 1:-1, g.ls] = clipped
            n_eta = int(ce.sum())
            floored = floored + 2 * ce.astype(np.int8)
    elif np.any(~(g.sign * eta > 0)):
        bad = np.zeros(g.shape, bool)
        bad[..., 1:-1, g.ls] = ~(g.sign * eta > 0)
        raise DomainError(
            f"nonlinear balance: the balanced absolute vorticity has the wrong sign at {int(bad.sum())} points "
            f"(e.g. {_where_text(g, bad)}); the system is not elliptic there. Accept the floor remedy "
            "(floor=True) or use balance='qg'.")
    return BalanceResult(
        Phi=Phi, psi=psi, converged=bool(history[-1] <= tol), residual_history=history,
        newton_iterations=newton, gmres_iterations=counts["gmres"],
        preconditioner_applications=counts["pc"], residual_evaluations=counts["res"],
        seconds=_time.perf_counter() - t_start, tol=tol, floored=floored, n_pv_floored=n_pv,
        n_eta_floored=n_eta, scales=dict(q=qs, balance=bs), gmres_per_newton=list(counts["per_step"]),
        preconditioner_builds=counts["pc_builds"], inner_precision=inner_precision)


def solve_tangent(grid, state, forcing, *, eta_floor=None, rtol=1e-10, P=None):
    """Tangent-linear response at a balanced ``state`` (Phi, psi, theta_b, theta_t).

    ``forcing`` is a dict with q (interior PV anomaly), bottom_theta, top_theta (ny, nx),
    lateral_phi, lateral_psi (full grid, lateral values used; None = 0).  Returns
    (dPhi, dpsi, gmres iterations) on the full grid.
    """
    g = grid
    Phi, psi, tb, tt = state
    d = _terms(g, Phi, psi, tb, tt)
    eta, clipped = _eta(g, d, eta_floor)
    if P is None:
        P = _make_preconditioner(g, d["Spp"], eta)
    z2 = _zero2(g)
    bt = z2 if forcing.get("bottom_theta") is None else np.asarray(forcing["bottom_theta"], float)
    tt_ = z2 if forcing.get("top_theta") is None else np.asarray(forcing["top_theta"], float)
    bP = np.zeros(g.shape)
    bS = np.zeros(g.shape)
    for arr, key in ((bP, "lateral_phi"), (bS, "lateral_psi")):
        if forcing.get(key) is not None:
            arr[...] = forcing[key]
            arr[..., 1:-1, g.ls] = 0.0
    # known part: what the boundary data give through the tangent-linear operator
    k1, k2 = _jvp(g, d, eta, clipped, bP, bS, bt, tt_)
    qf = np.zeros(g.interior_shape) if forcing.get("q") is None else g.interior(np.nan_to_num(forcing["q"]))
    qs = max(_rms(g.interior(np.nan_to_num(ertel_pv_nb(g, Phi, psi, tb, tt)))), 1e-30)
    bs = max(_rms(d["lapPhi"]), _rms(d["divf"]), 1e-30)
    r1, r2 = qf - k1, -k2
    n_int = int(np.prod(g.interior_shape))
    it = dict(n=0)

    def split(v):
        return v[:n_int].reshape(g.interior_shape), v[n_int:].reshape(g.interior_shape)

    def full(x):
        out = np.zeros(g.shape)
        out[..., 1:-1, g.ls] = x
        return out

    Jt = _Jacobian(g, d, eta, clipped)

    def matvec(v):
        a, b = split(np.asarray(v).ravel())
        j1, j2 = Jt.apply(a, b)
        return np.concatenate([(j1 / qs).ravel(), (j2 / bs).ravel()])

    def precond(v):
        a, b = split(np.asarray(v).ravel())
        x1, x2 = P.apply(a * qs, b * bs)
        return np.concatenate([x1.ravel(), x2.ravel()])

    rhs = np.concatenate([(r1 / qs).ravel(), (r2 / bs).ravel()])
    if not np.any(rhs):
        return bP, bS, 0
    with _blas_threads(1):
        x, it["n"], rel = _gmres_right(matvec, precond, rhs, rtol, maxiter=400, restart=60)
    if not rel <= rtol:
        raise DomainError(f"nonlinear balance: the tangent-linear piece solve did not reach rtol {rtol:g} "
                          f"in {it['n']} GMRES iterations (reached {rel:.1e}); the full balanced state may be "
                          "near the limit of ellipticity " + ("(try floor=True)." if eta_floor is None else
                                                             "even with the floor; use balance='qg' here."))
    a, b = split(x)
    dPhi, dpsi = bP.copy(), bS.copy()
    dPhi[..., 1:-1, g.ls] = a
    dpsi[..., 1:-1, g.ls] = b
    return dPhi, dpsi, it["n"]


# ---------------------------------------------------------------------------
# streamfunction of the analysed wind
# ---------------------------------------------------------------------------


def boundary_streamfunction(grid: BalanceGrid, u, v):
    """psi on the lateral boundary nodes from the analysed wind (full-grid array; interior 0).

    Rule: along the boundary, counter-clockwise, ``dpsi/ds = -u_n`` (u_n the outward normal
    wind), integrated with the trapezoid rule; the mean outflow (the domain's net divergence,
    which a streamfunction cannot carry) is removed first so that psi closes around the
    boundary; the mean of psi on the boundary is 0 on every level.  On a zonally periodic
    grid each latitude circle takes ``dpsi/dx = v`` with its zonal-mean v removed, and the
    northern circle is offset from the southern by ``-a * integral(zonal-mean u dlat)``.
    """
    g = grid
    u = np.asarray(u, float)
    v = np.asarray(v, float)
    a, lam, ph = g.a, np.deg2rad(g.lon), g.phi
    out = np.zeros(g.shape)
    if g.periodic:
        dl = g.dlam
        for j in (0, -1):
            vv = v[..., j, :] - v[..., j, :].mean(axis=-1, keepdims=True)
            seg = 0.5 * (vv + np.roll(vv, -1, axis=-1)) * a * np.cos(ph[j]) * dl
            c = np.concatenate([np.zeros(vv.shape[:-1] + (1,)), np.cumsum(seg[..., :-1], axis=-1)], axis=-1)
            out[..., j, :] = c - c.mean(axis=-1, keepdims=True)
        ubar = u.mean(axis=-1)
        offset = -a * np.trapezoid(ubar, ph, axis=-1)
        out[..., -1, :] += offset[..., None]
        out -= 0.5 * offset[..., None, None]
        return out
    ny, nx = g.ny, g.nx
    # perimeter nodes counter-clockwise: south (W->E), east (S->N), north (E->W), west (N->S)
    jj = np.concatenate([np.zeros(nx - 1, int), np.arange(ny - 1), np.full(nx - 1, ny - 1), np.arange(ny - 1, 0, -1)])
    ii = np.concatenate([np.arange(nx - 1), np.full(ny - 1, nx - 1), np.arange(nx - 1, 0, -1), np.zeros(ny - 1, int)])
    # -u_n along each side: south v, east -u, north -v, west u (see the docstring)
    side = np.concatenate([np.zeros(nx - 1, int), np.ones(ny - 1, int), np.full(nx - 1, 2), np.full(ny - 1, 3)])
    jn, in_ = np.roll(jj, -1), np.roll(ii, -1)
    uu, vv = u[..., jj, ii], v[..., jj, ii]
    un, vn = u[..., jn, in_], v[..., jn, in_]
    sgn_v = np.select([side == 0, side == 2], [1.0, -1.0], 0.0)
    sgn_u = np.select([side == 1, side == 3], [-1.0, 1.0], 0.0)
    w0 = sgn_v * vv + sgn_u * uu
    w1 = sgn_v * vn + sgn_u * un
    # segment lengths: zonal segments at their latitude, meridional ones a dlat
    ds = np.where((side == 0) | (side == 2), a * np.cos(ph[jj]) * np.abs(lam[in_] - lam[ii]),
                  a * np.abs(ph[jn] - ph[jj]))
    net = np.sum(0.5 * (w0 + w1) * ds, axis=-1, keepdims=True)
    w0 = w0 - net / ds.sum()
    w1 = w1 - net / ds.sum()
    seg = 0.5 * (w0 + w1) * ds
    c = np.concatenate([np.zeros(seg.shape[:-1] + (1,)), np.cumsum(seg[..., :-1], axis=-1)], axis=-1)
    c -= c.mean(axis=-1, keepdims=True)
    out[..., jj, ii] = c
    return out


def relative_vorticity(grid: BalanceGrid, u, v):
    """zeta = (1/(a cos lat)) [dv/dlon - d(u cos lat)/dlat] at the interior nodes (centred)."""
    g = grid
    u = np.asarray(u, float)
    v = np.asarray(v, float)
    cosf = np.cos(g.phi)[:, None]
    dv = g.d_lon_rows(v)[..., 1:-1, :]
    duc = g.d_lat((u * cosf)[..., g.ls])
    return (dv - duc) / (g.a * g.cos)


def streamfunction(grid: BalanceGrid, u, v):
    """psi of the analysed wind: ``lap psi = zeta`` inside, the boundary rule on the lateral nodes."""
    g = grid
    psi = boundary_streamfunction(g, u, v)
    B = _LatSeparable(g.qg, g.hc, nv=1)
    zeta = relative_vorticity(g, u, v)
    psi[..., 1:-1, g.ls] = B.solve_interior(zeta - g.lap(psi))
    return psi


# ---------------------------------------------------------------------------
# balanced fields
# ---------------------------------------------------------------------------


def nonlinear_fields(grid: BalanceGrid, phi, psi, coords, bottom_theta=None, top_theta=None, names=None):
    """Balanced fields of (phi, psi) with the same variables as the QG results.

    ``u = -(1/a) dpsi/dlat``, ``v = (1/(a cos lat)) dpsi/dlon`` (second-order centred,
    second-order one-sided at the edges), ``relative_vorticity = lap psi`` (NaN on the lateral
    nodes), temperature hydrostatic in ln p (the imposed theta on the boundary levels when
    given), ``height_anomaly = phi/g``.  ``phi``/``psi`` (..., nz, ny, nx); ``names`` labels a
    leading ``piece`` dimension.
    """
    g = grid
    phi = np.asarray(phi, float)
    psi = np.asarray(psi, float)
    a = g.a
    rlat, rlon = g.phi, np.deg2rad(g.lon)
    u = -np.gradient(psi, rlat, axis=-2, edge_order=2) / a
    if g.periodic:
        dpl = (np.roll(psi, -1, axis=-1) - np.roll(psi, 1, axis=-1)) / (2.0 * g.dlam)
    else:
        dpl = np.gradient(psi, rlon, axis=-1, edge_order=2)
    v = dpl / (a * np.cos(rlat)[:, None])
    zeta = horizontal_laplacian(g.qg, psi)
    temp = hydrostatic_temperature(phi, g.pressure)
    pi = (g.pressure / P0) ** KAPPA
    if bottom_theta is not None:
        temp[..., 0, :, :] = pi[0] * np.asarray(bottom_theta, float)
    if top_theta is not None:
        temp[..., -1, :, :] = pi[-1] * np.asarray(top_theta, float)
    values = dict(geopotential_anomaly=phi, height_anomaly=phi / G, u=u, v=v, relative_vorticity=zeta,
                  temperature_anomaly=temp, theta_anomaly=temp / pi[:, None, None])
    dims = ("pressure", "latitude", "longitude")
    if phi.ndim == 4:
        dims = ("piece",) + dims
        coords = dict(coords, piece=list(names))
    attrs = {k: dict(v_) for k, v_ in _ATTRS.items()}
    attrs["u"] = dict(standard_name="eastward_wind", long_name="balanced eastward wind (nonlinear balance)",
                      units="m s-1")
    attrs["v"] = dict(standard_name="northward_wind", long_name="balanced northward wind (nonlinear balance)",
                      units="m s-1")
    ds = xr.Dataset({k: (dims, val, attrs[k]) for k, val in values.items()}, coords=coords)
    ds["streamfunction"] = xr.DataArray(psi, dims=dims, attrs=dict(long_name="balanced streamfunction",
                                                                  units="m2 s-1"))
    ds.attrs.update(
        balance="nonlinear (Charney) balance, f = 2 Omega sin(lat), spherical metric",
        caution="Diagnostic analysis of model or analysis data, not a forecast or warning.",
    )
    return ds


# ---------------------------------------------------------------------------
# the case: full state, reference, pieces
# ---------------------------------------------------------------------------


def _case_states(case, ti, mi, reference):
    """Analysed and reference states of a case time on the inversion stencil.

    The boundary theta are those of the complete columns (terrain rule: extrapolated below the
    ground) on the lowest and the highest level. Unlike QG, whose stability is the reference
    sigma(p), this operator uses each node's own ``Phi_pipi``; the ground's theta carried down
    to the flat lower boundary under high ground (as the QG anomaly does) would put a boundary
    theta tens of kelvin warmer than the extrapolated level just above it there and make the
    lowest layer statically unstable (on a 3.7 km mountain over a tenth of the domain the
    level-mean stability turned negative)."""
    from workbench import physics

    ds = case.at(ti, mi)
    case._refuse_gaps(ti, mi, "The nonlinear inversion")
    physics.check_qg_domain(case.data["latitude"].values)
    g = _grid_of_case(case)
    ref = case.reference(reference)

    def state(fields):
        fields = fields.transpose(..., "pressure", "latitude", "longitude")
        Phi = np.asarray(fields["geopotential"].values, float)
        theta = physics.potential_temperature(fields["temperature"])
        tb = np.asarray(theta.isel(pressure=0).values, float)
        tt = np.asarray(theta.isel(pressure=-1).values, float)
        psi = streamfunction(g, fields["u"].values, fields["v"].values)
        return dict(Phi=Phi, psi=psi, tb=tb, tt=tt, q=ertel_pv_nb(g, Phi, psi, tb, tt),
                    u=np.asarray(fields["u"].values, float), v=np.asarray(fields["v"].values, float))

    return g, state(ds), state(ref)


def _grid_of_case(case):
    d = case.data
    return BalanceGrid(d["latitude"].values, d["longitude"].values, d["pressure"].values)


def _solve_state(g, st, tol, floor, **kw):
    return solve_balance(g, st["q"], st["tb"], st["tt"], st["Phi"], st["psi"], guess=(st["Phi"], st["psi"]),
                         tol=tol, floor=floor, **kw)


def _solution(case, key, g, st, tol, floor, progress=None):
    """The nonlinear-balance solve of state ``st``, kept in the case's bounded cache under
    ``key`` (so that the balanced state, the pieces, the balance check and the briefing of one
    time share one solve, and the times of a case share the reference state's)."""
    def make():
        res = _solve_state(g, st, tol, floor, progress=progress)
        return dict(result=res, Phi=res.Phi, psi=res.psi)  # (the arrays the cache counts)

    return case._cache.get(key + (bool(floor), float(tol)), make)["result"]


def _reference_key(case, ti, mi, reference):
    """Cache key of a reference state's solve: the reference, and the time and member when
    ground below some levels (time-varying) changes its bottom theta."""
    from workbench.case import _ref_key

    below = case.missing_info(ti, mi)["below_ground"]
    where = (ti, mi) if bool(np.asarray(below).any()) else None
    return ("balsolve-ref", _ref_key(case.resolve_reference(reference)), where)


#: A floored solve that stalls (the floor makes the system non-smooth: Newton steps stop
#: gaining) is accepted when its relative residual is at most this; the result then carries a
#: ``solver_note`` saying so. Above it, or without floored points, a solve that does not reach
#: its tolerance is refused.
FLOORED_ACCEPT = 1e-2


def _require_converged(res, what):
    """None when ``res`` reached its tolerance; a note (str) when a floored solve stalled at a
    relative residual of at most :data:`FLOORED_ACCEPT` (accepted); DomainError otherwise."""
    if res.converged:
        return None
    h = res.residual_history
    floored = bool(res.n_pv_floored or res.n_eta_floored)  # (the counts of ``res.floored``)
    if floored and res.floored is not None and np.any(res.floored[-1] > 0):
        n = int(np.sum(res.floored[-1] > 0))
        raise DomainError(
            f"nonlinear balance: the {what} stalled at relative residual {h[-1]:.2e} because {n} floored "
            "point(s) lie on the model top level, where theta is imposed and the floored PV can only be "
            "met by flooring the absolute vorticity too (a non-smooth system); cut the top level off "
            "(fewer levels) or use balance='qg'.")
    if floored and h[-1] <= FLOORED_ACCEPT:
        return (f"nonlinear balance ({what}): with {res.n_pv_floored} PV and {res.n_eta_floored} "
                f"absolute-vorticity point(s) floored the iteration stalled at relative residual "
                f"{h[-1]:.1e} after {res.newton_iterations} Newton steps (the floored system is not "
                f"smooth; tolerance {res.tol:g}); accepted as it is below {FLOORED_ACCEPT:g}, but the "
                "balanced fields next to the floored points are less exact than elsewhere.")
    if floored:
        raise DomainError(
            f"nonlinear balance: the {what} did not converge (relative residual {h[-1]:.2e} after "
            f"{res.newton_iterations} Newton steps, tolerance {res.tol:g}, accepted with floored points "
            f"up to {FLOORED_ACCEPT:g}) with {res.n_pv_floored} PV and {res.n_eta_floored} "
            "absolute-vorticity point(s) floored: the floored system is not smooth there and the "
            "iteration stalled; use balance='qg' for this time.")
    raise DomainError(
        f"nonlinear balance: the {what} did not converge (relative residual {h[-1]:.2e} after "
        f"{res.newton_iterations} Newton steps, tolerance {res.tol:g}); the state may be close to "
        "the limit of ellipticity (try floor=True) or use balance='qg'.")


def _info(res):
    return dict(converged=res.converged, residual_history=[float(x) for x in res.residual_history],
                newton_iterations=res.newton_iterations, gmres_iterations=res.gmres_iterations,
                preconditioner_applications=res.preconditioner_applications, seconds=res.seconds,
                tol=res.tol, n_pv_floored=res.n_pv_floored, n_eta_floored=res.n_eta_floored,
                gmres_per_newton=list(res.gmres_per_newton), preconditioner_builds=res.preconditioner_builds)


def case_balanced_state(case, time=None, member=None, *, tol=DEFAULT_TOL, floor=False):
    """Full nonlinear-balance state of a case time: Dataset with ``geopotential``, ``u``, ``v``,
    ``relative_vorticity``, ``temperature`` and ``streamfunction`` on the case grid (attrs:
    iterations, residual history, floored points; variable ``floored`` when ``floor``)."""
    ti, mi = case._key(time, member)
    g, st, _ = _case_states(case, ti, mi, None)
    res = _solution(case, ("balsolve", ti, mi), g, st, tol, floor)
    note = _require_converged(res, "full inversion")
    ds = _full_dataset(case, g, res.Phi, res.psi, st["tb"], st["tt"], res, "nonlinear")
    if note:
        ds.attrs["solver_note"] = note
    return ds


def _full_dataset(case, g, Phi, psi, tb, tt, res, balance):
    coords = {c: case.data[c] for c in ("pressure", "latitude", "longitude")}
    f = nonlinear_fields(g, Phi, psi, coords, tb, tt)
    ds = xr.Dataset(dict(
        geopotential=f["geopotential_anomaly"].assign_attrs(standard_name="geopotential",
                                                            long_name="balanced geopotential", units="m2 s-2"),
        u=f["u"], v=f["v"], relative_vorticity=f["relative_vorticity"],
        temperature=f["temperature_anomaly"].assign_attrs(standard_name="air_temperature",
                                                          long_name="balanced temperature", units="K"),
        streamfunction=f["streamfunction"]))
    ds.attrs.update(balance=balance, caution=f.attrs["caution"])
    if res is not None:
        ds.attrs["solver"] = json.dumps(_info(res))
        if res.floored is not None:
            ds["floored"] = xr.DataArray(res.floored, dims=("pressure", "latitude", "longitude"), attrs=dict(
                long_name="points changed by the floor remedy (1 PV, 2 absolute vorticity, 3 both)"))
    return ds


def invert_nonlinear_pieces(case, pieces, time=None, member=None, reference=None, *, tol=DEFAULT_TOL,
                            floor=False, piece_rtol=1e-10, progress=None):
    """Piecewise nonlinear-balance inversion of one case time (see the module docstring).

    Returns a dict like :func:`workbench.inversion.pieces.invert_pieces`: one balanced Dataset
    per piece (anomalies about the balanced reference state), the remainder,
    ``"nonlinear remainder"`` (full anomaly minus the sum of the linear pieces) and ``"total"``
    (the full anomaly: nonlinear inversion of the case minus that of the reference).  Each
    Dataset has attrs ``piece``, ``kind`` and ``balance="nonlinear"``; ``"total"`` carries the
    solver report (``solver`` JSON: iterations, residual history, floored points).
    """
    from workbench.inversion.pieces import Piece, _claims

    plist = [p if isinstance(p, Piece) else Piece.from_dict(p) for p in pieces]
    if any(p.name == NONLINEAR_REMAINDER for p in plist):
        raise PieceError(f"piece {NONLINEAR_REMAINDER!r}: this name is kept for the nonlinear remainder; "
                         "rename the piece.")
    ti, mi = case._key(time, member)
    g, st, rf = _case_states(case, ti, mi, reference)
    part = (lambda a, b, what: None if progress is None else  # progress(fraction, text) over the whole job
            (lambda f, t: progress(a + (b - a) * f, f"{what}: {t}")))
    full = _solution(case, ("balsolve", ti, mi), g, st, tol, floor, progress=part(0.0, 0.4, "full inversion"))
    notes = [_require_converged(full, "full inversion")]
    refr = _solution(case, _reference_key(case, ti, mi, reference), g, rf, tol, floor,
                     progress=part(0.4, 0.8, "reference state"))
    notes.append(_require_converged(refr, "inversion of the reference state"))
    if any(notes):
        # the pieces are solves of the linearised system at the full state; at a stalled floored
        # state that system is too ill-conditioned for them (GMRES stops near 1e-2..1e-3)
        r = full if notes[0] else refr
        raise DomainError(
            f"nonlinear balance: the floored {'full inversion' if notes[0] else 'inversion of the reference state'} "
            f"stalled at relative residual {r.residual_history[-1]:.1e} ({r.n_pv_floored} PV and "
            f"{r.n_eta_floored} absolute-vorticity point(s) floored). That is accepted for the balanced "
            "state and the balance check (Case.balanced_state, pvwb invert --balance-check), but the "
            "pieces need the linearised system at a converged state; use balance='qg' for the pieces here.")
    anomaly = case.anomaly(ti, mi, reference).copy()
    dq = st["q"] - rf["q"]
    anomaly["qgpv_anomaly"] = anomaly["qgpv_anomaly"].copy(data=dq)
    anomaly["bottom_theta_anomaly"] = anomaly["bottom_theta_anomaly"].copy(data=st["tb"] - rf["tb"])
    anomaly["top_theta_anomaly"] = anomaly["top_theta_anomaly"].copy(data=st["tt"] - rf["tt"])
    anomaly["geopotential_anomaly"] = anomaly["geopotential_anomaly"].copy(data=st["Phi"] - rf["Phi"])
    dpsi_lat = st["psi"] - rf["psi"]
    forcings, (_q, _bt, _tt, lat_all) = _claims(plist, anomaly)
    state = (full.Phi, full.psi, st["tb"], st["tt"])
    d = _terms(g, full.Phi, full.psi, st["tb"], st["tt"])
    P = _make_preconditioner(g, d["Spp"], g.fi + d["zeta"])
    ef = 0.05 if floor else None
    names, Ps, Ss, Bs, Ts, its = [], [], [], [], [], []
    for name, f in forcings:
        lateral = f["lateral"] is lat_all
        fd = dict(q=f["q"], bottom_theta=f["bottom_theta"], top_theta=f["top_theta"],
                  lateral_phi=lat_all if lateral else None, lateral_psi=dpsi_lat if lateral else None)
        dP, dS, n = solve_tangent(g, state, fd, eta_floor=ef, rtol=piece_rtol, P=P)
        names.append(name)
        Ps.append(dP)
        Ss.append(dS)
        Bs.append(np.zeros(g.shape[1:]) if f["bottom_theta"] is None else f["bottom_theta"])
        Ts.append(np.zeros(g.shape[1:]) if f["top_theta"] is None else f["top_theta"])
        its.append(n)
        if progress is not None:
            progress(0.8 + 0.2 * len(its) / len(forcings), f"piece {name}: {n} GMRES steps")
    tot_P, tot_S = full.Phi - refr.Phi, full.psi - refr.psi
    tb_tot, tt_tot = st["tb"] - rf["tb"], st["tt"] - rf["tt"]
    names += [NONLINEAR_REMAINDER, "total"]
    Ps += [tot_P - np.sum(Ps, axis=0), tot_P]
    Ss += [tot_S - np.sum(Ss, axis=0), tot_S]
    Bs += [tb_tot - np.sum(Bs, axis=0), tb_tot]
    Ts += [tt_tot - np.sum(Ts, axis=0), tt_tot]
    coords = {c: case.data[c] for c in ("pressure", "latitude", "longitude")}
    stacked = nonlinear_fields(g, np.array(Ps), np.array(Ss), coords, np.array(Bs), np.array(Ts), names=names)
    kinds = {p.name: p.kind for p in plist}
    out = {}
    for i, name in enumerate(names):
        ds = stacked.isel(piece=i, drop=True)
        kind = "total" if name == "total" else ("nonlinear" if name == NONLINEAR_REMAINDER
                                                 else kinds.get(name, "remainder"))
        ds.attrs = dict(stacked.attrs, piece=name, kind=kind, balance="nonlinear")
        out[name] = ds
    out["total"].attrs["solver"] = json.dumps(dict(full=_info(full), reference=_info(refr),
                                                   piece_gmres_iterations=dict(zip(names[:-2], its))))
    if full.floored is not None:
        out["total"]["floored"] = xr.DataArray(full.floored, dims=("pressure", "latitude", "longitude"),
                                               attrs=dict(long_name="points changed by the floor remedy "
                                                                    "(1 PV, 2 absolute vorticity, 3 both)"))
    return out


def balance_quality(case, time=None, member=None, reference=None, *, tol=DEFAULT_TOL, floor=False):
    """Balanced-versus-analysed wind per level for QG and nonlinear balance.

    Returns a Dataset over ``pressure``: ``rms_wind`` (RMS analysed wind speed),
    ``rms_difference_qg`` / ``rms_difference_nonlinear`` (RMS of the vector difference between
    the balanced and the analysed wind, m s-1) and ``relative_difference_qg`` /
    ``relative_difference_nonlinear`` (that over ``rms_wind``); RMS weighted by cos(lat) over
    the interior nodes above the ground.  ``balance_difference`` (pressure, latitude,
    longitude) is the speed of the nonlinear minus the QG balanced wind (where the two
    balances differ most).  The QG balanced wind is the QG full inversion's (reference plus
    the QG anomaly, geostrophic with the case's constant f0).
    """
    ti, mi = case._key(time, member)
    # at the default tolerance the Case's cached balanced state (a second read-out, or the
    # briefing after the page, does not solve again)
    nl = (case.balanced_state(ti, mi, balance="nonlinear", floor=floor) if tol == DEFAULT_TOL
          else case_balanced_state(case, ti, mi, tol=tol, floor=floor))
    qg = case.balanced_state(ti, mi, balance="qg", reference=reference)
    ds = case.at(ti, mi).transpose(..., "pressure", "latitude", "longitude")
    ua, va = (np.asarray(ds[c].values, float) for c in ("u", "v"))
    bg = np.asarray(case.below_ground(ti, mi).values, bool)
    w = np.broadcast_to(np.cos(np.deg2rad(case.data["latitude"].values))[None, :, None], ua.shape).copy()
    w[bg] = 0.0
    w[:, [0, -1], :] = 0.0
    w[:, :, [0, -1]] = 0.0

    def rms(a):
        return np.sqrt(np.sum(w * a, axis=(1, 2)) / np.sum(w, axis=(1, 2)))

    out = xr.Dataset(coords={"pressure": case.data["pressure"]})
    out["rms_wind"] = ("pressure", rms(ua ** 2 + va ** 2), dict(units="m s-1", long_name="RMS analysed wind"))
    for name, st in (("qg", qg), ("nonlinear", nl)):
        du = st["u"].values - ua
        dv = st["v"].values - va
        r = rms(du ** 2 + dv ** 2)
        out[f"rms_difference_{name}"] = ("pressure", r, dict(units="m s-1", long_name=(
            f"RMS vector difference, {name} balanced minus analysed wind")))
        out[f"relative_difference_{name}"] = ("pressure", r / out["rms_wind"].values, dict(units="1"))
    diff = np.hypot(nl["u"].values - qg["u"].values, nl["v"].values - qg["v"].values)
    out["balance_difference"] = (("pressure", "latitude", "longitude"), diff,
                                 dict(units="m s-1", long_name="speed of nonlinear minus QG balanced wind"))
    out = out.assign_coords(latitude=case.data["latitude"], longitude=case.data["longitude"])
    out.attrs.update(time=str(case.times[ti])[:19], solver=nl.attrs.get("solver", ""),
                     weighting="cos(latitude), interior nodes above the ground")
    if nl.attrs.get("solver_note"):
        out.attrs["solver_note"] = nl.attrs["solver_note"]
    return out


# ---------------------------------------------------------------------------
# benchmark
# ---------------------------------------------------------------------------


def bench_problem(shape, amplitude=1.0):
    """An invented regional state on the grid of ``workbench.bench.make_grid(shape)``: a
    stratified reference (theta linear in ln p), a jet and a cut-off low of Rossby number near
    ``0.3 * amplitude``; the analysed wind is geostrophic with the local f (unbalanced).
    Returns (grid, q, theta_b, theta_t, Phi, psi_data)."""
    nz, ny, nx = shape
    lat = np.linspace(25.0, 85.0, ny)
    lon = np.linspace(-60.0, 40.0, nx)
    p = np.linspace(100000.0, 10000.0, nz)
    g = BalanceGrid(lat, lon, p)
    Phi, u, v, tb, tt = _invented_state(g, amplitude)
    psi = streamfunction(g, u, v)
    q = ertel_pv_nb(g, Phi, psi, tb, tt)
    return g, q, tb, tt, Phi, psi


def _invented_state(g, amplitude):
    """Fixture fields (invented): Phi with a jet and a low; the geostrophic wind with local f."""
    p = g.pressure
    lnp = np.log(p / P0)
    th0 = 290.0 - 25.0 * lnp  # K, theta linear in ln p (stable)
    pi = g.pi
    # Phi_ref from dPhi/dpi = -theta: integrate upward from 0 at the lowest level
    from scipy.integrate import cumulative_trapezoid

    Phi_ref = -cumulative_trapezoid(th0, pi, initial=0.0)
    LA, LO = np.meshgrid(g.phi, np.deg2rad(g.lon), indexing="ij")
    s = (pi[0] - pi) / (pi[0] - pi[-1])  # 0 at the bottom, 1 at the top
    jet = -4.0e3 * amplitude * np.tanh((LA - np.deg2rad(50.0)) / np.deg2rad(8.0))
    r2 = ((LA - np.deg2rad(55.0)) / np.deg2rad(6.0)) ** 2 + ((LO - np.deg2rad(-10.0)) * np.cos(LA) / np.deg2rad(6.0)) ** 2
    low = -3.0e3 * amplitude * np.exp(-r2)
    Phi = (Phi_ref[:, None, None] + (0.3 + s[:, None, None]) * jet[None]
           + np.sin(np.pi * (0.2 + 0.6 * s))[:, None, None] * low[None])
    f = g.f[:, None]
    u = -np.gradient(Phi, g.phi, axis=-2) / (g.a * f)
    v = np.gradient(Phi, np.deg2rad(g.lon), axis=-1) / (g.a * np.cos(g.phi)[:, None] * f)
    theta = -g.d_pi(Phi)
    return Phi, u, v, theta[0], theta[-1]


def bench_nonlinear(name, shape, repeat=3, tol=DEFAULT_TOL, log=None):
    """Benchmark records for one grid: QG solve time and the nonlinear full inversion.

    Records: ``method="qg_balance"`` (one fast QG solve: ``QGSolver.solve`` with lateral data,
    median) and two ``method="nonlinear_balance"`` records, ``first_guess`` the analysed state
    (what the Case paths do) and the harmonic extension of the lateral data (a cold start).

    Cost in QG-solve equivalents: ``qg_solves`` = median wall time of the whole nonlinear
    inversion (``solve_balance`` from the first guess to the stated tolerance, set-ups
    included) over the median wall time of one QG solve on the same grid, the QG solves timed
    interleaved with the nonlinear runs (3 QG solves before each nonlinear run), after one untimed
    warm-up call of each;
    ``qg_solves_cpu`` is the same ratio with process CPU time (less sensitive to other work on
    a shared machine; both solvers run single-threaded).  ``target_qg_solves`` is the agreed
    target (30 at 0.5 deg, with ``final_relative_residual`` <= 1e-6).  Also recorded:
    ``newton_iterations``, ``gmres_iterations``, ``gmres_per_newton``,
    ``preconditioner_applications``, ``preconditioner_builds``, ``residual_evaluations``,
    ``inner_precision`` and the ``residual_history``.
    """
    import statistics

    from workbench.inversion.operator import apply_qg_operator
    from workbench.inversion.solver import QGSolver

    g, q, tb, tt, Phi, psi = bench_problem(shape)
    qs = QGSolver(g.qg)
    rng = np.random.default_rng(1)
    phi_r = rng.standard_normal(g.shape) * 100.0
    qq = np.nan_to_num(apply_qg_operator(g.qg, phi_r))
    guesses = (("analysed state", (Phi, psi)), ("harmonic extension of the lateral data", None))
    t_qg, c_qg, res = [], [], {}
    t_nl, c_nl = {k: [] for k, _ in guesses}, {k: [] for k, _ in guesses}
    qs.solve(qq, lateral=phi_r)  # one untimed warm-up call of each (first-call set-up of FFT plans, memory)
    solve_balance(g, q, tb, tt, Phi, psi, guess=(Phi, psi), tol=tol)
    for _ in range(repeat):
        for label, guess in guesses:
            for _ in range(3):
                t0, c0 = _time.perf_counter(), _time.process_time()
                qs.solve(qq, lateral=phi_r)
                t_qg.append(_time.perf_counter() - t0)
                c_qg.append(_time.process_time() - c0)
            t0, c0 = _time.perf_counter(), _time.process_time()
            res[label] = solve_balance(g, q, tb, tt, Phi, psi, guess=guess, tol=tol)
            t_nl[label].append(_time.perf_counter() - t0)
            c_nl[label].append(_time.process_time() - c0)
    tq, cq = statistics.median(t_qg), statistics.median(c_qg)
    recs = [dict(grid=name, shape=list(shape), method="qg_balance", median_s=tq, median_cpu_s=cq,
                 repeats=len(t_qg))]
    for label, _ in guesses:
        r, tn, cn = res[label], statistics.median(t_nl[label]), statistics.median(c_nl[label])
        recs.append(dict(
            grid=name, shape=list(shape), method="nonlinear_balance", first_guess=label, median_s=tn,
            median_cpu_s=cn, repeats=repeat, qg_solves=tn / tq, qg_solves_cpu=cn / cq if cq > 0 else None,
            target_qg_solves=30, newton_iterations=r.newton_iterations,
            gmres_iterations=r.gmres_iterations, gmres_per_newton=list(r.gmres_per_newton),
            preconditioner_applications=r.preconditioner_applications,
            preconditioner_builds=r.preconditioner_builds, residual_evaluations=r.residual_evaluations,
            inner_precision=r.inner_precision, final_relative_residual=float(r.residual_history[-1]),
            tol=tol, converged=r.converged, residual_history=[float(x) for x in r.residual_history]))
    if log:
        for r in recs:
            log(r)
    return recs
