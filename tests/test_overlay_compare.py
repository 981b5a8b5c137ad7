"""Overlay settings, map read-outs, the compare view and opening files from the page,
without a browser (the browser tests are test_app_readouts.py, test_app_compare.py and
test_app_files.py). The case is the small invented wave fixture of conftest.py."""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from workbench.app import Workbench
from workbench.errors import InputError
from workbench.session import load_session, save_session
from workbench.state import State

TROUGH = [(-20.0, 38.0), (5.0, 38.0), (5.0, 55.0), (-20.0, 55.0)]
RIDGE = [(10.0, 38.0), (35.0, 38.0), (35.0, 55.0), (10.0, 55.0)]


@pytest.fixture
def data_dir(tmp_path, small_case_path):
    d = tmp_path / "data"
    d.mkdir()
    shutil.copy(small_case_path, d / "wave.nc")
    (d / "notes.txt").write_text("this is not a case file\n")
    return d


@pytest.fixture
def bench(data_dir):
    return Workbench(str(data_dir / "wave.nc"), data_dirs=[str(data_dir)])


def _two_pieces(st):
    st.add_piece(name="trough", kind="interior", polygon=TROUGH)
    st.add_piece(name="ridge", kind="interior", polygon=RIDGE)


# --------------------------------------------------------------------------- State settings


@pytest.mark.parametrize("name, bad", [
    ("overlay_arrow_stride", 0), ("overlay_arrow_stride", 2.5), ("overlay_arrow_stride", "3"),
    ("overlay_arrow_stride", True), ("overlay_contour_interval", -5.0),
    ("overlay_contour_interval", float("nan")), ("overlay_arrow_speed", 0.0),
    ("overlay_left_out", ["no such piece"]), ("overlay_left_out", "trough")])
def test_bad_overlay_settings_are_refused_with_a_clear_message(small_case, name, bad):
    st = State(small_case)
    _two_pieces(st)
    before = getattr(st, name)
    with pytest.raises(InputError) as err:
        setattr(st, name, bad)
    assert "\n" not in str(err.value) and len(str(err.value)) < 200
    assert getattr(st, name) == before


def test_overlay_settings_are_saved_in_the_session(small_case, tmp_path):
    st = State(small_case)
    _two_pieces(st)
    st.param.update(overlay_contour_interval=2.5, overlay_arrow_stride=3,
                    overlay_arrow_speed=15.0, overlay_left_out=["ridge"])
    path = save_session(st, tmp_path / "s.json")
    back = load_session(path, case=small_case)
    assert (back.overlay_contour_interval, back.overlay_arrow_stride, back.overlay_arrow_speed,
            back.overlay_left_out) == (2.5, 3, 15.0, ["ridge"])
    assert back.overlay().attrs["pieces"] == ["trough"]


def test_left_out_pieces_leave_the_overlay(small_case):
    st = State(small_case)
    _two_pieces(st)
    both = st.overlay()
    st.overlay_left_out = ["ridge"]
    only = st.overlay()
    res = st.results()
    k = int(np.argmin(np.abs(res["trough"]["pressure"].values - st.overlay_level * 100)))
    want = res["trough"]["height_anomaly"].transpose("pressure", "latitude", "longitude")[k]
    np.testing.assert_allclose(only["height_anomaly"].values, want.values, atol=1e-9)
    assert not np.allclose(both["height_anomaly"].values, only["height_anomaly"].values)
    st.overlay_left_out = ["ridge", "trough"]
    assert st.overlay() is None


def test_balanced_wind_read_out_speed_and_direction(small_case):
    st = State(small_case)
    _two_pieces(st)
    ov = st.overlay_readout()
    u, v = ov["u"].values, ov["v"].values
    ok = np.hypot(u, v) > 0.1
    # speed: Pythagoras; direction: meteorological convention, where the wind blows from,
    # clockwise from north: 270 deg - atan2(v, u) (common practice; e.g. a westerly u > 0,
    # v = 0 comes from 270 deg, a southerly v > 0 from 180 deg)
    np.testing.assert_allclose(ov["wind_speed"].values[ok], np.hypot(u, v)[ok], rtol=1e-12)
    want = np.mod(270.0 - np.degrees(np.arctan2(v, u)), 360.0)
    got = ov["wind_from_direction"].values
    diff = np.abs((got - want + 180.0) % 360.0 - 180.0)
    assert diff[ok].max() < 1e-6


def test_point_read_out_theta_on_a_pressure_level_against_metpy(small_case):
    from metpy.calc import potential_temperature
    from metpy.units import units

    st = State(small_case)
    st.surface = "500hPa"
    aux = st.map_point_field()
    assert aux.attrs["label"] == "θ" and aux.attrs["units"] == "K"
    t = small_case.at(time=0)["temperature"].sel(pressure=50000.0)
    want = potential_temperature(500 * units.hPa, t.values * units.K).m_as("K")  # MetPy
    np.testing.assert_allclose(aux.values, want, rtol=1e-6)


def test_point_read_out_pressure_on_an_isentropic_surface_against_metpy(small_case):
    from metpy.calc import potential_temperature
    from metpy.units import units

    st = State(small_case)
    st.surface = 310.0
    aux = st.map_point_field()
    assert aux.attrs["label"] == "pressure" and aux.attrs["units"] == "Pa"
    ds = small_case.at(time=0)
    p = ds["pressure"].values
    theta = potential_temperature(p[:, None, None] * units.Pa,
                                  ds["temperature"].values * units.K).m_as("K")  # MetPy
    j, i = 10, 20
    pp = float(aux.values[j, i])
    assert np.isfinite(pp)
    k = np.searchsorted(-p, -pp)  # the levels bracketing the read-out pressure
    lo, hi = theta[k - 1, j, i], theta[k, j, i]
    assert min(lo, hi) - 1e-6 <= 310.0 <= max(lo, hi) + 1e-6


# --------------------------------------------------------------------------- the map


def test_map_read_out_layers_are_the_states_values(bench):
    st, mv = bench.state, bench.map
    _two_pieces(st)
    d = mv.src["field"].data
    img = d["image"][0]
    assert d["zb"][0].shape == img.shape == d["lon"][0].shape
    ov = st.overlay_readout()
    j, i = 12, 25
    assert d["zb"][0][j, i] == pytest.approx(ov["height_anomaly"].values[j, i], rel=1e-6)
    assert d["bspd"][0][j, i] == pytest.approx(ov["wind_speed"].values[j, i], rel=1e-6)
    assert d["aux"][0][j, i] == pytest.approx(st.map_point_field().values[j, i] / 100, rel=1e-6)
    assert d["lon"][0][j, i] == pytest.approx(st.case.data["longitude"].values[i])
    tips = dict(mv.hover.tooltips)
    assert tips["PV on 320 K"] == "@image{0.00} PVU"
    assert "balanced Z′ (850 hPa)" in tips and "from @bdir{0}°" in tips["balanced wind (850 hPa)"]
    st.surface = "500hPa"
    assert dict(mv.hover.tooltips)["θ"] == "@aux{0.0} K"
    st.overlay_left_out = ["trough", "ridge"]
    assert np.isnan(mv.src["field"].data["zb"][0]).all()
    assert not any(k.startswith("balanced") for k, _ in mv.hover.tooltips)


def test_arrow_density_scale_and_contour_interval_change_the_drawing(bench):
    st, mv = bench.state, bench.map
    fig = mv.figure
    _two_pieces(st)
    n0 = len(mv.src["bal"].data["x0"])
    leg0 = mv.src["legend_arrow"].data
    st.overlay_arrow_stride = 1
    n1 = len(mv.src["bal"].data["x0"])
    leg1 = mv.src["legend_arrow"].data
    assert n1 > 2 * n0
    assert leg1["x1"][0] - leg1["x0"][0] < leg0["x1"][0] - leg0["x0"][0]  # shorter spacing
    st.overlay_arrow_speed = 7.0
    assert mv.src["legend_text"].data["text"] == ["7 m/s"]
    assert "7 m/s" in mv.key.text
    nz = len(mv.src["zpos"].data["xs"]) + len(mv.src["zneg"].data["xs"])
    st.overlay_contour_interval = 0.5
    assert len(mv.src["zpos"].data["xs"]) + len(mv.src["zneg"].data["xs"]) > nz
    assert "every 0.5 m" in mv.key.text
    assert mv.figure is fig


def test_overlay_widgets_set_the_state(bench):
    st = bench.state
    _two_pieces(st)
    bench.arrow_stride.value = 4
    assert st.overlay_arrow_stride == 4
    bench.arrow_stride.value = 0
    assert st.overlay_arrow_stride is None
    assert list(bench.overlay_pieces.options.values()) == ["trough", "ridge"]
    bench.overlay_pieces.value = ["ridge"]
    assert st.overlay_left_out == ["trough"]
    bench.contour_interval.value = -3.0  # refused by the State: message, box restored
    assert st.status_level == "error" and "contour interval" in st.status
    assert bench.contour_interval.value == 0.0


# --------------------------------------------------------------------------- compare


def test_compare_maps_share_ranges_and_difference_of_a_time_with_itself_is_zero(small_case):
    from workbench.panels import ComparePanel

    st = State(small_case)
    cp = ComparePanel(st)
    assert cp.map_a.figure.x_range is cp.map_b.figure.x_range
    assert cp.map_a.figure.y_range is cp.map_b.figure.y_range
    assert (cp.a.time_index, cp.b.time_index) == (0, 1)
    cp.difference_toggle.value = True
    img = cp.map_b.src["field"].data["image"][0]
    want = (st.case.map_field("ertel_pv", 320.0, time=1) -
            st.case.map_field("ertel_pv", 320.0, time=0)).values
    np.testing.assert_allclose(img, want, equal_nan=True)
    assert "−" in cp.map_b.figure.title.text
    cp.b.time_index = 0
    img = cp.map_b.src["field"].data["image"][0]
    assert np.nanmax(np.abs(img)) == 0.0 and np.isfinite(img).any()
    cp.a.time_index = 1  # A's time moves: the difference follows
    assert np.nanmax(np.abs(cp.map_b.src["field"].data["image"][0])) > 0


def test_compare_follows_the_page_state_only_when_asked(small_case):
    from workbench.panels import ComparePanel

    st = State(small_case)
    cp = ComparePanel(st, live=False)
    st.add_piece(name="trough", kind="interior", polygon=TROUGH)
    assert cp.a.pieces == [] and cp.map_a.src["bal"].data["x0"] == []
    cp.follow(True)
    assert cp.a.piece_names == ["trough"] and len(cp.map_a.src["bal"].data["x0"]) > 0
    st.surface = "500hPa"
    assert cp.b.surface == "500hPa"
    cp.a.overlay_left_out = ["trough"]
    assert cp.map_a.src["bal"].data["x0"] == [] and len(cp.map_b.src["bal"].data["x0"]) > 0


def test_page_models_stay_flat_with_the_compare_tab_shown(bench):
    """What the browser receives: 20 time steps of the page, then 20 of map B, with the
    compare tab shown, add no Bokeh model."""
    from bokeh.document import Document

    doc = Document()
    doc.add_root(bench.layout.get_root(doc))
    bench.lasso_piece(TROUGH)
    bench.lower_tabs.active = 1
    counts = []
    n = len(bench.state.case.times)
    for k in range(20):
        bench.state.time_index = (bench.state.time_index + 1) % n
        bench.compare.b.time_index = k % n
        counts.append(len(doc.models))
    assert counts[0] > 100 and len(set(counts)) == 1, counts
    assert bench.compare.a.piece_names == bench.state.piece_names


# --------------------------------------------------------------------------- files


def test_file_list_shows_times_and_sizes(bench, data_dir):
    table = bench.file_table.value.set_index("file")
    row = table.loc["data/wave.nc"]
    assert row["times"].startswith("2: 2031-01-01 00:00 … 2031-01-01 06:00")
    assert row["size"].endswith(("kB", "MB"))
    assert table.loc["data/notes.txt", "times"] == "not a data file"


def test_upload_a_good_file_opens_it(bench, small_case_path, data_dir):
    data = Path(small_case_path).read_bytes()
    path = bench.files.upload_file("../evil name.nc", data)
    assert path.parent.parent == data_dir.resolve() and path.parent.name.startswith(".pvwb-upload-")
    assert path.name == "evil_name.nc" and (path.parent.stat().st_mode & 0o777) == 0o700
    assert bench.state.case.source is not None and Path(bench.state.case.source).resolve() == path
    assert bench.state.status_level == "success" and "uploaded" in bench.state.status


def test_upload_a_bad_file_keeps_the_case(bench, data_dir):
    case = bench.state.case
    bench.files._guard(bench.files.upload_file, "broken.nc", b"CDF\x01 this is not netCDF" * 50)
    assert bench.state.case is case and bench.state.status_level == "error"
    assert "\n" not in bench.state.status
    assert not list(data_dir.glob(".pvwb-upload-*"))  # removed with its folder


def test_upload_over_the_cap_or_badly_named_is_refused(bench, data_dir, monkeypatch):
    monkeypatch.setenv("PVWB_UPLOAD_MAX_MB", "0.001")
    with pytest.raises(InputError, match="more than the 1.0 kB allowed"):
        bench.files.upload_file("big.nc", b"x" * 2000)
    monkeypatch.delenv("PVWB_UPLOAD_MAX_MB")
    with pytest.raises(InputError, match="not named as a netCDF or GRIB2 file"):
        bench.files.upload_file("notes.exe", b"x" * 20)
    assert not list(data_dir.glob(".pvwb-upload-*"))


def test_read_outs_on_a_map_in_the_datas_own_projection(tmp_path):
    """On a Lambert conformal file drawn on its projection plane, every read-out layer lies
    on the display grid of the field image, with that grid's longitudes and latitudes."""
    import workbench as wb
    from forecast_files import write_cf_netcdf
    from workbench.views.interactive import MapView

    write_cf_netcdf(tmp_path / "lam.nc", "lambert", grid_relative=True)
    case = wb.open_case(tmp_path / "lam.nc")
    st = State(case)
    mv = MapView(st)
    assert mv.native
    lon, lat = case.data["longitude"].values, case.data["latitude"].values
    st.add_piece(name="box", kind="interior", polygon=[(lon[3], lat[3]), (lon[-4], lat[3]),
                                                       (lon[-4], lat[-4]), (lon[3], lat[-4])])
    d = mv.src["field"].data
    shape = d["image"][0].shape
    assert all(d[k][0].shape == shape for k in ("lon", "lat", "aux", "zb", "bspd", "bdir"))
    glat, glon = mv._glonlat
    np.testing.assert_allclose(d["lon"][0], glon, atol=1e-4)
    assert np.nanmax(np.abs(d["zb"][0])) > 0 and np.isfinite(d["aux"][0]).mean() > 0.5


def test_piece_names_reach_the_list_widgets_and_tooltips_as_text(small_case):
    """The pieces' list widgets render their labels as HTML and tooltip templates are HTML:
    a piece name goes in escaped (labels) or as a data column (tooltips)."""
    from workbench.panels import ComparePanel, OverlayPanel
    from workbench.views.interactive import MapView

    name = '<img src=x onerror="window.__pwned=1">'
    st = State(small_case)
    st.add_piece(name=name, kind="interior", polygon=TROUGH)
    cp, op, mv = ComparePanel(st), OverlayPanel(st), MapView(st)
    for w in (op.overlay_pieces, cp.controls_a.objects[-1]):
        assert list(w.options) == ["&lt;img src=x onerror=&quot;window.__pwned=1&quot;&gt;"]
        assert list(w.options.values()) == [name]
    assert all(name not in str(v) for _, v in mv.hover.tooltips)
    assert mv.src["field"].data["pnames"] == [name]
