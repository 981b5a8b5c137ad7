"""Compiled (Numba) loops of the nonlinear-balance solve: each visits every interior node once
and does there what a dozen NumPy passes over the whole 3-D field do in
:mod:`workbench.inversion.nonlinear`, which keeps the NumPy formulation as the readable
statement and as the check (``tests/test_kernels.py``: both give the same numbers to
round-off).

The stencils are exactly those of :class:`~workbench.inversion.nonlinear.BalanceGrid` and
:class:`~workbench.inversion.nonlinear._Jacobian`:

* vertical: ``d/dpi`` with NumPy ``gradient``'s second-order weights (one-sided at the end
  levels), ``Phi_pipi`` by finite volume with the boundary theta on the outer faces;
* horizontal: the flux-form spherical Laplacian and ``div(f grad)`` with per-row coefficients,
  first and second latitude derivatives with three per-row weights, centred longitude
  differences (periodic when the grid wraps).

Loops run single-threaded (like the fast QG solver they are compared with).  Compiled
functions are cached on disk (Numba's ``cache=True``), so only the first use on a machine pays
the compilation (a few seconds).
"""
from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["JACOBIAN_COEFFICIENTS", "jacobian_apply", "padded", "terms_and_residual"]


@njit(cache=True, nogil=True, fastmath=True)
def _jac_loop(X, Y, ky, wx, wy, ws, cE, cS, cspx, cspy, cPpx, cPpy, c_lap, c_d2, c_lat, c_xy,
              c_lon, hn, hs, hz, fn, fs, fz, w0, w1, w2, v0, v1, v2, r1, r2, Xk, Yk):
    """X, Y: (nz, ny, nxi + 2), the interior longitudes with one column either side (the
    lateral boundary, or the wrapped-around columns of a periodic grid); Xk, Yk (ny, nxi + 2)
    work arrays (d/dpi of X and Y on one level)."""
    nz, nyi, nxi = r1.shape
    ny, nxp = Xk.shape
    for k in range(nz):
        km, kp = ky[k, 3], ky[k, 4]  # k-1 and k+1 kept inside the levels (weights 0 there)
        k0, k1, k2 = ky[k, 0], ky[k, 1], ky[k, 2]  # the three levels of d/dpi of Y
        s0, s1, s2 = ws[k, 0], ws[k, 1], ws[k, 2]
        xa, xb, xc_ = wx[k, 0], wx[k, 1], wx[k, 2]
        ya, yb, yc_ = wy[k, 0], wy[k, 1], wy[k, 2]
        for J in range(ny):  # d/dpi of X (zero weights on the end levels) and of Y, once per node
            for I in range(nxp):
                Xk[J, I] = xa * X[km, J, I] + xb * X[k, J, I] + xc_ * X[kp, J, I]
                Yk[J, I] = ya * Y[k0, J, I] + yb * Y[k1, J, I] + yc_ * Y[k2, J, I]
        for j in range(nyi):
            J = j + 1
            hnj, hsj, hzj, fnj, fsj, fzj = hn[j], hs[j], hz[j], fn[j], fs[j], fz[j]
            a0, a1, a2, b0, b1, b2 = w0[j], w1[j], w2[j], v0[j], v1[j], v2[j]
            for i in range(nxi):
                I = i + 1
                # Phi_pipi of the increment (finite volume, no flux through the outer faces)
                spp = s0 * X[km, J, I] + s1 * X[k, J, I] + s2 * X[kp, J, I]
                # flux-form Laplacian and div(f grad) of Y
                yc = Y[k, J, I]
                ys_ = Y[k, J - 1, I]
                yn_ = Y[k, J + 1, I]
                dn = yn_ - yc
                ds = yc - ys_
                dz = Y[k, J, I + 1] + Y[k, J, I - 1] - yc - yc
                lapY = hnj * dn - hsj * ds + hzj * dz
                divfY = fnj * dn - fsj * ds + fzj * dz
                r1[k, j, i] = (cE[k, j, i] * spp + cS[k, j, i] * lapY
                               - cspx[k, j, i] * (Xk[J, I + 1] - Xk[J, I - 1])
                               - cspy[k, j, i] * (a0 * Xk[J - 1, I] + a1 * Xk[J, I] + a2 * Xk[J + 1, I])
                               - cPpx[k, j, i] * (Yk[J, I + 1] - Yk[J, I - 1])
                               - cPpy[k, j, i] * (a0 * Yk[J - 1, I] + a1 * Yk[J, I] + a2 * Yk[J + 1, I]))
                # balance equation
                xc = X[k, J, I]
                lapX = (hnj * (X[k, J + 1, I] - xc) - hsj * (xc - X[k, J - 1, I])
                        + hzj * (X[k, J, I + 1] + X[k, J, I - 1] - xc - xc))
                dYs = Y[k, J - 1, I + 1] - Y[k, J - 1, I - 1]
                dYc = Y[k, J, I + 1] - Y[k, J, I - 1]
                dYn = Y[k, J + 1, I + 1] - Y[k, J + 1, I - 1]
                r2[k, j, i] = (lapX - divfY + c_lap[k, j, i] * lapY
                               + c_d2[k, j, i] * (b0 * ys_ + b1 * yc + b2 * yn_)
                               + c_lat[k, j, i] * (a0 * ys_ + a1 * yc + a2 * yn_)
                               + c_xy[k, j, i] * (a0 * dYs + a1 * dYc + a2 * dYn)
                               + c_lon[k, j, i] * dYc)


def _level_tables(J):
    """The per-level tables of :func:`_grid_tables` the product needs, in ``J``'s dtype: ``ky``
    (nz, 5) the three levels of d/dpi (one-sided at the ends) and k-1, k+1 clipped to the levels;
    ``wx``, ``wy`` (nz, 3) the d/dpi weights of X (0 on the end levels, where the residual's take
    -theta instead) and of Y; ``ws`` (nz, 3) the weights of the finite-volume Phi_pipi on
    (k-1, k, k+1) (without the boundary-theta terms: increments do not perturb theta)."""
    lv, wp, wq, wf = _grid_tables(J.g)[:4]
    cast = lambda a: np.ascontiguousarray(a, dtype=J.dtype)  # noqa: E731
    return lv, cast(wp[:, :3]), cast(wq), cast(wf[:, :3])


def padded(g, x, out):
    """Interior increments x (nz, ny-2, nxi) into ``out`` (nz, ny, nxi + 2): zero on the
    lateral rows, and on the lateral columns or, on a periodic grid, the wrapped-around
    columns (``out``'s lateral rows must already be zero)."""
    out[:, 1:-1, 1:-1] = x
    if g.periodic:
        out[:, 1:-1, 0] = x[..., -1]
        out[:, 1:-1, -1] = x[..., 0]
    return out


def jacobian_apply(J, X, Y, r1, r2):
    """The product of :class:`~workbench.inversion.nonlinear._Jacobian` ``J`` with the
    increments X, Y as :func:`padded` writes them, written into r1, r2 (interior shape)."""
    col = lambda a: np.ascontiguousarray(np.ravel(a), dtype=J.dtype)  # noqa: E731
    k = J.__dict__.get("_kernel_args")
    if k is None:
        k = J._kernel_args = (
            col(J._hc["north"]), col(J._hc["south"]), col(J._hc["zonal"]),
            col(J._divf["north"]), col(J._divf["south"]), col(J._divf["zonal"]),
            *(col(w) for w in J._w), *(col(v) for v in J._v))
    lv = J.__dict__.get("_level_tables")
    if lv is None:
        lv = J._level_tables = _level_tables(J)
    w = J.__dict__.setdefault("_kernel_work", {})
    if "Xk" not in w or w["Xk"].shape != X.shape[1:] or w["Xk"].dtype != X.dtype:
        w["Xk"], w["Yk"] = np.empty(X.shape[1:], X.dtype), np.empty(X.shape[1:], X.dtype)
    _jac_loop(X, Y, *lv, J.cE, J.cS, J.cspx, J.cspy, J.cPpx, J.cPpy, J.c_lap, J.c_d2, J.c_lat,
              J.c_xy, J.c_lon, *k, r1, r2, w["Xk"], w["Yk"])
    return r1, r2


@njit(cache=True, nogil=True, fastmath=True)
def _terms_loop(Phi, psi, tb, tt, q, lv, wp, wq, wf, hn, hs, hz, fn, fs, fz, wy0, wy1, wy2,
                v0, v1, v2, u0, u1, u2, rx, tan_a, fi, C, kxy, klon1, klon2, a, eta_floor, sign,
                r1, r2, Spp, eta, zeta, cE, cS, cspx, cPpx, cspy, cPpy, c_lap, c_d2, c_lat,
                c_xy, c_lon, sums, Pk, Sk):
    """Phi, psi (nz, ny, nxi + 2) and tb, tt (ny, nxi + 2) as :func:`padded` lays them out;
    the outputs have the interior shape (the Jacobian's coefficients in their own dtype);
    ``sums`` gets the sums of squares of lap Phi, div(f grad psi), E1 and E2; ``Pk``, ``Sk`` (ny, nxi + 2)
    are work arrays (d/dpi of Phi and psi on one level)."""
    nz, nyi, nxi = r1.shape
    ny, nxp = Pk.shape
    ia = 1.0 / a
    ia2 = ia * ia
    s_lap = 0.0
    s_div = 0.0
    s_r1 = 0.0
    s_r2 = 0.0
    for k in range(nz):
        k0, k1, k2, km, kp = lv[k, 0], lv[k, 1], lv[k, 2], lv[k, 3], lv[k, 4]
        # d/dpi of Phi (middle levels; -theta given on the end levels: wp[k, 3:5])
        pa, pb, pc, pbt, ptt = wp[k, 0], wp[k, 1], wp[k, 2], wp[k, 3], wp[k, 4]
        qa, qb, qc = wq[k, 0], wq[k, 1], wq[k, 2]  # d/dpi of psi (one-sided at the ends)
        fa, fb, fc, fbt, ftt = wf[k, 0], wf[k, 1], wf[k, 2], wf[k, 3], wf[k, 4]  # Phi_pipi
        Ck = C[k]
        for J in range(ny):  # d/dpi of Phi (Pp) and of psi (sp) on this level, once per node
            for I in range(nxp):
                Pk[J, I] = (pa * Phi[k0, J, I] + pb * Phi[k1, J, I] + pc * Phi[k2, J, I]
                            + pbt * tb[J, I] + ptt * tt[J, I])
                Sk[J, I] = qa * psi[k0, J, I] + qb * psi[k1, J, I] + qc * psi[k2, J, I]
        for j in range(nyi):
            J = j + 1
            hnj, hsj, hzj, fnj, fsj, fzj = hn[j], hs[j], hz[j], fn[j], fs[j], fz[j]
            a0, a1, a2 = wy0[j], wy1[j], wy2[j]  # d/dlat / a
            b0, b1, b2 = v0[j], v1[j], v2[j]  # d2/dlat2 / a^2
            c0, c1, c2 = u0[j], u1[j], u2[j]  # d/dlat
            rxj, tj, fij = rx[j], tan_a[j], fi[j]
            cx, cy = Ck * rxj, Ck * ia
            kxyj, kl1, kl2 = kxy[j], klon1[j], klon2[j]
            lo = eta_floor * abs(fij) if eta_floor >= 0.0 else -np.inf
            for i in range(nxi):
                I = i + 1
                # Phi_pipi (finite volume; the outer faces carry -theta)
                s = (fa * Phi[km, J, I] + fb * Phi[k, J, I] + fc * Phi[kp, J, I]
                     + fbt * tb[J, I] + ftt * tt[J, I])
                # horizontal derivatives of psi and Phi
                yc = psi[k, J, I]
                ys_ = psi[k, J - 1, I]
                yn_ = psi[k, J + 1, I]
                dn = yn_ - yc
                ds = yc - ys_
                dz = psi[k, J, I + 1] + psi[k, J, I - 1] - yc - yc
                z = hnj * dn - hsj * ds + hzj * dz
                dv = fnj * dn - fsj * ds + fzj * dz
                xc = Phi[k, J, I]
                lp = (hnj * (Phi[k, J + 1, I] - xc) - hsj * (xc - Phi[k, J - 1, I])
                      + hzj * (Phi[k, J, I + 1] + Phi[k, J, I - 1] - xc - xc))
                sx = (psi[k, J, I + 1] - psi[k, J, I - 1]) * rxj
                sy = a0 * ys_ + a1 * yc + a2 * yn_
                yy = b0 * ys_ + b1 * yc + b2 * yn_
                xx = z - yy
                xy = (c0 * (psi[k, J - 1, I + 1] - psi[k, J - 1, I - 1])
                      + c1 * (psi[k, J, I + 1] - psi[k, J, I - 1])
                      + c2 * (psi[k, J + 1, I + 1] - psi[k, J + 1, I - 1])) * rxj * ia + tj * sx
                dpx = Pk[J, I + 1] - Pk[J, I - 1]
                py = a0 * Pk[J - 1, I] + a1 * Pk[J, I] + a2 * Pk[J + 1, I]
                dsx = Sk[J, I + 1] - Sk[J, I - 1]
                qy = a0 * Sk[J - 1, I] + a1 * Sk[J, I] + a2 * Sk[J + 1, I]
                e = fij + z
                floored = sign * e < lo  # (lo < 0 without a floor); the stability term drops out
                ss = 0.0 if floored else s
                e = sign * lo if floored else e
                e1 = Ck * (e * s - (dsx * dpx * rxj * rxj + qy * py)) - q[k, j, i]
                e2 = lp - dv - 2.0 * (xx * yy - xy * xy) + (sx * sx + sy * sy) * ia2
                r1[k, j, i] = e1
                r2[k, j, i] = e2
                s_r1 += e1 * e1
                s_r2 += e2 * e2
                Spp[k, j, i] = s
                eta[k, j, i] = e
                zeta[k, j, i] = z
                s_lap += lp * lp
                s_div += dv * dv
                # the Jacobian's coefficients at this state
                cE[k, j, i] = e * Ck
                cS[k, j, i] = ss * Ck
                cspx[k, j, i] = dsx * rxj * cx
                cPpx[k, j, i] = dpx * rxj * cx
                cspy[k, j, i] = qy * cy
                cPpy[k, j, i] = py * cy
                c_lap[k, j, i] = -2.0 * yy
                c_d2[k, j, i] = (xx - yy) * (-2.0 * ia2)
                c_lat[k, j, i] = sy * (2.0 * ia2 * ia)
                c_xy[k, j, i] = xy * kxyj
                c_lon[k, j, i] = xy * kl1 + sx * kl2
    sums[0] = s_lap
    sums[1] = s_div
    sums[2] = s_r1
    sums[3] = s_r2


_TERMS = ("r1", "r2", "Spp", "eta", "zeta")
JACOBIAN_COEFFICIENTS = ("cE", "cS", "cspx", "cPpx", "cspy", "cPpy", "c_lap", "c_d2", "c_lat",
                         "c_xy", "c_lon")


def _grid_tables(g):
    """Per-level and per-row weights of the residual's stencils (cached on the grid; the
    Jacobian product takes its level tables from these, :func:`_level_tables`)."""
    t = g.__dict__.get("_kernel_tables")
    if t is not None:
        return t
    nz = g.nz
    D = np.gradient(np.eye(nz), g.pi, axis=0, edge_order=2)
    rd = 1.0 / g.dpi
    lv = np.empty((nz, 5), np.int64)
    wp, wq, wf = np.zeros((nz, 5)), np.zeros((nz, 3)), np.zeros((nz, 5))
    for k in range(nz):
        lvk = (0, 1, 2) if k == 0 else (nz - 3, nz - 2, nz - 1) if k == nz - 1 else (k - 1, k, k + 1)
        lv[k] = (*lvk, max(k - 1, 0), min(k + 1, nz - 1))
        wq[k] = D[k, list(lvk)]
        if 0 < k < nz - 1:
            wp[k, :3] = D[k, k - 1:k + 2]
            wf[k, :3] = (rd[k - 1], -(rd[k] + rd[k - 1]), rd[k])
        elif k == 0:
            wp[k, 3] = -1.0  # dPhi/dpi = -theta at the bottom
            wf[k, :3] = (0.0, -rd[0], rd[0])
            wf[k, 3] = 1.0
        else:
            wp[k, 4] = -1.0
            wf[k, :3] = (rd[k - 1], -rd[k - 1], 0.0)
            wf[k, 4] = -1.0
        wf[k] /= g.hs[k]
    col = lambda x: np.ascontiguousarray(np.ravel(x), dtype=float)  # noqa: E731
    hc, dv = g.hc, g.divf
    a, cos2 = g.a, g.cos * 2.0 * g.dlam
    t = g._kernel_tables = (
        lv, wp, wq, wf, col(hc["north"]), col(hc["south"]), col(hc["zonal"]),
        col(dv["north"]), col(dv["south"]), col(dv["zonal"]),
        *(col(w) for w in g._dphi_w_a), *(col(w) for w in g._d2phi_w_a2),
        *(col(w) for w in g._dphi_w), col(g.rx), col(g.tan / a), col(g.fi), col(g.C),
        col(4.0 / (a * a * cos2)), col(4.0 * g.tan / (a * a * cos2)), col(2.0 / (a ** 3 * cos2)))
    return t


def terms_and_residual(g, Phi, psi, theta_b, theta_t, q_interior, eta_floor=None, ws=None,
                       dtype=np.float64):
    """The residuals (E1, E2) of the PV and balance equations at a state, and what the Newton
    solve needs of the state, in one pass.

    Returns ``(d, r1, r2)``: ``d`` holds ``Spp`` (Phi_pipi), ``eta`` (absolute vorticity,
    floored like :func:`~workbench.inversion.nonlinear._eta` when ``eta_floor`` is set),
    ``zeta``, ``rms_lapPhi``, ``rms_divf``, ``rms_r1`` and ``rms_r2`` (RMS of lap Phi, of
    div(f grad psi) and of the two residuals) and
    ``jacobian``: the coefficients of :class:`~workbench.inversion.nonlinear._Jacobian` at the
    state, in ``dtype``.  ``ws``: a dict of arrays from an earlier call to write over."""
    ws = {} if ws is None else ws
    nz, nyi, nxi = ish = g.interior_shape
    dt = np.dtype(dtype)

    def arr(key, shape, dtype=float):
        b = ws.get(key)
        if b is None or b.shape != shape or b.dtype != dtype:
            b = ws[key] = np.empty(shape, dtype)
        return b

    if g.periodic:
        P, S = arr("_P", (nz, g.ny, nxi + 2)), arr("_S", (nz, g.ny, nxi + 2))
        for full, b in ((Phi, P), (psi, S)):  # every row, with the wrapped-around columns
            b[..., 1:-1] = full
            b[..., 0] = full[..., -1]
            b[..., -1] = full[..., 0]
        tb2, tt2 = (np.concatenate([t[:, -1:], t, t[:, :1]], axis=1) for t in (theta_b, theta_t))
    else:
        P, S = np.asarray(Phi, float), np.asarray(psi, float)
        tb2, tt2 = np.asarray(theta_b, float), np.asarray(theta_t, float)
    # outputs in two blocks: a large allocation is backed by huge pages (NumPy advises the
    # kernel so from 4 MiB on), which is written the first time several times faster than
    # separate arrays (measured at 0.5 deg: 25 -> 12 ms for a first call)
    outs = list(arr("_terms", (len(_TERMS),) + ish))
    coeffs = list(arr("_coefficients", (len(JACOBIAN_COEFFICIENTS),) + ish, dt))
    sums = np.zeros(4)
    q = np.ascontiguousarray(q_interior, dtype=float)
    _terms_loop(P, S, tb2, tt2, q, *_grid_tables(g), g.a,
                -1.0 if eta_floor is None else float(eta_floor), float(g.sign), *outs, *coeffs,
                sums, arr("_Pk", (g.ny, nxi + 2)), arr("_Sk", (g.ny, nxi + 2)))
    d = dict(zip(_TERMS, outs))
    r1, r2 = d.pop("r1"), d.pop("r2")
    n = max(r1.size, 1)
    rms = np.sqrt(sums / n)
    d.update(rms_lapPhi=float(rms[0]), rms_divf=float(rms[1]), rms_r1=float(rms[2]),
             rms_r2=float(rms[3]), jacobian=dict(zip(JACOBIAN_COEFFICIENTS, coeffs)))
    return d, r1, r2
