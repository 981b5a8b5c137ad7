"""Undo and redo of the State's pieces, sections, target and annotations (kept in the State,
bounded, saved with the session), and the page's editing paths that make one undo step each:
a lasso, an outline edited by dragging a vertex, a label moved, an arrow, an annotation's text
and colour, Delete of the selected piece. No browser here (tests/test_app_timeloop.py drives the
same paths with real mouse and keyboard events)."""
from __future__ import annotations

import json

import numpy as np
import pytest

from workbench import panels
from workbench.errors import InputError, WorkbenchError
from workbench.state import State

KEYS = ("pieces", "sections", "active_section", "annotations", "target")


def _part(state):
    d = state.to_dict()
    return {k: d[k] for k in KEYS}


@pytest.fixture
def state(small_case):
    return State(small_case)


def _ring(case, frac=0.15):
    d = case.domain
    cx, cy = 0.5 * (d["lon_min"] + d["lon_max"]), 0.5 * (d["lat_min"] + d["lat_max"])
    rx, ry = frac * (d["lon_max"] - d["lon_min"]), frac * (d["lat_max"] - d["lat_min"])
    return [(cx + rx * np.cos(t), cy + ry * np.sin(t)) for t in np.linspace(0, 2 * np.pi, 25)]


def test_every_kind_of_change_is_undone_and_redone(state):
    from workbench.annotations import Label

    from workbench.panels.map import lasso

    case = state.case
    steps = [_part(state)]
    lasso(state, _ring(case))
    steps.append(_part(state))
    state.add_section(_ring(case)[0], _ring(case)[12])
    steps.append(_part(state))
    d = case.domain
    state.set_target(0.5 * (d["lon_min"] + d["lon_max"]), 0.5 * (d["lat_min"] + d["lat_max"]), 500.0)
    steps.append(_part(state))
    state.add_annotation(Label(text="L", lon=d["lon_min"] + 3, lat=d["lat_min"] + 3))
    steps.append(_part(state))
    state.rename_piece("piece", "upper trough")
    steps.append(_part(state))
    state.set_follow("upper trough", "anomaly")
    steps.append(_part(state))
    assert state.undo_steps == len(steps) - 1 and state.redo_steps == 0
    for k in range(len(steps) - 2, -1, -1):
        assert state.undo()
        assert _part(state) == steps[k]
    assert not state.undo() and state.undo_steps == 0
    for k in range(1, len(steps)):
        assert state.redo()
        assert _part(state) == steps[k]
    assert not state.redo()
    # a new change after undo drops the redo steps
    state.undo()
    state.remove_section(0)
    assert state.redo_steps == 0 and not state.redo()


def test_history_is_bounded(state):
    d = state.case.domain
    for k in range(State.HISTORY_STEPS + 7):
        state.set_target(d["lon_min"] + 0.01 * (k + 1), d["lat_min"] + 1.0, 500.0)
    assert state.undo_steps == State.HISTORY_STEPS
    while state.undo():
        pass
    assert state.target[0] == pytest.approx(d["lon_min"] + 0.01 * 7)  # the oldest 7 are gone


def test_undo_restores_the_inversion(state):
    from workbench.panels.map import lasso

    lasso(state, _ring(state.case))
    z1 = state.overlay()["height_anomaly"].values.copy()
    lasso(state, _ring(state.case, 0.3))
    z2 = state.overlay()["height_anomaly"].values.copy()
    assert not np.allclose(z1, z2)
    state.undo()
    np.testing.assert_allclose(state.overlay()["height_anomaly"].values, z1, rtol=0, atol=1e-9)


def test_history_saved_with_the_session_and_checked_on_load(state, tmp_path):
    from workbench.panels.map import lasso
    from workbench.session import load_session, save_session

    lasso(state, _ring(state.case))
    state.add_section(_ring(state.case)[0], _ring(state.case)[12])
    path = tmp_path / "s.json"
    save_session(state, path)
    back = load_session(path, case=state.case)
    assert back.undo_steps == 2 and back.redo_steps == 0
    assert back.undo() and back.sections == [] and [p.name for p in back.pieces] == ["piece"]
    assert back.undo() and back.pieces == []
    # a history step that does not hold a valid piece is refused when the state is read
    d = state.to_dict()
    d["history"]["undo"][-1]["pieces"] = [{"name": "x", "kind": "nonsense"}]
    with pytest.raises(WorkbenchError):
        State.from_dict(json.loads(json.dumps(d)), state.case)
    d["history"] = {"undo": [{"pieces": []}], "redo": []}
    with pytest.raises(InputError, match="history step"):
        State.from_dict(d, state.case)


def test_outline_edit_label_move_arrow_and_annotation_edit_are_one_step_each(state):
    from workbench.annotations import Label

    mp = panels.MapPanel(state)
    ed = mp.editing
    from workbench.panels.map import lasso

    lasso(state, _ring(state.case))
    n0 = state.undo_steps
    res0 = state.results()["piece"]["height_anomaly"].values.copy()
    # the browser's PolyEditTool leaves the pieces' source with a vertex moved
    src = mp.view.src["pieces"]
    data = {k: list(v) for k, v in src.data.items()}
    xs = [list(x) for x in data["xs"]]
    k = int(np.argmax(xs[0]))
    xs[0][k] += 0.3 * (state.case.domain["lon_max"] - state.case.domain["lon_min"])
    data["xs"] = xs
    src.data = data
    assert state.undo_steps == n0 + 1
    assert max(x for x, _ in state.piece("piece").polygon) == pytest.approx(max(xs[0]))
    assert not np.allclose(state.results()["piece"]["height_anomaly"].values, res0)
    # a Python redraw of the same outlines is not an edit
    ed.refresh_pieces()
    assert state.undo_steps == n0 + 1
    d = state.case.domain
    state.add_annotation(Label(text="L", lon=d["lon_min"] + 3, lat=d["lat_min"] + 3))
    label = state.annotations[-1]
    n1 = state.undo_steps
    ed.handles_moved(dict(x=[d["lon_min"] + 5], y=[d["lat_min"] + 4], id=[label.id]))
    assert (state.annotations[-1].lon, state.annotations[-1].lat) == (d["lon_min"] + 5, d["lat_min"] + 4)
    assert state.undo_steps == n1 + 1
    state.page.mouse_mode = "arrow"
    state.page.last_click = (d["lon_min"] + 2, d["lat_min"] + 2)
    state.page.last_click = (d["lon_min"] + 8, d["lat_min"] + 5)
    assert state.annotations[-1].kind == "arrow" and state.undo_steps == n1 + 2
    # an arrow's head and a region move by their handles; each drag is one undo step
    arrow = state.annotations[-1]
    handles = ed.src["handles"].data
    assert f"{arrow.id}:tail" in handles["id"] and f"{arrow.id}:head" in handles["id"]
    ed.handles_moved(dict(x=[d["lon_min"] + 2, d["lon_min"] + 10], y=[d["lat_min"] + 2, d["lat_min"] + 7],
                          id=[f"{arrow.id}:tail", f"{arrow.id}:head"]))
    got = next(a for a in state.annotations if a.id == arrow.id)
    assert (got.start_lon, got.start_lat) == (arrow.start_lon, arrow.start_lat)
    assert (got.end_lon, got.end_lat) == (d["lon_min"] + 10, d["lat_min"] + 7)
    assert state.undo_steps == n1 + 3
    from workbench.annotations import Region

    square = [(d["lon_min"] + 4, d["lat_min"] + 4), (d["lon_min"] + 8, d["lat_min"] + 4),
              (d["lon_min"] + 8, d["lat_min"] + 8), (d["lon_min"] + 4, d["lat_min"] + 8)]
    state.add_annotation(Region(polygon=square, label="rain"))
    region = state.annotations[-1]
    k = ed.src["handles"].data["id"].index(f"{region.id}:region")
    cx, cy = ed.src["handles"].data["x"][k], ed.src["handles"].data["y"][k]
    # dragged far west: the region stops at the domain's edge, shape kept
    ed.handles_moved(dict(x=[cx - 100.0], y=[cy + 1.0], id=[f"{region.id}:region"]))
    got = np.asarray(next(a for a in state.annotations if a.id == region.id).polygon)
    assert got[:, 0].min() == pytest.approx(d["lon_min"]) and np.ptp(got[:, 0]) == pytest.approx(4.0)
    assert got[:, 1].min() == pytest.approx(d["lat_min"] + 5)
    state.undo()
    assert next(a for a in state.annotations if a.id == region.id).polygon == region.polygon
    state.undo()  # the region added
    state.undo()  # the arrow's move
    with pytest.raises(InputError, match="shorter"):
        ed.add_arrow((d["lon_min"] + 2, d["lat_min"] + 2), (d["lon_min"] + 2.1, d["lat_min"] + 2))
    ap = panels.AnnotationPanel(state)
    ap.pick.value = label.id
    assert state.page.selected == f"annotation:{label.id}"
    ap.edit_text.value = "jet exit"
    ap.edit_colour.value = "orange"
    ap.apply_edit()
    got = next(a for a in state.annotations if a.id == label.id)
    assert got.text == "jet exit" and got.colour != label.colour
    assert state.undo_steps == n1 + 3
    state.undo()
    assert next(a for a in state.annotations if a.id == label.id).text == "L"


def test_delete_key_removes_the_selected_piece_and_keys_step_time(state):
    from workbench.panels.map import lasso

    cc = panels.CaseControls(state)
    lasso(state, _ring(state.case))
    with pytest.raises(InputError, match="nothing selected"):
        cc.delete_selected()
    state.page.selected = "piece:piece"
    cc.key("Delete")
    assert state.pieces == [] and state.page.selected is None
    cc.key("Ctrl+z")
    assert [p.name for p in state.pieces] == ["piece"]
    cc.key("Ctrl+Shift+z")
    assert state.pieces == []
    n = len(state.case.times)
    cc.key("ArrowRight")
    assert state.time_index == 1 % n
    cc.key("ArrowLeft")
    cc.key("ArrowLeft")
    assert state.time_index == (n - 1) % n  # wraps round
