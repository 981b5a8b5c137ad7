"""The compiled loops of the nonlinear-balance solve (``workbench.inversion.kernels``) give the
numbers of the NumPy statement of the same discrete operators (``_terms``, ``_eta``, ``_pv``,
``_balance`` and ``_Jacobian.apply_numpy`` in ``workbench.inversion.nonlinear``) to round-off,
on regional and periodic grids, in both hemispheres, with and without the absolute-vorticity
floor, in double and single precision.  The physics of those operators is checked in
test_nonlinear_balance.py against closed forms, and the whole solve (which runs these loops)
against SciPy's general Newton-Krylov solver on the NumPy residual
(test_same_discrete_system_as_newton_krylov)."""
from __future__ import annotations

import numpy as np
import pytest

from workbench.inversion import nonlinear as nl
from workbench.inversion.kernels import (JACOBIAN_COEFFICIENTS, jacobian_apply, padded,
                                         terms_and_residual)


def _problem(kind):
    """Invented fixture states (nonlinear.bench_problem's jet and cut-off low; mirrored across
    the equator for the southern hemisphere)."""
    if kind == "regional":
        return nl.bench_problem((9, 22, 31))
    if kind == "south":
        g, q, tb, tt, Phi, psi = nl.bench_problem((9, 22, 31))
        gs = nl.BalanceGrid(-g.lat[::-1], g.lon, g.pressure)
        Phi, psi, tb, tt = Phi[:, ::-1].copy(), -psi[:, ::-1].copy(), tb[::-1].copy(), tt[::-1].copy()
        return gs, nl.ertel_pv_nb(gs, Phi, psi, tb, tt), tb, tt, Phi, psi
    g = nl.BalanceGrid(np.linspace(25.0, 80.0, 24), np.arange(0.0, 360.0, 10.0),
                       np.linspace(1.0e5, 2.0e4, 7))
    Phi, u, v, tb, tt = nl._invented_state(g, 1.0)
    psi = nl.streamfunction(g, u, v)
    return g, nl.ertel_pv_nb(g, Phi, psi, tb, tt), tb, tt, Phi, psi


def _rel(a, b):
    return float(np.abs(np.asarray(a, float) - b).max() / np.abs(b).max())


@pytest.mark.parametrize("kind", ["regional", "periodic", "south"])
@pytest.mark.parametrize("floor", [None, 0.9])
def test_residual_and_jacobian_coefficients_match_the_numpy_statement(kind, floor):
    g, q, tb, tt, Phi, psi = _problem(kind)
    assert g.periodic == (kind == "periodic") and g.sign == (-1.0 if kind == "south" else 1.0)
    q = 1.01 * q  # a state that does not balance this PV: residuals of the size of 1 % of q
    d = nl._terms(g, Phi, psi, tb, tt)
    eta, clipped = nl._eta(g, d, floor)
    if floor is not None:
        assert clipped.any() and not clipped.all()  # the 0.9 |f| floor acts somewhere
    r1 = nl._pv(g, d, eta) - g.interior(q)
    r2 = nl._balance(g, d)
    J = nl._Jacobian(g, d, eta, clipped)
    dk, k1, k2 = terms_and_residual(g, Phi, psi, tb, tt, g.interior(q), floor)
    # round-off of sums of terms up to 1e4 times larger than the result (Phi ~ 1e5 m2 s-2)
    assert _rel(k1, r1) < 1e-9 and _rel(k2, r2) < 1e-9
    for name, ref in (("Spp", d["Spp"]), ("zeta", d["zeta"]), ("eta", eta)):
        assert _rel(dk[name], ref) < 1e-10, name
    for name in JACOBIAN_COEFFICIENTS:
        assert _rel(dk["jacobian"][name], getattr(J, name)) < 1e-9, name
    assert dk["rms_lapPhi"] == pytest.approx(nl._rms(d["lapPhi"]), rel=1e-12)
    assert dk["rms_divf"] == pytest.approx(nl._rms(d["divf"]), rel=1e-12)
    assert dk["rms_r1"] == pytest.approx(nl._rms(r1), rel=1e-9)
    assert dk["rms_r2"] == pytest.approx(nl._rms(r2), rel=1e-9)


@pytest.mark.parametrize("kind", ["regional", "periodic", "south"])
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_jacobian_product_matches_the_numpy_statement(kind, dtype):
    g, q, tb, tt, Phi, psi = _problem(kind)
    d = nl._terms(g, Phi, psi, tb, tt)
    eta, clipped = nl._eta(g, d, None)
    J = nl._Jacobian(g, d, eta, clipped, dtype=dtype)
    rng = np.random.default_rng(3)
    x1, x2 = (rng.standard_normal(g.interior_shape).astype(dtype) for _ in range(2))
    ref1, ref2 = (a.astype(float) for a in J.apply_numpy(x1, x2))
    out1, out2 = J.apply(x1, x2)
    assert out1.dtype == dtype
    tol = 1e-12 if dtype == np.float64 else 1e-5
    assert _rel(out1, ref1) < tol and _rel(out2, ref2) < tol
    # the padded layout: interior in the middle, wrapped columns on a periodic grid
    nz, nyi, nxi = g.interior_shape
    X = padded(g, x1, np.zeros((nz, nyi + 2, nxi + 2), dtype))
    assert np.array_equal(X[:, 1:-1, 1:-1], x1) and not X[:, [0, -1]].any()
    if g.periodic:
        assert np.array_equal(X[:, 1:-1, 0], x1[..., -1]) and np.array_equal(X[:, 1:-1, -1], x1[..., 0])
    else:
        assert not X[..., [0, -1]].any()
    r1, r2 = np.empty_like(out1), np.empty_like(out2)
    jacobian_apply(J, X, padded(g, x2, np.zeros_like(X)), r1, r2)
    assert np.array_equal(r1, out1) and np.array_equal(r2, out2)

