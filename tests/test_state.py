"""The shared State (workbench.state): settings, pieces, results, overlay, attribution,
sections and the JSON round trip.

Physics checked here is the superposition property of piecewise QG inversion (QG inversion
is linear, so the pieces add up exactly to the full inversion: Davis & Emanuel 1991, Mon.
Wea. Rev. 119, 1929-1953), seen through the state's own sums (overlay, attribution).
"""
import json

import numpy as np
import pytest

from workbench.errors import InputError, PieceError
from workbench.state import BOUNDARY_PIECES, State, parse_surface, surface_label

TROUGH = [(-20.0, 38.0), (5.0, 38.0), (5.0, 55.0), (-20.0, 55.0)]


@pytest.fixture
def state(small_case):
    return State(small_case)


def _with_pieces(state):
    state.add_piece(name="upper", polygon=TROUGH, layer=(150.0, 450.0), sign=1)
    state.add_piece(name="lower", polygon=TROUGH, layer=(600.0, 1000.0), sign=0)
    state.add_boundary_piece("bottom")
    state.add_boundary_piece("remainder")
    return state


def test_surface_parsing():
    assert parse_surface(320) == 320.0
    assert parse_surface("315 K") == 315.0
    assert parse_surface("500 hPa") == "500hPa"
    assert parse_surface("Tropopause") == "tropopause"
    for bad in ("ground", "5000 hPa", 20.0, True):
        with pytest.raises(InputError):
            parse_surface(bad)
    assert surface_label("tropopause", 1.5) == "dynamic tropopause (1.5 PVU)"
    assert surface_label("500hPa") == "500 hPa"


def test_defaults_fit_the_case(state, small_case):
    assert state.time_index == 0 and state.member is None
    assert state.param.time_index.bounds == (0, len(small_case.times) - 1)
    assert any(abs(state.overlay_level - p) < 0.5 for p in small_case.levels_hpa)
    state.surface = "300 hPa"
    assert state.surface == "300hPa"
    with pytest.raises(InputError):
        state.surface = "nowhere"
    assert state.surface == "300hPa"  # a bad value loses nothing
    assert state.map_field().dims == ("latitude", "longitude")


def test_piece_list_operations(state):
    p = state.add_piece(polygon=TROUGH, layer=(200, 400))
    assert p.name == "piece" and p.colour
    q = state.add_piece(polygon=TROUGH, layer=(200, 400))
    assert q.name == "piece 2" and q.colour != p.colour
    with pytest.raises(PieceError, match="exists already"):
        state.add_piece(name="piece", polygon=TROUGH)
    with pytest.raises(PieceError, match="total"):
        state.add_piece(name="total", polygon=TROUGH)
    with pytest.raises(PieceError, match="remainder"):
        state.add_piece(name="remainder", polygon=TROUGH)
    state.rename_piece("piece 2", "upper trough")
    assert state.piece_names == ["piece", "upper trough"]
    with pytest.raises(PieceError, match="exists already"):
        state.rename_piece("piece", "upper trough")
    state.toggle_piece("piece")
    assert state.piece("piece").visible is False
    state.toggle_piece("piece", True)
    assert state.piece("piece").visible is True
    state.remove_piece("piece")
    assert state.piece_names == ["upper trough"]
    with pytest.raises(PieceError, match="no piece called"):
        state.remove_piece("piece")


def test_boundary_pieces_one_call_away(state):
    for kind in BOUNDARY_PIECES:
        p = state.add_boundary_piece(kind)
        assert p.kind == kind and p.polygon is None
    assert [p.kind for p in state.pieces] == list(BOUNDARY_PIECES)
    with pytest.raises(PieceError, match="exists already"):
        state.add_boundary_piece("bottom")
    with pytest.raises(PieceError, match="unknown"):
        state.add_boundary_piece("sideways")


def test_results_add_up_to_the_full_inversion(state, small_case):
    _with_pieces(state)
    res = state.results()
    assert set(res) == {"upper", "lower", "surface θ′", "remainder", "total"}
    same = small_case.inversion(state.pieces, time=0, reference="time_mean")
    assert same is res or set(same) == set(res)  # cached in the case
    # superposition (Davis & Emanuel 1991): the pieces sum to the full inversion
    total = res["total"]["height_anomaly"]
    summed = sum(res[n]["height_anomaly"] for n in res if n != "total")
    scale = float(np.abs(total).max())
    assert scale > 0
    assert float(np.abs(summed - total).max()) < 1e-9 * scale


def test_overlay_is_the_sum_of_visible_pieces(state):
    _with_pieces(state)
    res = state.results()
    ov = state.overlay()
    k = int(np.argmin(np.abs(res["total"]["pressure"].values - state.overlay_level * 100)))
    vis = ["upper", "lower", "surface θ′", "remainder"]
    want = sum(res[n]["u"].isel(pressure=k) for n in vis)
    np.testing.assert_allclose(ov["u"].values, want.values, rtol=0, atol=1e-12)
    # all pieces visible: the overlay is the full inversion (superposition)
    np.testing.assert_allclose(ov["height_anomaly"].values,
                               res["total"]["height_anomaly"].isel(pressure=k).values,
                               atol=1e-9 * float(np.abs(ov["height_anomaly"]).max()))
    state.toggle_piece("remainder", False)
    state.toggle_piece("lower", False)
    ov2 = state.overlay()
    assert ov2.attrs["pieces"] == ["upper", "surface θ′"]
    want2 = (res["upper"]["v"] + res["surface θ′"]["v"]).isel(pressure=k)
    np.testing.assert_allclose(ov2["v"].values, want2.values, atol=1e-12)
    for n in state.piece_names:
        state.toggle_piece(n, False)
    assert state.overlay() is None


def test_attribution_rows_sum_to_total(state):
    _with_pieces(state)
    with pytest.raises(InputError, match="target"):
        state.attribution()
    with pytest.raises(InputError, match="outside the case domain"):
        state.set_target(120.0, 45.0)
    state.set_target(-5.0, 46.0, 850.0)
    df = state.attribution()
    pieces = df.drop(index=["sum of pieces", "full inversion"])
    assert list(pieces.index) == ["upper", "lower", "surface θ′", "remainder"]
    full = df.loc["full inversion", "height_anomaly"]
    assert pieces["height_anomaly"].sum() == pytest.approx(full, rel=1e-9, abs=1e-9)
    assert pieces["height_share_pct"].sum() == pytest.approx(100.0, rel=1e-9)


def test_sections_with_pieces_carry_balanced_flow_and_omega(state, small_case):
    from workbench.inversion.omega import qg_omega

    with pytest.raises(InputError, match="no section"):
        state.section()
    state.add_section((-30.0, 40.0), (20.0, 52.0))
    plain = state.section()
    assert "balanced_normal_wind" not in plain and "qg_omega" not in plain
    state.add_piece(name="upper", polygon=TROUGH, layer=(150.0, 450.0))
    sec = state.section()
    assert list(sec["piece"].values) == ["upper"]
    assert {"balanced_normal_wind", "balanced_temperature_anomaly", "qg_omega",
            "piece_qg_omega"} <= set(sec.data_vars)
    # the full-flow omega is the QG omega of the case's geopotential, interpolated
    om = state.omega()
    ref = qg_omega(small_case.at(0)["geopotential"], small_case.sigma("time_mean"), small_case.f0)
    np.testing.assert_allclose(om["full flow"].values, ref.values,
                               atol=1e-9 * float(np.abs(ref).max()))
    state.add_section((-10.0, 35.0), (-10.0, 58.0))
    assert state.active_section == 1
    state.remove_section(0)
    assert state.active_section == 0 and len(state.sections) == 1


def test_json_round_trip(state):
    from workbench.annotations import Label

    _with_pieces(state)
    state.toggle_piece("lower", False)
    state.surface = "tropopause"
    state.field = "potential_temperature"
    state.threshold = 1.5
    state.time_index = 1
    state.add_section((-30.0, 40.0), (20.0, 52.0), name="across")
    state.set_target(-5.0, 46.0, 700.0)
    state.add_annotation(Label("invented low", -5.0, 46.0))
    d = state.to_dict()
    text = json.dumps(d, allow_nan=False)
    back = State.from_dict(json.loads(text), state.case)
    assert back.to_dict() == d
    assert back.piece("lower").visible is False
    assert back.sections[0].name == "across"
    assert back.target == (-5.0, 46.0, 700.0)


def test_session_file_round_trip(state, tmp_path):
    from workbench.session import load_session, save_session

    _with_pieces(state)
    state.add_section((-30.0, 40.0), (20.0, 52.0))
    path = save_session(state, tmp_path / "s.json")
    back = load_session(path, case=state.case)
    assert back.to_dict() == state.to_dict()


def test_from_dict_rejects_bad_entries(state):
    good = state.to_dict()
    for key, value, match in (("time", "1999-01-01T00:00:00", "not a time"),
                              ("target", [1, 2], "target"),
                              ("active_section", 3, "active_section"),
                              ("surface", "underground", "surface")):
        bad = dict(good, **{key: value})
        with pytest.raises(InputError, match=match):
            State.from_dict(bad, state.case)
    p = {"name": "a", "polygon": TROUGH}
    with pytest.raises(PieceError, match="unique"):
        State.from_dict(dict(good, pieces=[p, p]), state.case)


def test_set_case_clears_grid_bound_things(state, small_case):
    _with_pieces(state)
    state.add_section((-30.0, 40.0), (20.0, 52.0))
    state.set_target(-5.0, 46.0)
    state.set_case(small_case)
    assert state.pieces == [] and state.sections == [] and state.target is None


def test_incremental_results_match_a_full_piecewise_inversion(state, small_case):
    # bookkeeping check: appending/dropping pieces one at a time (what lassos do) must give
    # exactly what the inversion layer's invert_pieces gives for the whole list (linearity of
    # QG inversion, Davis & Emanuel 1991, makes the remainder update exact).
    from workbench.inversion.pieces import invert_pieces

    def check():
        got = state.results()
        want = invert_pieces(small_case.anomaly(time=0, reference="time_mean"), state.pieces)
        assert list(got) == list(want)
        for name in want:
            for var in ("height_anomaly", "u", "v", "temperature_anomaly"):
                a, b = got[name][var].values, want[name][var].values
                scale = float(np.nanmax(np.abs(want["total"][var].values)))
                assert float(np.nanmax(np.abs(a - b))) <= 1e-10 * scale, (name, var)

    state.warm()
    state.add_piece(name="upper", polygon=TROUGH, layer=(150.0, 450.0), sign=1)
    check()
    # overlaps the first piece: the first claim wins
    state.add_piece(name="wider", polygon=[(-30.0, 35.0), (15.0, 35.0), (15.0, 58.0),
                                            (-30.0, 58.0)], layer=(100.0, 1000.0), sign=0)
    check()
    state.add_piece(name="warm surface", kind="bottom", polygon=TROUGH, sign=1)
    state.add_boundary_piece("bottom")
    state.add_boundary_piece("lateral")
    check()
    state.rename_piece("wider", "the rest aloft")
    state.toggle_piece("upper", False)
    check()
    state.remove_piece("lateral boundary")
    state.remove_piece("surface θ′")
    check()
    state.remove_piece("upper")  # not at the end: a full inversion again
    check()
