"""Fast direct solver for the discrete QG operator of :mod:`workbench.inversion.operator`.

Method (exact for the discretisation, no iteration, no 3-D factorisation):

1. multiply the equation by f0: ``lap(phi) + f0**2 V phi = f0 (q - boundary terms)``;
2. vertical eigenmodes: ``V = H^-1 T`` is similar to the symmetric
   ``H^-1/2 T H^-1/2 = U diag(lam) U^T`` (lam <= 0), so ``S = H^-1/2 U``
   diagonalises V; project on the modes with ``S^-1 = U^T H^1/2``;
3. longitude: DST-I over the interior nodes (Dirichlet ends), or a real FFT
   when the grid is zonally periodic; the zonal second difference becomes
   ``mu_l = -4 sin^2(pi l / (2 (nx - 1)))`` (resp. ``-4 sin^2(pi l / nx)``);
4. latitude: for every (mode, wavenumber) a tridiagonal system
   ``merid + zonal_j mu_l + f0**2 lam_m`` over the interior rows, solved by a
   Thomas sweep vectorised over all (mode, wavenumber) pairs; the elimination
   factors are computed once in the solver's set-up.  The matrices are
   diagonally dominant and negative definite, so no pivoting is needed;
5. back-transform in longitude and vertical.

:func:`get_solver` caches one solver per ``grid.key``.
"""
from __future__ import annotations

import contextlib
import threading
from collections import OrderedDict

import numpy as np
import scipy.fft as sfft

from workbench.errors import GridError
from workbench.inversion.operator import QGGrid, _check_shape, subtract_boundary_terms

__all__ = ["QGSolver", "SeparableSolver", "get_solver", "clear_solver_cache"]


try:  # optional: keep BLAS single-threaded inside a solve (see _blas_threads)
    from threadpoolctl import ThreadpoolController

    _THREADPOOLS = ThreadpoolController()
except Exception:  # pragma: no cover - threadpoolctl missing or unusable
    _THREADPOOLS = None


def _blas_threads(n):
    """Context limiting BLAS to ``n`` threads.

    Measured on the shared 2-core machine: the small vertical-mode products
    (nz x nz times nz x ny nx) gain little from a second BLAS thread on a quiet
    machine but lose 3-6x under load (threads waiting for a busy core), so the
    solver runs them single-threaded.  A no-op without threadpoolctl.
    """
    if _THREADPOOLS is None:
        return contextlib.nullcontext()
    return _THREADPOOLS.limit(limits=n, user_api="blas")


def _default_workers():
    # measured: a second scipy.fft worker does not pay on these grid sizes (benchmarks/bench_inversion.py)
    return 1


class SeparableSolver:
    """Direct solver of ``lap(x) + c diag(1/w) T x = r`` on the horizontally interior nodes.

    The shared engine of the QG inversion and the QG omega equation.  ``T``
    (nv x nv) is symmetric and negative semi-definite, ``w`` (nv,) positive
    weights, ``c`` a positive constant; ``lap`` is the grid's flux-form
    spherical Laplacian with Dirichlet lateral boundaries (periodic in
    longitude on a 360-degree grid).  ``r`` and ``x`` have shape
    ``(..., nv, ny-2, nx_interior)``.  ``fwd_scale`` multiplies r on the way in
    (it is folded into the vertical projection matrix).
    """

    def __init__(self, grid: QGGrid, w, T, c, fwd_scale=1.0, workers: int | None = None):
        self.grid = grid
        self.workers = workers or _default_workers()
        _, nyi, nxi = grid.interior_shape
        hc = grid.horizontal()
        w = np.asarray(w, dtype=float)
        sw = np.sqrt(w)
        sym = np.asarray(T, dtype=float) / sw[:, None] / sw[None, :]
        lam, U = np.linalg.eigh(sym)
        lam = np.minimum(lam, 0.0)  # negative semi-definite by construction
        self.nv = w.size
        self._fwd = np.ascontiguousarray(fwd_scale * (U.T * sw[None, :]))
        self._inv = np.ascontiguousarray(U / sw[:, None])
        self.eigenvalues = c * lam

        if grid.periodic:
            nl = grid.nx // 2 + 1
            mu = -4.0 * np.sin(np.pi * np.arange(nl) / grid.nx) ** 2
        else:
            nl = nxi
            mu = -4.0 * np.sin(np.pi * np.arange(1, nl + 1) / (2.0 * (grid.nx - 1))) ** 2
        self._nl = nl

        # tridiagonal systems over interior rows j = 0..nyi-1, for every (mode m, wavenumber l):
        #   south[j] x[j-1] + diag[j, m, l] x[j] + north[j] x[j+1] = r[j]
        south = hc["south"].copy()
        north = hc["north"].copy()
        diag = (
            hc["merid_diag"][:, None, None]
            + hc["zonal"][:, None, None] * mu[None, None, :]
            + self.eigenvalues[None, :, None]
        )  # (nyi, nv, nl)
        inv_piv = np.empty_like(diag)  # 1 / pivot_j
        cprime = np.empty_like(diag)  # north_j / pivot_j (modified super-diagonal)
        inv_piv[0] = 1.0 / diag[0]
        cprime[0] = north[0] * inv_piv[0]
        for j in range(1, nyi):
            inv_piv[j] = 1.0 / (diag[j] - south[j] * cprime[j - 1])
            cprime[j] = north[j] * inv_piv[j]
        self._south = south
        self._inv_piv = inv_piv
        self._cprime = cprime

    def solve_interior(self, r):
        """Solve for x given r (..., nv, ny-2, nx_interior); r is not modified."""
        grid = self.grid
        nv = self.nv
        _, nyi, nxi = grid.interior_shape
        lead = r.shape[:-3]
        with _blas_threads(self.workers):
            return self._solve_interior(r, lead, nv, nyi, nxi)

    def _solve_interior(self, r, lead, nv, nyi, nxi):
        grid = self.grid
        y = np.matmul(self._fwd, r.reshape(lead + (nv, nyi * nxi))).reshape(lead + (nv, nyi, nxi))
        if grid.periodic:
            y = sfft.rfft(y, axis=-1, workers=self.workers, overwrite_x=True)
        else:
            y = sfft.dst(y, type=1, axis=-1, workers=self.workers, overwrite_x=True)
        self._sweep(y)
        if grid.periodic:
            y = sfft.irfft(y, n=grid.nx, axis=-1, workers=self.workers, overwrite_x=True)
        else:
            y = sfft.idst(y, type=1, axis=-1, workers=self.workers, overwrite_x=True)
        return np.matmul(self._inv, y.reshape(lead + (nv, nyi * nxi))).reshape(lead + (nv, nyi, nxi))

    def _sweep(self, r):
        """In-place tridiagonal solve along axis -2 of r (..., nv, nyi, nl)."""
        south, inv_piv, cprime = self._south, self._inv_piv, self._cprime
        nyi = r.shape[-2]
        tmp = np.empty(r[..., 0, :].shape, dtype=r.dtype)
        prev = r[..., 0, :]
        prev *= inv_piv[0]
        for j in range(1, nyi):
            cur = r[..., j, :]
            np.multiply(prev, south[j], out=tmp)
            cur -= tmp
            cur *= inv_piv[j]
            prev = cur
        for j in range(nyi - 2, -1, -1):
            cur = r[..., j, :]
            np.multiply(r[..., j + 1, :], cprime[j], out=tmp)
            cur -= tmp


class QGSolver:
    """Direct solver of ``L(phi) = q`` on one :class:`QGGrid`.

    Build once per (grid, sigma, f0) and reuse: the set-up computes the
    vertical eigenmodes, the horizontal wavenumbers and the tridiagonal
    elimination factors; every :meth:`solve` is then a few transforms and one
    vectorised sweep.  Leading dimensions of the inputs (pieces, times,
    members) are solved together.

    Parameters
    ----------
    grid : QGGrid
    workers : int, optional
        Threads for scipy.fft and BLAS inside a solve (default 1).
    """

    def __init__(self, grid: QGGrid, workers: int | None = None):
        if not isinstance(grid, QGGrid):
            raise TypeError("QGSolver needs a QGGrid; build one with QGGrid(lat, lon, pressure, sigma, f0).")
        self.grid = grid
        vc = grid.vertical()
        f0 = grid.f0
        # f0 L = lap + f0^2 diag(1/h) T ; the rhs is multiplied by f0 in the projection
        self._engine = SeparableSolver(grid, vc["h"], vc["T"], f0 * f0, fwd_scale=f0, workers=workers)
        self.eigenvalues = self._engine.eigenvalues

    @property
    def workers(self):
        return self._engine.workers

    @workers.setter
    def workers(self, value):
        self._engine.workers = int(value)

    def solve(self, q, bottom_theta=None, top_theta=None, lateral=None):
        """Invert q' for phi'.

        Parameters
        ----------
        q : array (..., nz, ny, nx)
            QG PV anomaly (s-1).  Values on the lateral boundary nodes are
            ignored (they may be NaN).
        bottom_theta, top_theta : array (..., ny, nx) or None
            theta' (K) on the lowest / highest level (the boundary PV sheets);
            None means 0 (homogeneous Neumann).
        lateral : array (..., nz, ny, nx) or None
            Dirichlet data: its values on the lateral boundary nodes are phi
            there (interior values are ignored); None means phi' = 0 on the
            lateral boundary.

        Returns
        -------
        phi : array (..., nz, ny, nx)
            Geopotential anomaly (m2 s-2), float64; equals ``lateral`` on the
            lateral boundary nodes.
        """
        grid = self.grid
        q = _check_shape(grid, "q", q, grid.shape)
        js, ls = slice(1, -1), grid.lon_slice
        shapes = [q.shape[:-3]]
        shapes += [np.shape(a)[:-2] for a in (bottom_theta, top_theta) if a is not None]
        if lateral is not None:
            lateral = _check_shape(grid, "lateral", lateral, grid.shape)
            shapes.append(lateral.shape[:-3])
        lead = np.broadcast_shapes(*shapes)
        rhs = np.empty(lead + grid.interior_shape)
        rhs[...] = q[..., js, ls]
        subtract_boundary_terms(grid, rhs, bottom_theta, top_theta, lateral)
        if not np.isfinite(np.sum(rhs)):  # one reduction instead of a boolean array
            raise GridError(
                "q: the QG PV anomaly (or the boundary data) contains NaN or infinite values at interior "
                "nodes; fill or mask them before inverting (only lateral boundary nodes may be NaN)."
            )
        x = self._engine.solve_interior(rhs)
        out = np.empty(lead + grid.shape)
        out[..., js, ls] = x
        edges = [(Ellipsis, 0, slice(None)), (Ellipsis, -1, slice(None))]
        if not grid.periodic:
            edges += [(Ellipsis, slice(None), 0), (Ellipsis, slice(None), -1)]
        for e in edges:
            out[e] = 0.0 if lateral is None else lateral[e]
        return out

    def residual(self, phi, q, bottom_theta=None, top_theta=None):
        """Max |L(phi) - q| over the interior nodes (a self-check, s-1)."""
        from workbench.inversion.operator import apply_qg_operator

        res = apply_qg_operator(self.grid, phi, bottom_theta, top_theta) - q
        return float(np.nanmax(np.abs(res[..., 1:-1, self.grid.lon_slice])))


_CACHE: "OrderedDict[tuple, QGSolver]" = OrderedDict()
_CACHE_LOCK = threading.Lock()
_CACHE_SIZE = 8


def get_solver(grid: QGGrid) -> QGSolver:
    """The cached :class:`QGSolver` for ``grid`` (one per ``grid.key``, least-recently-used, 8 kept)."""
    with _CACHE_LOCK:
        solver = _CACHE.get(grid.key)
        if solver is not None:
            _CACHE.move_to_end(grid.key)
            return solver
    solver = QGSolver(grid)
    with _CACHE_LOCK:
        _CACHE[grid.key] = solver
        while len(_CACHE) > _CACHE_SIZE:
            _CACHE.popitem(last=False)
    return solver


def clear_solver_cache():
    """Forget all cached solvers."""
    with _CACHE_LOCK:
        _CACHE.clear()
