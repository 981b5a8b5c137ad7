"""The page's panels on one State, each used alone as in a notebook beside the user's own
cells: they take the State only, watch only what they show and update in place."""
import pytest
from bokeh.document import Document

from workbench import panels
from workbench.errors import InputError
from workbench.state import State

TROUGH = [(-20.0, 38.0), (5.0, 38.0), (5.0, 55.0), (-20.0, 55.0)]


@pytest.fixture
def state(small_case):
    return State(small_case)


def _watched(panel):
    names = set()
    for obj, w in panel._watchers:
        if obj is panel.state:
            names.update(w.parameter_names)
    return names


def test_map_panel_alone_lassoes_with_the_page_settings(state):
    mp = panels.MapPanel(state)
    doc = Document()
    doc.add_root(mp.layout.get_root(doc))
    fig, src = mp.view.figure, mp.view.src["bal"]
    state.page.param.update(layer=(100.0, 500.0), piece_name="upper")
    piece = mp.lasso(TROUGH)
    assert piece.name == "upper" and state.piece_names == ["upper"]
    assert len(src.data["x0"]) > 0 and mp.view.figure is fig and mp.view.src["bal"] is src
    state.page.lasso_makes = "region"
    region = mp.lasso(TROUGH)
    assert region.kind == "region" and len(state.pieces) == 1
    n = len(doc.models)
    for k in range(5):
        state.time_index = k % len(state.case.times)
    assert len(doc.models) == n
    bundle = mp._repr_mimebundle_()
    assert bundle  # displays by itself


def test_panels_follow_one_state(state):
    attr = panels.AttributionPanel(state)
    pieces = panels.PiecesPanel(state)
    controls = panels.CaseControls(state)
    state.add_piece(name="upper", polygon=TROUGH, layer=(100.0, 500.0))
    assert list(pieces.pieces_table.value["name"]) == ["upper"]
    assert list(pieces.pieces_table.value["sign"]) == ["positive"]
    state.set_target(-5.0, 46.0, 850.0)
    assert "full inversion" in list(attr.attr_table.value["piece"])
    assert "°W" in attr.attr_title.object and "°N" in attr.attr_title.object
    controls.surface.value = "tropopause"
    assert state.field == "potential_temperature" == controls.field.value
    with pytest.raises(InputError, match="threshold value everywhere"):
        state.field = "ertel_pv"


def test_each_panel_watches_only_what_it_shows(state):
    # the pieces list also says what tracking found at the selected time
    assert _watched(panels.PiecesPanel(state)) == {"pieces", "time_index", "member", "reference"}
    assert _watched(panels.AnnotationPanel(state)) == {"annotations"}
    assert _watched(panels.StatusPanel(state)) == {"status", "status_level", "busy"}
    # the attribution panel also shows the balance choice (QG or nonlinear) and its floor box
    assert _watched(panels.AttributionPanel(state)) == {"pieces", "target", "time_index",
                                                       "member", "reference", "balance",
                                                       "balance_floor"}
    assert "pieces" not in _watched(panels.CaseControls(state))


def test_projected_case_drawn_in_its_projection_with_a_switch(tmp_path):
    """A Lambert conformal file: the map's axes are the projection plane (pyproj checks the
    corner), a lasso drawn there reaches the State as lon/lat, and the switch redraws the map
    on longitude-latitude."""
    import numpy as np
    import pyproj

    import workbench as wb
    import forecast_files as ff

    path = tmp_path / "lambert.nc"
    ff.write_cf_netcdf(path, "lambert", grid_relative=True)
    case = wb.open_case(path)
    state = State(case)
    mp = panels.MapPanel(state)
    fig = mp.view.figure
    crs = pyproj.CRS.from_wkt(case.data.attrs["native_crs"])
    to_xy = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True)
    d = case.domain
    lon0, lat0 = 0.5 * (d["lon_min"] + d["lon_max"]), 0.5 * (d["lat_min"] + d["lat_max"])
    x0, y0 = to_xy.transform(lon0, lat0)
    assert fig.x_range.start < x0 < fig.x_range.end and fig.y_range.start < y0 < fig.y_range.end
    assert fig.x_range.end - fig.x_range.start > 1e5  # metres, not degrees
    ring = [(x0 + 3e5 * np.cos(t), y0 + 3e5 * np.sin(t)) for t in np.linspace(0, 2 * np.pi, 24)]
    lonlat = [to_xy.transform(x, y, direction="INVERSE") for x, y in ring]
    from bokeh.events import SelectionGeometry

    xs, ys = zip(*ring)  # the gesture as the browser reports it, in the plane's metres
    fig._trigger_event(SelectionGeometry(fig, geometry=dict(type="poly", x=list(xs),
                                                            y=list(ys)), final=True))
    assert len(state.pieces) == 1, state.status
    piece = state.pieces[0]
    np.testing.assert_allclose(np.asarray(piece.polygon), np.asarray(lonlat), atol=1e-6)
    img = mp.view.src["field"].data["image"][0]
    assert np.isfinite(img).mean() > 0.5  # the field fills most of the plane's box
    state.page.map_projection = "lonlat"
    flat = mp.view.figure
    assert flat is not fig and flat.x_range.end - flat.x_range.start < 360
    assert len(mp.view.src["pieces"].data["xs"]) == 1
    np.testing.assert_allclose(mp.view.src["pieces"].data["xs"][0],
                               [p[0] for p in piece.polygon])


def test_cautions_in_the_page(small_case):
    """The caution shows before a case is opened; with a case, the constant-f0 caveat names
    f0's latitude and how much |f| varies over the domain (checked against sin(lat) here)."""
    import numpy as np

    from workbench.export import CAUTION
    from workbench.textsafe import escape

    empty = panels.StatusPanel(State())
    assert escape(CAUTION) in empty.header.object
    page = panels.StatusPanel(State(small_case))
    lat = small_case.data["latitude"].values
    s = np.abs(np.sin(np.radians([lat.min(), lat.max()])))
    ratio = s.max() / s.min()
    assert "one Coriolis parameter" in page.header.object
    assert f"factor {ratio:.1f}" in page.header.object
