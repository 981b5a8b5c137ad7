"""QG tendency attribution (workbench.tendency): closure, consistency with the QG model's own
time step, the advection operator against closed forms, and the ``pvwb explain`` command."""
from __future__ import annotations

import warnings

import numpy as np
import pytest

import workbench as wb
from workbench import tendency as T
from workbench.analysis import default_case_path
from workbench.cli import main as pvwb
from workbench.errors import InputError
from workbench.units import EARTH_RADIUS, G

pytestmark = pytest.mark.filterwarnings("ignore:latitude:UserWarning")


@pytest.fixture(scope="module")
def case():
    return wb.open_case(default_case_path())


@pytest.fixture(scope="module")
def explained(case):
    return T.explain(case, 6)


def test_matrix_adds_up_to_the_total(explained):
    # bilinearity of the Jacobian and linearity of the inversion: exact closure (round-off)
    m = explained.matrix
    assert m.shape == (7, 7) and m.index[0] == T.REFERENCE and list(m.index) == list(m.columns)
    assert abs(explained.total) > 1.0  # a developing storm: heights change by metres per 6 h
    assert explained.closure_error < 1e-9 * max(1.0, np.abs(m.values).max())
    # a piece without interior PV or boundary theta (the lateral boundary) carries nothing
    assert np.all(m["lateral boundary"].abs() < 1e-9)
    assert explained.summary[0].startswith("QG height tendency at")
    assert m.attrs["units"] == "m (6 h)-1"


def test_maps_agree_with_the_matrix(explained):
    w = T.target_weights(explained.budget.grid.lat, explained.budget.grid.lon, explained.budget.grid.pressure,
                         explained.target)
    entry = explained.map("upper trough", "reference state")
    assert float(T.interpolate(entry.values, w)) == pytest.approx(
        explained.matrix.loc["upper trough", "reference state"], rel=1e-10, abs=1e-10)
    row = explained.map(row="surface θ′")
    assert float(T.interpolate(row.values, w)) == pytest.approx(
        explained.matrix.loc["surface θ′"].sum(), rel=1e-10, abs=1e-10)
    total = explained.map(level_hpa=500)
    assert total.dims == ("latitude", "longitude") and np.all(total.values[0] == 0.0)  # boundary held
    with pytest.raises(InputError, match="not one of"):
        explained.map("no such piece")


def test_total_matches_the_models_first_step(case, explained):
    """The QG model's own first step (damping off): (Phi(dt) - Phi(0)) / dt at the target tends to
    the attribution's total with the finite difference's first-order truncation error
    (common practice: Taylor expansion, error dt/2 * d2Phi/dt2)."""
    from workbench.whatif import model_from_case

    setup = model_from_case(case, 6, damping=False, advect_top=True)
    model = setup.model
    w = T.target_weights(model.lat, model.lon, model.p, explained.target)
    phi0 = model.invert(setup.x0)
    # the model's own instantaneous tendency is the same arithmetic: equal to round-off
    direct = float(T.interpolate(model.invert(model.tendency(setup.x0)), w)) * T.SECONDS_6H / G
    assert direct == pytest.approx(explained.total, rel=1e-9)
    errors = []
    for minutes in (8.0, 4.0, 2.0):
        model.dt = minutes * 60.0
        diag = model.diagnose(setup.x0, moist=False)
        x1 = model.step(setup.x0, diag, moist=False)
        fd = float(T.interpolate(model.invert(x1) - phi0, w)) / model.dt * T.SECONDS_6H / G
        errors.append(abs(fd - explained.total))
    assert errors[-1] < 5e-3 * abs(explained.total)  # 0.24 % measured at 2 min
    # first order: halving dt halves the error (ratios 2 within 15 %)
    assert 1.7 < errors[0] / errors[1] < 2.3 and 1.7 < errors[1] / errors[2] < 2.3


def test_advection_of_a_zonal_wave_by_a_zonal_flow():
    """-J(psi, q) for psi = -U a sin(phi) (u = U cos(phi)) and q = cos(m lambda): closed form
    -u/(a cos(phi)) dq/dlambda = U m sin(m lambda) / a; second-order accurate (Arakawa 1966,
    J. Comput. Phys. 1, 119-143: the Jacobian is a second-order approximation)."""
    errs = []
    for d in (2.0, 1.0):
        lat = np.arange(30.0, 60.0 + 1e-9, d)
        lon = np.arange(0.0, 360.0, d)
        geom = T.Geometry(lat, lon)
        assert geom.periodic
        la, lo = np.meshgrid(np.deg2rad(lat), np.deg2rad(lon), indexing="ij")
        U, m = 20.0, 8
        psi = -U * EARTH_RADIUS * np.sin(la)
        tend = T.advective_tendency(psi, np.cos(m * lo), geom)
        exact = U * m * np.sin(m * lo) / EARTH_RADIUS
        errs.append(np.abs(tend[1:-1] - exact[1:-1]).max() / np.abs(exact).max())
        assert np.all(tend[[0, -1]] == 0)
    assert errs[1] < 0.01 and 3.5 < errs[0] / errs[1] < 4.5


def test_irregular_grid_refused():
    with pytest.raises(InputError, match="regular"):
        T.Geometry([30.0, 31.0, 33.0, 34.0], [0.0, 1.0, 2.0])


def test_cli_explain(tmp_path, capsys):
    out = tmp_path / "m.csv"
    assert pvwb(["explain", "--time", "6", "-o", str(out)]) == 0
    text = capsys.readouterr().out
    assert "not a forecast" in text and "closure" in text and "upper trough" in text
    assert out.read_text().splitlines()[1].startswith("wind of,reference state")  # after the caution line
    assert pvwb(["explain", "--time", "99"]) == 2
    assert "time" in capsys.readouterr().err
    assert pvwb(["explain", "--target", "200,50,500"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "outside the domain" in err[0]
    assert pvwb(["explain", "-o", str(out)]) == 2  # exists, no --overwrite
    assert "--overwrite" in capsys.readouterr().err


def test_explain_is_quiet_about_warnings(case):
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        ex = T.explain(case, 0, target=(-60.0, 45.0, 500.0))
    assert ex.target == (-60.0, 45.0, 500.0) and np.isfinite(ex.matrix.values).all()


def test_briefing_page(case):
    from workbench import brief

    state = brief.standard_state(case, 6)
    fig = brief._tendency_page(case, state)
    texts = " ".join(t.get_text() for t in fig.texts)
    assert "not a forecast" in texts and "QG height tendency at" in texts
    ex = T.explain(case, 6, state.pieces or None, tuple(state.target), reference=state.reference)
    cells = [c.get_text().get_text() for ax in fig.axes for tab in ax.tables for c in tab.get_celld().values()]
    assert f"{ex.total:+.1f}" in cells and "upper trough" in cells
