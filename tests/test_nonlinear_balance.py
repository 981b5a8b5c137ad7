"""Nonlinear-balance inversion (workbench.inversion.nonlinear) against outside references."""
from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.optimize import newton_krylov

from workbench.errors import DomainError
from workbench.inversion import nonlinear as nl
from workbench.inversion.operator import QGGrid
from workbench.inversion.solver import QGSolver
from workbench.units import CP, EARTH_RADIUS, KAPPA, P0, RD, G

P9 = np.array([1000, 900, 800, 700, 600, 500, 400, 300, 200.0]) * 100.0
A = EARTH_RADIUS


def _geodesic(lat, lon, latc, lonc):
    """Great-circle distance r (m) from the centre and the derivatives of cos(r/a)."""
    ph, la = np.meshgrid(np.deg2rad(lat), np.deg2rad(lon), indexing="ij")
    pc, lc = np.deg2rad(latc), np.deg2rad(lonc)
    c = np.sin(pc) * np.sin(ph) + np.cos(pc) * np.cos(ph) * np.cos(la - lc)
    r = A * np.arccos(np.clip(c, -1.0, 1.0))
    dc_dphi = np.sin(pc) * np.cos(ph) - np.cos(pc) * np.sin(ph) * np.cos(la - lc)
    dc_dlam = -np.cos(pc) * np.cos(ph) * np.sin(la - lc)
    return r, dc_dphi, dc_dlam, ph


def gradient_wind_vortex(res_deg, f0=1.03e-4, V0=20.0, r0=3.0e5):
    """Axisymmetric vortex in exact gradient-wind balance on an f-plane on the sphere (fixture).

    Tangential wind v = G(pi) V0 rho exp((1 - rho^2)/2), rho = r/r0, G = 0.5 + 0.5 s (s = 0 at the
    lowest level, 1 at the top), stratified reference theta = 300 + 0.12 (pi0 - pi) K.
    Gradient-wind balance dPhi/dr = f v + v^2/r (Holton & Hakim, An Introduction to Dynamic
    Meteorology, 5th ed., sec. 3.2.5) in geodesic polar coordinates on the sphere, where 1/r becomes
    cot(r/a)/a (the axisymmetric nondivergent divergence equation on a sphere; -> 1/r for r << a).
    """
    lat = np.arange(38.0, 52.0 + 1e-9, res_deg)
    lon = np.arange(-10.0, 10.0 + 1e-9, res_deg)
    g = nl.BalanceGrid(lat, lon, P9, f=f0)
    pi = g.pi
    pi0, pit = pi[0], pi[-1]
    Gp = 0.5 + 0.5 * (pi0 - pi) / (pi0 - pit)
    dG = -0.5 / (pi0 - pit)
    r, dcp, dcl, ph = _geodesic(lat, lon, 45.0, 0.0)
    rho = r / r0
    F = rho * np.exp(0.5 * (1.0 - rho ** 2))
    dF = (1.0 - rho ** 2) * np.exp(0.5 * (1.0 - rho ** 2)) / r0
    I1 = V0 * r0 * np.exp(0.5 * (1.0 - rho ** 2))  # integral of V0 F from r to infinity

    def integrand(x):
        rr = x / r0
        return (V0 * rr * np.exp(0.5 * (1 - rr ** 2))) ** 2 / (A * np.tan(x / A))

    rmax = 12.0 * r0
    I2 = np.array([quad(integrand, x, rmax, limit=200)[0] if x < rmax else 0.0 for x in r.ravel()]).reshape(r.shape)
    cot = np.where(r > 0, 1.0 / np.tan(np.maximum(r, 1.0) / A) / A, 0.0)
    Phi_ref = -(300.0 * (pi - pi0) - 0.06 * (pi0 - pi) ** 2)  # dPhi/dpi = -theta_ref
    Phi = Phi_ref[:, None, None] - f0 * Gp[:, None, None] * I1 - Gp[:, None, None] ** 2 * I2
    theta = (300.0 + 0.12 * (pi0 - pi))[:, None, None] + f0 * dG * I1 + 2.0 * Gp[:, None, None] * dG * I2
    vt = Gp[:, None, None] * V0 * F
    # Ertel PV (hydrostatic, nondivergent) in geodesic polar coordinates, analytic:
    # q = (g kappa pi/p) [(f + zeta) Phi_pipi - psi_r,pi Phi_r,pi]  (Davis & Emanuel 1991, the PV equation)
    zeta = Gp[:, None, None] * V0 * (dF + F * cot)
    zeta = np.where(r > 0, zeta, Gp[:, None, None] * V0 * 2.0 * np.exp(0.5) / r0)  # limit r -> 0
    Phi_pipi = 0.12 - 2.0 * dG ** 2 * I2
    psi_rpi = dG * V0 * F
    Phi_rpi = f0 * dG * V0 * F + 2.0 * Gp[:, None, None] * dG * (V0 * F) ** 2 * cot
    C = (G * KAPPA * pi / P9)[:, None, None]
    q = C * ((f0 + zeta) * Phi_pipi - psi_rpi * Phi_rpi)
    # wind components of the streamfunction psi(r) (dpsi/dr = vt): u = -(1/a) dpsi/dphi, v = dpsi/dlam/(a cos)
    sinr = np.sin(np.maximum(r, 1.0) / A)
    dr_dphi = -A / sinr * dcp
    dr_dlam = -A / sinr * dcl
    u = -vt * dr_dphi / A
    v = vt * dr_dlam / (A * np.cos(ph))
    return g, dict(Phi=Phi, theta=theta, q=q, u=u, v=v, vt=vt, Phi_ref=Phi_ref, Ro=V0 / (f0 * r0))


def _invert_vortex(res_deg):
    g, s = gradient_wind_vortex(res_deg)
    psi_b = nl.boundary_streamfunction(g, s["u"], s["v"])
    out = nl.solve_balance(g, s["q"], s["theta"][0], s["theta"][-1], s["Phi"], psi_b, tol=1e-10)
    assert out.converged
    f = nl.nonlinear_fields(g, out.Phi, out.psi, {})
    inner = (slice(None), slice(1, -1), slice(1, -1))
    amp = np.abs(s["Phi"] - s["Phi_ref"][:, None, None]).max()
    err_phi = np.abs(out.Phi - s["Phi"])[inner].max() / amp
    err_wind = np.hypot(f["u"].values - s["u"], f["v"].values - s["v"])[inner].max() / np.abs(s["vt"]).max()
    return err_phi, err_wind, s["Ro"], out


def test_gradient_wind_vortex_recovered():
    # exact gradient-wind balance v^2/r + f v = dPhi/dr (Holton & Hakim 5th ed. sec. 3.2.5), Rossby number
    # V0/(f r0) = 0.65: the inversion of the analytic Ertel PV returns Phi and the wind within the
    # discretisation error, which is second order (documented in DEVELOPERS.md "Nonlinear balance").
    e1_phi, e1_wind, ro, out1 = _invert_vortex(1.0)
    e2_phi, e2_wind, _, out2 = _invert_vortex(0.5)
    assert ro > 0.5
    assert e2_phi < 0.01 and e2_wind < 0.03  # 0.5 deg (r0 = 5.4 grid lengths)
    # second order: halving the grid length divides the error by about 4 (common practice)
    assert e1_phi / e2_phi > 3.0 and e1_wind / e2_wind > 3.0
    assert out2.residual_history[-1] <= 1e-10


def test_gradient_wind_beats_geostrophic_wind():
    # the balanced wind is the gradient wind, not the geostrophic wind (Holton & Hakim sec. 3.2.5:
    # cyclonic gradient wind is subgeostrophic); the geostrophic wind with the same f misses by O(Ro).
    g, s = gradient_wind_vortex(0.5)
    _, err_wind, _, _ = _invert_vortex(0.5)
    ug = -np.gradient(s["Phi"], g.phi, axis=-2) / (A * 1.03e-4)
    vg = np.gradient(s["Phi"], np.deg2rad(g.lon), axis=-1) / (A * np.cos(g.phi)[:, None] * 1.03e-4)
    inner = (slice(None), slice(1, -1), slice(1, -1))
    err_geo = np.hypot(ug - s["u"], vg - s["v"])[inner].max() / np.abs(s["vt"]).max()
    assert err_geo > 10 * err_wind


def _small_amplitude(eps, f0=1.0e-4):
    """Same Ertel PV anomaly eps * B (a Gaussian blob, fixture) inverted by both balances."""
    lat = np.linspace(35.0, 55.0, 21)
    lon = np.linspace(-15.0, 15.0, 31)
    g = nl.BalanceGrid(lat, lon, P9, f=f0)
    gamma, th0 = 8.0e-4, 300.0  # theta_ref = th0 + gamma (p0 - p): d(theta)/dp constant
    pi = g.pi
    e = 1.0 / KAPPA + 1.0
    Phi_ref = -((th0 + gamma * P0) * (pi - pi[0]) - gamma * P0 * CP / e * ((pi / CP) ** e - (pi[0] / CP) ** e))
    theta_ref = th0 + gamma * (P0 - P9)
    Phi0 = np.broadcast_to(Phi_ref[:, None, None], g.shape).copy()
    zero = np.zeros(g.shape)
    tb = np.full(g.shape[1:], theta_ref[0])
    tt = np.full(g.shape[1:], theta_ref[-1])
    qbar = nl.ertel_pv_nb(g, Phi0, zero, tb, tt)
    r, *_ = _geodesic(lat, lon, 45.0, 0.0)
    B = np.exp(-(r / 8.0e5) ** 2)[None] * np.exp(-((P9 - 50000.0) / 20000.0) ** 2)[:, None, None]
    out = nl.solve_balance(g, qbar * (1.0 + eps * B), tb, tt, Phi0, zero, tol=1e-10)
    # QG: q' = f0 P'/Pbar (the linearised Ertel PV with d(theta)/dp constant), sigma of the reference
    sigma = RD * (P9 / P0) ** KAPPA * gamma / P9
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        qg = QGSolver(QGGrid(lat, lon, P9, sigma, f0))
    phi_qg = qg.solve(f0 * eps * B)
    dphi = out.Phi - Phi0
    inner = (slice(None), slice(1, -1), slice(1, -1))
    ro = np.nanmax(np.abs(nl.ertel_pv_nb(g, out.Phi, out.psi, tb, tt) - qbar) / qbar)
    zeta_ro = np.abs(g.lap(out.psi)).max() / f0
    return np.abs(dphi - phi_qg)[inner].max() / np.abs(phi_qg).max(), zeta_ro, ro


def test_small_amplitude_limit_is_qg():
    # small-amplitude limit: nonlinear balance -> QG with the same f0 (Davis & Emanuel 1991; Holton & Hakim
    # ch. 6), the difference growing like the Rossby number; what stays at eps -> 0 is the difference of
    # the two vertical discretisations (pi finite volume vs p finite volume), measured 0.8 %
    # (relative differences 1.1, 1.5, 2.2 % at eps = 0.025, 0.05, 0.1).
    d = {eps: _small_amplitude(eps) for eps in (0.025, 0.05, 0.1)}
    (d1, ro1, _), (d2, ro2, _), (d4, ro4, _) = d[0.025], d[0.05], d[0.1]
    assert d1 < 0.02 + 1.0 * ro1
    assert ro4 > ro2 > ro1
    # linear growth with amplitude (O(Rossby number)): equal increments for equal steps in eps
    assert 1.6 < (d4 - d2) / (d2 - d1) < 2.4
    assert (d4 - d1) / (ro4 - ro1) < 2.0


def test_same_discrete_system_as_newton_krylov():
    # the same discrete equations solved by SciPy's general Newton-Krylov solver, no preconditioner
    g, q, tb, tt, Phi, psi = nl.bench_problem((5, 9, 11), amplitude=0.5)
    ours = nl.solve_balance(g, q, tb, tt, Phi, psi, tol=1e-12)
    assert ours.converged
    n = int(np.prod(g.interior_shape))
    P0_, S0 = Phi, psi  # start from the invented analysed state (not from our solution)
    qs, bs = ours.scales["q"], ours.scales["balance"]
    ps = np.abs(Phi).max()
    ss = np.abs(psi).max()

    def F(x):
        Pn, Sn = P0_.copy(), S0.copy()
        Pn[:, 1:-1, 1:-1] = x[:n].reshape(g.interior_shape) * ps
        Sn[:, 1:-1, 1:-1] = x[n:].reshape(g.interior_shape) * ss
        r1, r2 = nl.balance_residual(g, Pn, Sn, q, tb, tt)
        return np.concatenate([(r1 / qs).ravel(), (r2 / bs).ravel()])

    x0 = np.concatenate([P0_[:, 1:-1, 1:-1].ravel() / ps, S0[:, 1:-1, 1:-1].ravel() / ss])
    x = newton_krylov(F, x0, f_tol=1e-11, maxiter=60, method="gmres", inner_maxiter=2 * x0.size,
                      inner_restart=x0.size, line_search=None)
    phi_nk = x[:n].reshape(g.interior_shape) * ps
    psi_nk = x[n:].reshape(g.interior_shape) * ss
    assert np.abs(phi_nk - ours.Phi[:, 1:-1, 1:-1]).max() / np.abs(ours.Phi).max() < 1e-8
    assert np.abs(psi_nk - ours.psi[:, 1:-1, 1:-1]).max() / np.abs(ours.psi).max() < 1e-8


def test_refuses_non_elliptic_unless_floor():
    g, q, tb, tt, Phi, psi = nl.bench_problem((5, 9, 11), amplitude=0.5)
    q = q.copy()
    q[2, 4, 5] = -0.05 * q[2, 4, 5]
    with pytest.raises(DomainError, match="not elliptic.*1 points.*floor"):
        nl.solve_balance(g, q, tb, tt, Phi, psi)
    out = nl.solve_balance(g, q, tb, tt, Phi, psi, floor=True)
    assert out.converged and out.n_pv_floored == 1 and out.floored[2, 4, 5] & 1
    assert int((out.floored > 0).sum()) == out.n_pv_floored + out.n_eta_floored


def test_pieces_close_and_nonlinear_remainder(sample_case_small):
    case = sample_case_small
    from workbench.analysis import standard_pieces
    from workbench.inversion.pieces import attribution

    pieces = standard_pieces()
    res = case.inversion(pieces, time=6, balance="nonlinear", floor=True)
    assert nl.NONLINEAR_REMAINDER in res and "total" in res
    tot = res["total"]
    for var in ("geopotential_anomaly", "u", "v", "relative_vorticity", "temperature_anomaly", "theta_anomaly"):
        s = sum(ds[var] for k, ds in res.items() if k != "total")
        scale = float(np.abs(tot[var]).max())
        assert float(np.abs(s - tot[var]).max()) <= 1e-10 * scale, var  # closure to round-off
    # the linear pieces add up to the tangent-linear response to the whole anomaly (linearity)
    lin = sum(ds["geopotential_anomaly"] for k, ds in res.items() if k not in ("total", nl.NONLINEAR_REMAINDER))
    nlr = res[nl.NONLINEAR_REMAINDER]["geopotential_anomaly"]
    assert float(np.abs(nlr).max()) < 0.5 * float(np.abs(tot["geopotential_anomaly"]).max())
    assert float(np.abs(lin + nlr - tot["geopotential_anomaly"]).max()) < 1e-9 * float(np.abs(lin).max())
    lon, lat = float(case.data.longitude[10]), float(case.data.latitude[10])
    table = attribution(res, lon, lat, 500.0)
    assert nl.NONLINEAR_REMAINDER in table.index
    np.testing.assert_allclose(table.loc["sum of pieces", "height_anomaly"],
                               table.loc["full inversion", "height_anomaly"], rtol=1e-10)


def test_tangent_linear_is_linear(sample_case_small):
    # the piece solve is linear: response(a + b) = response(a) + response(b) (GMRES to 1e-10)
    case = sample_case_small
    g, st, _ = nl._case_states(case, 6, None, None)
    full = nl._solve_state(g, st, 1e-8, True)
    state = (full.Phi, full.psi, st["tb"], st["tt"])
    rng = np.random.default_rng(3)
    qa = np.where(rng.random(g.shape) < 0.3, 1e-7, 0.0)
    qb = np.where(rng.random(g.shape) < 0.3, -1e-7, 0.0)
    ra = nl.solve_tangent(g, state, dict(q=qa), eta_floor=0.05)[0]
    rb = nl.solve_tangent(g, state, dict(q=qb), eta_floor=0.05)[0]
    rab = nl.solve_tangent(g, state, dict(q=qa + qb), eta_floor=0.05)[0]
    assert np.abs(ra + rb - rab).max() < 1e-8 * np.abs(rab).max()


@pytest.fixture(scope="module")
def sample_case_small():
    import workbench
    from workbench.analysis import default_case_path
    from workbench.case import Case

    full = workbench.open_case(default_case_path())
    d = full.data.isel(latitude=slice(10, 40), longitude=slice(10, 50), pressure=slice(0, None, 2))
    return Case(d.load(), name="invented sample (cropped)")


def test_precomputed_jacobian_is_the_tangent_linear_of_the_residual():
    # the Jacobian product equals the directional derivative of the residual (central finite
    # difference, common practice; the system is quadratic so the central difference is exact
    # up to round-off)
    g, q, tb, tt, Phi, psi = nl.bench_problem((6, 11, 13), amplitude=0.5)
    rng = np.random.default_rng(5)
    a = rng.standard_normal(g.interior_shape) * 50.0
    b = rng.standard_normal(g.interior_shape) * 5.0e5
    d = nl._terms(g, Phi, psi, tb, tt)
    j1, j2 = nl._Jacobian(g, d, g.fi + d["zeta"], None).apply(a, b)
    h = 1e-3
    P1, S1, P2, S2 = Phi.copy(), psi.copy(), Phi.copy(), psi.copy()
    P1[:, 1:-1, 1:-1] += h * a
    S1[:, 1:-1, 1:-1] += h * b
    P2[:, 1:-1, 1:-1] -= h * a
    S2[:, 1:-1, 1:-1] -= h * b
    rp, rm = nl.balance_residual(g, P1, S1, q, tb, tt), nl.balance_residual(g, P2, S2, q, tb, tt)
    for j, x, y in ((j1, rp[0], rm[0]), (j2, rp[1], rm[1])):
        fd = (x - y) / (2 * h)
        assert np.abs(j - fd).max() <= 1e-7 * np.abs(fd).max()


def test_floored_point_on_model_top_is_refused_clearly():
    g, q, tb, tt, Phi, psi = nl.bench_problem((7, 13, 15), amplitude=0.5)
    q = q.copy()
    q[-1, 6, 7] = -0.05 * q[-1, 6, 7]
    res = nl.solve_balance(g, q, tb, tt, Phi, psi, guess=(Phi, psi), floor=True)
    assert not res.converged and res.n_pv_floored == 1
    with pytest.raises(DomainError, match="model top level"):
        nl._require_converged(res, "full inversion")


def test_single_precision_inner_solves_reach_the_same_answer():
    # the inner GMRES solves run in single precision by default; the residual and the stopping test
    # are double precision, so both settings must give the same discrete solution (difference
    # bounded by the tolerance times the conditioning, far below the 1e-8 of the newton_krylov check)
    g, q, tb, tt, Phi, psi = nl.bench_problem((7, 15, 19), amplitude=1.0)
    single = nl.solve_balance(g, q, tb, tt, Phi, psi, guess=(Phi, psi), tol=1e-11)
    double = nl.solve_balance(g, q, tb, tt, Phi, psi, guess=(Phi, psi), tol=1e-11, inner_precision="double")
    assert single.converged and double.converged
    assert single.inner_precision == "single" and double.inner_precision == "double"
    assert single.residual_history[-1] <= 1e-11 and double.residual_history[-1] <= 1e-11
    assert np.abs(single.Phi - double.Phi).max() <= 1e-9 * np.abs(double.Phi).max()
    assert np.abs(single.psi - double.psi).max() <= 1e-9 * np.abs(double.psi).max()
    assert sum(single.gmres_per_newton) == single.gmres_iterations
    assert len(single.gmres_per_newton) == single.newton_iterations


def test_right_preconditioned_gmres_solves_a_linear_system():
    # the small GMRES loop against numpy.linalg.solve (LAPACK) on a non-symmetric system with a
    # Jacobi preconditioner, in double and in single precision
    rng = np.random.default_rng(7)
    n = 60
    A = np.eye(n) * 4.0 + rng.standard_normal((n, n)) * 0.3 + np.diag(np.linspace(1.0, 6.0, n))
    b = rng.standard_normal(n)
    exact = np.linalg.solve(A, b)
    dinv = 1.0 / np.diag(A)
    for dt, rtol, tol_x in ((np.float64, 1e-12, 1e-10), (np.float32, 1e-5, 1e-4)):
        Ad = A.astype(dt)
        x, its, rel = nl._gmres_right(lambda v: Ad @ v, lambda v: (dinv * v).astype(dt), b.astype(dt), rtol, 200,
                                      restart=25)
        assert x.dtype == dt and rel <= rtol and 0 < its <= 200
        assert np.abs(x - exact).max() <= tol_x * np.abs(exact).max()
        assert np.linalg.norm(b - A @ x) <= 10 * rtol * np.linalg.norm(b)


def test_progress_is_reported_once_per_newton_step():
    g, q, tb, tt, Phi, psi = nl.bench_problem((6, 11, 13), amplitude=1.0)
    calls = []
    res = nl.solve_balance(g, q, tb, tt, Phi, psi, guess=(Phi, psi), progress=lambda f, t: calls.append((f, t)))
    assert len(calls) == res.newton_iterations >= 2
    fr = [f for f, _ in calls]
    assert all(0.0 <= f <= 1.0 for f in fr) and fr == sorted(fr) and fr[-1] == 1.0
    assert "relative residual" in calls[0][1]


def test_bench_records_name_the_balance_and_the_cost():
    recs = nl.bench_nonlinear("tiny", (5, 11, 13), repeat=1)
    assert [r["method"] for r in recs] == ["qg_balance", "nonlinear_balance", "nonlinear_balance"]
    for r in recs[1:]:
        assert r["converged"] and r["final_relative_residual"] <= r["tol"]
        assert r["qg_solves"] == pytest.approx(r["median_s"] / recs[0]["median_s"])
        assert r["qg_solves_cpu"] > 0 and r["target_qg_solves"] == 30
        assert r["newton_iterations"] == len(r["residual_history"]) - 1 == len(r["gmres_per_newton"])
        assert r["preconditioner_applications"] >= r["gmres_iterations"] > 0 and r["preconditioner_builds"] >= 1


@pytest.mark.parametrize("periodic,uniform", [(True, True), (False, False), (True, False)])
def test_jacobian_product_on_periodic_and_non_uniform_grids(periodic, uniform):
    # the in-place Jacobian product (both precisions) against the central difference of the residual
    # (common practice; exact up to round-off for this quadratic system) on a 360-degree grid and on
    # non-uniform latitudes, the two stencil branches the benchmark grid does not reach
    lat = np.linspace(30.0, 70.0, 11) if uniform else np.array([30, 33, 37, 40, 44, 47, 52, 56, 61, 65, 70.0])
    lon = np.arange(0.0, 360.0, 20.0) if periodic else np.linspace(-40.0, 40.0, 13)
    g = nl.BalanceGrid(lat, lon, np.linspace(100000.0, 20000.0, 6))
    assert g.periodic == periodic and g.uniform_lat == uniform
    Phi, u, v, tb, tt = nl._invented_state(g, 0.5)
    psi = nl.streamfunction(g, u, v)
    q = nl.ertel_pv_nb(g, Phi, psi, tb, tt)
    rng = np.random.default_rng(11)
    a = rng.standard_normal(g.interior_shape) * 50.0
    b = rng.standard_normal(g.interior_shape) * 5.0e5
    d = nl._terms(g, Phi, psi, tb, tt)
    h = 1e-3
    P1, S1, P2, S2 = Phi.copy(), psi.copy(), Phi.copy(), psi.copy()
    for arr, x, s in ((P1, a, h), (S1, b, h), (P2, a, -h), (S2, b, -h)):
        arr[:, 1:-1, g.ls] += s * x
    rp, rm = nl.balance_residual(g, P1, S1, q, tb, tt), nl.balance_residual(g, P2, S2, q, tb, tt)
    for dtype, rtol in ((np.float64, 1e-7), (np.float32, 2e-5)):
        J = nl._Jacobian(g, d, g.fi + d["zeta"], None, dtype=dtype)
        j1, j2 = (x.copy() for x in J.apply(a.astype(dtype), b.astype(dtype)))
        J.apply(b.astype(dtype), a.astype(dtype))  # work arrays are reused: a second product must not leak in
        j1b, j2b = J.apply(a.astype(dtype), b.astype(dtype))
        for j, jb, x, y in ((j1, j1b, rp[0], rm[0]), (j2, j2b, rp[1], rm[1])):
            fd = (x - y) / (2 * h)
            assert np.abs(j - fd).max() <= rtol * np.abs(fd).max()
            assert np.array_equal(j, jb)


@pytest.mark.parametrize("periodic", [False, True])
def test_preconditioner_in_place_form_equals_its_definition(periodic):
    # the in-place application forms lap dPhi from the first solve's own equation instead of applying
    # the Laplacian; it must equal the direct form (flux-form Laplacian of the solved dPhi) to round-off
    lon = np.arange(0.0, 360.0, 20.0) if periodic else np.linspace(-40.0, 40.0, 13)
    g = nl.BalanceGrid(np.linspace(30.0, 70.0, 11), lon, np.linspace(100000.0, 20000.0, 6))
    Phi, u, v, tb, tt = nl._invented_state(g, 0.5)
    psi = nl.streamfunction(g, u, v)
    d = nl._terms(g, Phi, psi, tb, tt)
    rng = np.random.default_rng(2)
    v1, v2 = rng.standard_normal(g.interior_shape), rng.standard_normal(g.interior_shape)
    P = nl._make_preconditioner(g, d["Spp"], g.fi + d["zeta"])
    x1, x2 = P.apply(v1 * 3e-6, v2 * 2e-9)
    o1, o2 = np.empty(g.interior_shape), np.empty(g.interior_shape)
    P.apply_into(v1, v2, 3e-6, 2e-9, o1, o2)
    assert np.abs(o1 - x1).max() <= 1e-12 * np.abs(x1).max()
    assert np.abs(o2 - x2).max() <= 1e-11 * np.abs(x2).max()


def test_unknown_inner_precision_is_refused():
    from workbench.errors import InputError

    g, q, tb, tt, Phi, psi = nl.bench_problem((5, 9, 11), amplitude=0.5)
    with pytest.raises(InputError, match="inner_precision must be 'single' or 'double'"):
        nl.solve_balance(g, q, tb, tt, Phi, psi, inner_precision="half")


def test_a_stalled_floored_solve_stops_early_and_is_accepted_with_a_note():
    # late in the invented sample storm (time index 11) hundreds of PV points need the floor and
    # the floored system stalls near 1.6e-3; the solve stops after three steps without gain
    # (not after max_newton); the balanced state is given with a note naming the floored points
    # (below FLOORED_ACCEPT), the pieces are refused with the reason
    import workbench as wb
    from workbench.analysis import default_case_path, standard_pieces

    case = wb.open_case(default_case_path())
    g, st, _ = nl._case_states(case, 11, None, None)
    res = nl._solve_state(g, st, nl.DEFAULT_TOL, True)
    assert not res.converged and res.n_pv_floored > 0
    assert res.newton_iterations < 20
    h = res.residual_history
    assert all(h[-i] > 0.95 * h[-i - 1] for i in (1, 2, 3))
    assert h[-1] <= nl.FLOORED_ACCEPT
    ds = case.balanced_state(11, balance="nonlinear", floor=True)
    note = ds.attrs["solver_note"]
    assert f"with {res.n_pv_floored} PV" in note and "stalled at relative residual" in note
    assert np.isfinite(ds["u"].values).all()
    with pytest.raises(DomainError, match="use balance='qg' for the pieces here"):
        case.inversion(standard_pieces(moist=True), 11, balance="nonlinear", floor=True)
    # without the floor the same time is refused as not elliptic
    with pytest.raises(DomainError, match="not elliptic"):
        case.balanced_state(11, balance="nonlinear")


def test_a_solve_that_stalls_above_the_accepted_residual_is_refused():
    # the rule of _require_converged: a floored solve is accepted only up to FLOORED_ACCEPT
    g, q, tb, tt, Phi, psi = nl.bench_problem((5, 9, 11), amplitude=0.5)
    res = nl.solve_balance(g, q, tb, tt, Phi, psi, guess=(Phi, psi), floor=True, max_newton=1)
    assert res.newton_iterations == 1
    high = nl.BalanceResult(**{**res.__dict__, "converged": False, "n_pv_floored": 3,
                               "residual_history": [1.0, 2 * nl.FLOORED_ACCEPT]})
    with pytest.raises(DomainError, match="floored system is not smooth"):
        nl._require_converged(high, "full inversion")
    low = nl.BalanceResult(**{**high.__dict__, "residual_history": [1.0, 0.5 * nl.FLOORED_ACCEPT]})
    assert "accepted" in nl._require_converged(low, "full inversion")
    smooth = nl.BalanceResult(**{**high.__dict__, "n_pv_floored": 0, "n_eta_floored": 0,
                                 "floored": None})
    with pytest.raises(DomainError, match="did not converge"):
        nl._require_converged(smooth, "full inversion")


@pytest.fixture(scope="module")
def mountain_case(tmp_path_factory):
    """A Lambert-conformal GRIB2 of one time with a 3.7 km plateau (levels below 640 hPa missing
    over it, as a forecast centre's bitmap writes them)."""
    import forecast_files as ff
    import workbench as wb

    crs, x, y, lat2d, lon2d = ff.plane_grid("lambert")
    mountain = (lat2d - 50.0) ** 2 / 9 + (lon2d + 30.0) ** 2 / 25 < 1.0
    path = tmp_path_factory.mktemp("terrain") / "mountain.grib2"
    ff.write_grib(path, "lambert", below_ground=mountain)
    return wb.open_case(path)


def test_operator_stability_over_terrain_is_the_datas_own(mountain_case):
    # Hydrostatic balance in the Exner coordinate, dPhi/dpi = -theta (with c_p in pi), gives
    # Phi_pipi = -dtheta/dpi > 0 wherever the column is stably stratified (Holton & Hakim 2013,
    # An Introduction to Dynamic Meteorology, 5th ed., hydrostatic equation with theta as the
    # thermodynamic variable; from memory). The complete columns of this file (extrapolated below
    # the ground with 6.5 K/km) are stable everywhere, so the operator's Phi_pipi must be positive
    # at every node, the boundary half cells included.
    from workbench import physics
    from workbench.case import _ground_value

    case = mountain_case
    assert int(case.below_ground(0).values.sum()) > 0
    theta = physics.potential_temperature(case.at(0)["temperature"]).transpose(
        "pressure", "latitude", "longitude").values
    assert np.all(np.diff(theta, axis=0) > 0)  # pressure ascending in the file: theta grows upward
    g, st, rf = nl._case_states(case, 0, None, None)
    d = nl._terms(g, st["Phi"], st["psi"], st["tb"], st["tt"])
    assert np.all(d["Spp"] > 0)
    # the ground's theta carried down to the flat lower boundary (the QG boundary rule) would
    # make the lowest layer unstable under the plateau: the check above can fail
    tb_ground = np.asarray(_ground_value(physics.potential_temperature(case.at(0)["temperature"]),
                                         case.below_ground(0)).values, float)
    d_ground = nl._terms(g, st["Phi"], st["psi"], tb_ground, st["tt"])
    assert np.any(d_ground["Spp"][0] < 0)


def test_balanced_state_over_terrain_with_the_floor(mountain_case):
    # Nonlinear balance fits the analysed wind better than QG balance in the free troposphere
    # (Davis & Emanuel 1991, Mon. Wea. Rev. 119, 1929-1953: the balanced flow of analyses
    # reproduces the analysed flow closely; from memory). Here the floored solve stalls near
    # 1e-3 (points next to the plateau's extrapolated columns), is accepted with a note, and the
    # balanced wind is still closer to the analysed one than QG's at and above 700 hPa.
    case = mountain_case
    with pytest.raises(DomainError, match="not elliptic"):
        case.balanced_state(0, balance="nonlinear")
    q = nl.balance_quality(case, 0, floor=True)
    assert "floored" in q.attrs["solver_note"]
    p = q["pressure"].values / 100.0
    free = p <= 700.0
    assert np.all(q["rms_difference_nonlinear"].values[free] < q["rms_difference_qg"].values[free])
    assert np.all(q["relative_difference_nonlinear"].values[free] < 0.1)
