"""The app's "Annotate" and "Save & export" tabs without a browser: the Workbench object's
widgets and map events are driven in Python (button clicks, Bokeh events on the map figure).

Checks: a session saved from the page reloads in plain Python (``load_session``) to the same
``State.to_dict()``; figures, the briefing PDF and the netCDF export written from the page
are the files the Python API writes; overwriting needs the tick box; nothing is written or
read outside the configured folders; a bad session file leaves its message in the status
area and the page as it was. Invented fixture data only (tests/conftest.py); the checks are
of bookkeeping and file contents, not physics.
"""
from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
from bokeh.events import SelectionGeometry, Tap

from workbench.app import Workbench, list_session_files, resolve_output_path
from workbench.errors import AccessError, InputError
from workbench.export import CAUTION
from workbench.session import body_checksum, load_session

ARTIFACTS = Path(__file__).parent / "artifacts"
TROUGH = [(-20.0, 38.0), (5.0, 38.0), (5.0, 55.0), (-20.0, 55.0)]
REGION = [(10.0, 40.0), (25.0, 40.0), (25.0, 50.0), (10.0, 50.0)]
CAUTION_START = "Diagnostic analysis of model/analysis data"


@pytest.fixture
def folders(tmp_path, small_case_path):
    data = tmp_path / "data"
    out = tmp_path / "out"
    data.mkdir()
    out.mkdir()
    shutil.copy(small_case_path, data / "wave.nc")
    (tmp_path / "elsewhere").mkdir()
    return data, out


@pytest.fixture
def bench(folders):
    data, out = folders
    return Workbench(str(data / "wave.nc"), data_dirs=[str(data)], output_dir=str(out))


def _click(button):
    button.clicks += 1


def _lasso(bench, polygon):
    """A lasso gesture as the browser reports it (SelectionGeometry on the map figure)."""
    xs, ys = zip(*polygon)
    bench.map.figure._trigger_event(SelectionGeometry(
        bench.map.figure, geometry=dict(type="poly", x=list(xs), y=list(ys)), final=True))


def _tap(bench, lon, lat):
    bench.map.figure._trigger_event(Tap(bench.map.figure, x=lon, y=lat))


def _mode(bench, label):
    bench.mode.value = label


def _build_session(bench):
    """A forecaster's afternoon: second time, a piece, a section, a target, a label, a
    highlighted region and changed figure settings."""
    st = bench.state
    bench.time.value = 1
    _mode(bench, "Lasso a piece")
    _lasso(bench, TROUGH)
    assert st.piece_names == ["piece"], st.status
    bench.draw_section((-30.0, 40.0), (20.0, 52.0))
    _mode(bench, "Pick target point")
    _tap(bench, -5.0, 46.0)
    assert st.target is not None and st.target[:2] == (-5.0, 46.0)
    bench.label_text.value = "L"
    bench.ann_colour.value = "vermilion"
    _mode(bench, "Place a label")
    _tap(bench, -8.0, 47.0)
    bench.p_kind.value = "region"
    bench.label_text.value = "warm conveyor"
    _mode(bench, "Lasso a piece")
    _lasso(bench, REGION)
    bench.export_dpi.value = 70
    bench.projection.value = "lambert_conformal"
    assert st.status_level == "success", st.status
    return st


def test_annotations_from_the_page_are_state_objects_drawn_in_place(bench):
    from workbench.annotations import Label, Region

    st, mv = bench.state, bench.map
    fig, text_src, poly_src = mv.figure, mv.src["ann_text"], mv.src["ann_poly"]
    bench._guard(bench.label_last_click)  # nothing clicked yet
    assert st.status_level == "error" and "click a point on the map first" in st.status
    _mode(bench, "Place a label")
    bench.label_text.value = ""
    _tap(bench, 0.0, 45.0)
    assert st.status_level == "error" and "type the label" in st.status and not st.annotations
    bench.label_text.value = "L"
    _tap(bench, 0.0, 45.0)
    _mode(bench, "Pick target point")
    _tap(bench, 12.0, 50.0)
    bench.label_text.value = "jet exit"
    _click(bench.label_click_button)  # labels the point just clicked
    bench.p_kind.value = "region"
    bench.label_text.value = ""
    _mode(bench, "Lasso a piece")
    _lasso(bench, REGION)
    kinds = [type(a) for a in st.annotations]
    assert kinds == [Label, Label, Region] and st.pieces == []  # a region is not a piece
    assert (st.annotations[0].lon, st.annotations[0].lat) == (0.0, 45.0)
    assert (st.annotations[1].text, st.annotations[1].lon) == ("jet exit", 12.0)
    assert st.annotations[2].polygon == [tuple(p) for p in REGION]
    # drawn by replacing the sources' data of the same figure
    assert mv.figure is fig and mv.src["ann_text"] is text_src and mv.src["ann_poly"] is poly_src
    assert text_src.data["text"] == ["L", "jet exit"]
    assert poly_src.data["xs"] == [[p[0] for p in REGION]]
    assert "jet exit" in bench.ann_list.object
    _click(bench.undo_ann_button)
    assert len(st.annotations) == 2 and poly_src.data["xs"] == []
    _click(bench.clear_ann_button)
    assert st.annotations == [] and text_src.data["text"] == []
    _click(bench.clear_ann_button)
    assert st.status_level == "error" and "no annotations" in st.status


def test_session_saved_in_the_app_reloads_in_python_to_the_same_state(bench, folders):
    data, out = folders
    st = _build_session(bench)
    bench.session_name.value = "tuesday.json"
    _click(bench.save_session_button)
    path = out / "tuesday.json"
    assert st.status_level == "success", st.status
    assert path.is_file() and str(path.resolve()) in st.status
    assert bench.download.visible and bench.download.filename == "tuesday.json"
    assert str(path.resolve()) in bench.session_select.options.values()
    # plain Python, as in a notebook: the case is reopened from the recorded path (its
    # folder is not the session's, so it is named as allowed)
    back = load_session(path, data_dirs=[data])
    assert back.to_dict() == st.to_dict()
    assert back.time_index == 1 and back.figure_settings["dpi"] == 70
    assert back.figure_settings["projection"] == "lambert_conformal"
    assert [a.to_dict() for a in back.annotations] == [a.to_dict() for a in st.annotations]
    doc = json.loads(path.read_text())
    assert doc["annotations"][0]["text"] == "L" and doc["annotations"][1]["label"] == \
        "warm conveyor"
    # and into a fresh page: the widgets and the map follow
    other = Workbench(str(data / "wave.nc"), data_dirs=[str(data)], output_dir=str(out))
    assert other.state.pieces == []
    other.session_select.value = str(path.resolve())
    _click(other.load_session_button)
    assert other.state.status_level == "success", other.state.status
    assert other.state.to_dict() == st.to_dict()
    assert other.time.value == 1 and other.export_dpi.value == 70
    assert other.map.src["ann_text"].data["text"] == ["L", "warm conveyor"]
    assert other.map.src["pieces"].data["name"] == ["piece"]
    assert list(other.pieces_table.value["name"]) == ["piece"]


def _png_pixels(path):
    from PIL import Image

    with Image.open(path) as im:
        return np.asarray(im.convert("RGB"))


def test_figures_briefing_and_netcdf_from_the_page(bench, folders, tmp_path):
    import xarray as xr
    from pypdf import PdfReader

    from workbench.views import static

    data, out = folders
    st = _build_session(bench)
    bench.export_name.value = "storm"
    # map, PNG at the page's dpi: the same pixels as the Python call on the same state
    _click(bench.map_fig_button)
    png = out / "storm_map_2031010106Z.png"
    assert st.status_level == "success" and png.is_file(), st.status
    assert bench.download.file == str(png.resolve())
    img = _png_pixels(png)
    assert img.shape[1] == round(st.figure_settings["width_in"] * 70)
    ref = tmp_path / "elsewhere" / "map_python.png"
    static.save_figure(static.map_figure(st), ref, dpi=70)
    assert np.array_equal(img, _png_pixels(ref))
    shutil.copy(png, ARTIFACTS / "app_export_map.png")
    # SVG keeps the title block and the caution as text
    bench.export_format.value = "SVG"
    _click(bench.map_fig_button)
    svg = (out / "storm_map_2031010106Z.svg").read_text()
    assert CAUTION_START in svg and "valid 2031-01-01 06:00 UTC" in svg
    # the active section as PDF: one page with the caution
    bench.export_format.value = "PDF"
    _click(bench.section_fig_button)
    pdf = PdfReader(str(out / "storm_section_2031010106Z.pdf"))
    assert len(pdf.pages) == 1
    text = " ".join(pdf.pages[0].extract_text().split())
    assert CAUTION_START in text and "section 1" in text
    # briefing: title, map, theta on the tropopause, one page per section, attribution
    _click(bench.brief_button)
    brief = out / "storm_briefing.pdf"
    assert st.status_level == "success", st.status
    reader = PdfReader(str(brief))
    assert len(reader.pages) == 3 + len(st.sections) + 1
    pages = [" ".join(p.extract_text().split()) for p in reader.pages]
    assert all(CAUTION_START in p for p in pages)
    assert "warm conveyor" in pages[1]  # the annotation is on the briefing map
    shutil.copy(brief, ARTIFACTS / "app_export_briefing.pdf")
    # balanced fields: every piece, the remainder and the full inversion, as the state has them
    _click(bench.netcdf_button)
    nc = out / "storm_balanced_2031010106Z.nc"
    assert st.status_level == "success", st.status
    with xr.open_dataset(nc) as ds:
        assert ds.attrs["Conventions"] == "CF-1.8" and ds.attrs["caution"] == CAUTION
        res = st.results()
        for name in ("piece", "remainder", "total"):
            np.testing.assert_allclose(ds[f"{name}_u"].values, res[name]["u"].values,
                                       rtol=1e-6, atol=1e-9)
        assert json.loads(ds.attrs["settings"])["time_index"] == 1
    # no section: a clear message, nothing written
    st.remove_section(0)
    bench._guard(bench.export_section)
    assert st.status_level == "error" and "no section line" in st.status


def test_overwrite_needs_the_tick_box(bench, folders):
    data, out = folders
    st = bench.state
    bench.session_name.value = "s.json"
    _click(bench.save_session_button)
    path = out / "s.json"
    first = path.read_bytes()
    bench.lasso_piece(TROUGH)
    _click(bench.save_session_button)
    assert st.status_level == "error" and "already exists" in st.status
    assert "Overwrite" in st.status and path.read_bytes() == first
    assert [p.name for p in out.iterdir()] == ["s.json"]  # no temporary file left
    bench.overwrite.value = True
    _click(bench.save_session_button)
    assert st.status_level == "success", st.status
    assert len(json.loads(path.read_text())["pieces"]) == 1
    # figures too
    bench.overwrite.value = False
    _click(bench.map_fig_button)
    png = next(out.glob("*_map_*.png"))
    before = png.read_bytes()
    bench.export_dpi.value = 40
    _click(bench.map_fig_button)
    assert st.status_level == "error" and "already exists" in st.status
    assert png.read_bytes() == before
    bench.overwrite.value = True
    _click(bench.map_fig_button)
    assert st.status_level == "success" and _png_pixels(png).shape[1] == 400


def test_nothing_is_written_or_read_outside_the_folders(bench, folders, tmp_path):
    data, out = folders
    st = bench.state
    outside = tmp_path / "elsewhere"
    for name in ("../elsewhere/escape.json", str(outside / "escape.json"), "/etc/pvwb.json",
                 "sub/../../escape.json"):
        bench.session_name.value = name
        _click(bench.save_session_button)
        assert st.status_level == "error" and "outside the output folder" in st.status, name
    os.symlink(outside, out / "link")
    bench.session_name.value = "link/escape.json"
    _click(bench.save_session_button)
    assert st.status_level == "error" and "outside the output folder" in st.status
    bench.export_name.value = "../elsewhere/storm"
    _click(bench.map_fig_button)
    assert st.status_level == "error" and "outside the output folder" in st.status
    assert list(outside.iterdir()) == []
    assert list(data.iterdir()) == [data / "wave.nc"]  # the data folder is not the output
    # reading: a session outside the data and output folders is refused
    (outside / "s.json").write_text("{}")
    bench._guard(bench.load_session_file, str(outside / "s.json"))
    assert st.status_level == "error" and "outside the configured data folders" in st.status
    bench._guard(bench.load_session_file, "../elsewhere/s.json")
    assert st.status_level == "error" and "outside" in st.status
    # the function itself
    assert resolve_output_path("a.json", [out], (".json",)) == (out / "a.json").resolve()
    with pytest.raises(InputError, match="must end in .json"):
        resolve_output_path("a.png", [out], (".json",))
    with pytest.raises(AccessError, match="no output folder"):
        resolve_output_path("a.json", [])
    (out / "sub").mkdir()
    with pytest.raises(InputError, match="is a folder"):
        resolve_output_path("sub", [out])
    assert resolve_output_path("sub/a.json", [out]).parent == (out / "sub").resolve()


def test_a_bad_session_file_shows_its_message_and_the_page_stays(bench, folders, tmp_path):
    data, out = folders
    st = bench.state
    bench.session_name.value = "good.json"
    _click(bench.save_session_button)
    doc = json.loads((out / "good.json").read_text())
    bench.lasso_piece(TROUGH)  # the page holds work the bad loads must not lose
    before = st.to_dict()

    def write(name, d):
        if isinstance(d, dict):  # sealed, so that the entry itself is what is refused
            d = dict(d, body_sha256=body_checksum(d))
        (out / name).write_text(json.dumps(d) if not isinstance(d, str) else d)
        bench._refresh_session_list()
        bench.session_select.value = str((out / name).resolve())
        _click(bench.load_session_button)

    write("checksum.json", dict(doc, case=dict(doc["case"], sha256="0" * 64)))
    assert st.status_level == "error" and "0" * 64 in st.status
    assert st.case.checksum in st.status  # both checksums named
    assert "sha256" in bench.status.object
    write("future.json", dict(doc, schema_version=99))
    assert st.status_level == "error" and "schema_version 99" in st.status
    write("other.json", dict(doc, schema="someone-else"))
    assert st.status_level == "error" and "not a PV Workbench session" in st.status
    write("broken.json", '{"schema": "pv-workbench-session",')
    assert st.status_level == "error" and "not valid JSON" in st.status
    elsewhere = tmp_path / "elsewhere" / "wave.nc"
    shutil.copy(data / "wave.nc", elsewhere)
    moved = dict(doc["case"], path=str(elsewhere), sha256="f" * 64)
    moved.pop("relative_path", None)
    write("moved.json", dict(doc, case=moved))
    assert st.status_level == "error" and "not in the data folders" in st.status
    assert st.to_dict() == before and not st.busy
    # still usable: a new piece inverts and the good session loads
    bench.lasso_piece(REGION)
    assert st.status_level == "success" and len(st.pieces) == 2
    bench.session_select.value = str((out / "good.json").resolve())
    _click(bench.load_session_button)
    assert st.status_level == "success" and st.pieces == []


def test_figure_settings_are_part_of_the_state(small_case):
    from workbench.session import FigureSettings
    from workbench.state import State

    st = State(small_case)
    assert st.figure_settings == FigureSettings().to_dict()
    st.figure_settings = {"dpi": 90}  # the other fields take their defaults
    assert st.figure_settings == FigureSettings(dpi=90).to_dict()
    st.figure_settings = FigureSettings(projection="stereographic")
    assert st.to_dict()["figure_settings"]["projection"] == "stereographic"
    with pytest.raises(InputError, match="unknown figure setting"):
        st.figure_settings = {"dpi": 90, "colour": "red"}
    with pytest.raises(InputError, match="dpi"):
        State.from_dict(dict(st.to_dict(), figure_settings={"dpi": 5}), small_case)
    back = State.from_dict(st.to_dict(), small_case)
    assert back.figure_settings == st.figure_settings
    assert State.from_dict({}, small_case).figure_settings == FigureSettings().to_dict()


def test_session_list_only_shows_json_inside_the_folders(folders):
    data, out = folders
    (out / "a.json").write_text("{}")
    (out / ".hidden.json").write_text("{}")
    (data / "notes.txt").write_text("x")
    files = list_session_files([data, out])
    assert list(files.values()) == [str((out / "a.json").resolve())]
