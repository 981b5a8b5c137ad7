"""Static figures: content (title block, caution, annotations, overlays), formats, offline maps,
colour maps, atomic saving. Images are saved to tests/artifacts/ for looking at."""
from __future__ import annotations

import ast
import io
import os
import socket
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from matplotlib.image import imread

import workbench.annotations as ann
from workbench.errors import ExportError, InputError
from workbench.session import FigureSettings
from workbench.state import State
from workbench.views import static

from conftest import ARTIFACTS

CAUTION_START = "Diagnostic analysis of model/analysis data, not a forecast or warning."


def _flat(text):
    return " ".join(text.split())


@pytest.fixture
def state(small_case):
    st = State(small_case)
    st.add_piece(name="upper", kind="interior", polygon=[(-20, 40), (10, 40), (10, 58), (-20, 58)],
                 layer=(400, 150), sign=1)
    st.add_section((-30, 45), (30, 50), name="main")
    st.add_annotation(ann.Label("L", 0.0, 45.0, colour="vermilion"))
    st.add_annotation(ann.Arrow(-25, 40, -5, 50, text="jet"))
    st.add_annotation(ann.Region([(-10, 40), (10, 40), (10, 50)], label="anomaly", fill="sky"))
    st.add_annotation(ann.SectionLabel("fold", 1500.0, 300.0, space="section:0"))
    st.add_annotation(ann.SectionArrow(500.0, 800.0, 1500.0, 320.0, text="by id",
                                       space="section:main"))
    st.set_target(0.0, 45.0, 850.0)
    st.figure_settings = FigureSettings(dpi=60).to_dict()
    return st


# --------------------------------------------------------------------------- colour maps

def _srgb_to_lightness(rgb):
    """CIE 1976 L* of sRGB colours: the sRGB transfer function of IEC 61966-2-1 and the CIE
    L* formula (Y relative to the D65 white, Y = 0.2126 R + 0.7152 G + 0.0722 B)."""
    c = np.asarray(rgb, float)[..., :3]
    lin = np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)
    y = lin @ np.array([0.2126, 0.7152, 0.0722])
    f = np.where(y > (6 / 29) ** 3, np.cbrt(y), y / (3 * (6 / 29) ** 2) + 4 / 29)
    return 116 * f - 16


def test_lightness_of_the_colour_maps_is_ordered():
    """Readable without hue (so also by colour-blind readers): sequential maps change lightness
    monotonically, the diverging map is lightest at its centre (common practice)."""
    x = np.linspace(0, 1, 64)
    for key in ("pv", "theta", "speed", "height", "pressure"):
        lstar = _srgb_to_lightness(static.COLOUR_MAPS[key](x))
        d = np.diff(lstar)
        assert np.all(d > -0.5) or np.all(d < 0.5), key  # monotonic to rounding
        assert abs(lstar[-1] - lstar[0]) > 40, key  # a real lightness range
    lstar = _srgb_to_lightness(static.COLOUR_MAPS["anomaly"](x))
    mid = int(np.argmax(lstar))
    assert 26 <= mid <= 37
    assert np.all(np.diff(lstar[: mid + 1]) > -0.5) and np.all(np.diff(lstar[mid:]) < 0.5)
    assert lstar[mid] > 85


def test_field_colour_maps_and_unknown_names():
    assert static.colour_map("ertel_pv") is static.COLOUR_MAPS["pv"]
    assert static.colour_map("u") is static.COLOUR_MAPS["anomaly"]
    with pytest.raises(InputError, match="colour map"):
        static.colour_map("no-such-map")


# --------------------------------------------------------------------------- maps

def test_map_figure_from_a_state_has_title_block_caution_overlay_and_annotations(state):
    fig = static.map_figure(state)
    text = _flat(static.figure_text(fig))
    case = state.case
    assert case.name in text
    assert "Ertel PV (PVU) on the 320 K isentropic surface" in text
    assert "valid 2031-01-01 00:00 UTC" in text
    assert "wave_fixture.nc" in text and case.checksum[:12] in text
    assert _flat(static.CAUTION) in text
    assert "upper: balanced flow at 850 hPa" in text
    for word in ("L", "jet", "anomaly", "target (850 hPa)"):
        assert word in text
    assert "fold" not in text  # section annotations stay on sections
    ax = fig.axes[0]
    assert sum(type(c).__name__ == "Quiver" for c in ax.collections) == 1
    assert ax.get_legend() is not None
    out = static.save_figure(fig, ARTIFACTS / "static_map_state.png", overwrite=True)
    assert out.exists()


def test_explicit_overlay_pieces_each_get_vectors(state, small_case):
    state.add_boundary_piece("bottom")
    names = [p.name for p in state.pieces]
    fig = static.map_figure(state, overlay=names)
    ax = fig.axes[0]
    assert sum(type(c).__name__ == "Quiver" for c in ax.collections) == 2
    text = _flat(static.figure_text(fig))
    assert all(f"{n}: balanced flow" in text for n in names)
    with pytest.raises(InputError, match="no balanced flow"):
        static.map_figure(state, overlay=["missing piece"])


def test_png_size_follows_dpi(small_case, tmp_path):
    settings = FigureSettings(width_in=6.0)
    fig = static.map_figure(small_case, "wind_speed", "500hPa", settings=settings)
    w_in, h_in = fig.get_size_inches()
    for dpi in (50, 100):
        path = static.save_figure(fig, tmp_path / f"m{dpi}.png", dpi=dpi)
        img = imread(path)
        assert img.shape[1] == round(w_in * dpi) and img.shape[0] == round(h_in * dpi)
    assert w_in == 6.0


def test_svg_keeps_title_and_caution_as_text(small_case, tmp_path):
    fig = static.map_figure(small_case, "potential_temperature", "tropopause",
                            settings={"projection": "lambert_conformal", "dpi": 60})
    path = static.save_figure(fig, ARTIFACTS / "static_map_tropopause.svg", overwrite=True)
    root = ET.parse(path).getroot()
    text = _flat(" ".join(t for el in root.iter() if el.tag.endswith("text")
                          for t in el.itertext()))
    assert small_case.name in text
    assert "potential temperature (K) on the dynamic tropopause (2 PVU)" in text
    assert CAUTION_START in text


def test_pdf_figure_has_one_page_with_title_and_caution(small_case, tmp_path):
    from pypdf import PdfReader

    fig = static.map_figure(small_case, "ertel_pv", 330.0,
                            settings={"contour_field": "pressure", "dpi": 60})
    path = static.save_figure(fig, tmp_path / "m.pdf")
    reader = PdfReader(path)
    assert len(reader.pages) == 1
    text = _flat(reader.pages[0].extract_text())
    assert "330 K isentropic surface" in text and CAUTION_START in text
    assert "black contours: pressure (hPa)" in text


@pytest.mark.parametrize("projection", ["plate_carree", "lambert_conformal", "stereographic",
                                        "mercator"])
def test_projections_draw_without_network(small_case, monkeypatch, projection):
    def no_network(*a, **k):
        raise AssertionError("a figure tried to open a network connection")

    monkeypatch.setattr(socket.socket, "connect", no_network)
    monkeypatch.setattr(socket, "create_connection", no_network)
    fig = static.map_figure(small_case, "ertel_pv", 320.0,
                            settings={"projection": projection, "dpi": 40})
    fig.savefig(io.BytesIO(), format="png")  # renders coastlines and grid labels
    if projection == "lambert_conformal":
        static.save_figure(fig, ARTIFACTS / "static_map_lambert.png", overwrite=True)


def test_cartopy_never_downloads():
    import cartopy

    assert Path(cartopy.config["pre_existing_data_dir"]) in (
        Path(static.DEBIAN_CARTOPY_DATA), Path(os.environ.get("CARTOPY_DATA_DIR", "/nonexistent")))
    for downloader in cartopy.config["downloaders"].values():
        with pytest.raises(OSError, match="never downloads"):
            downloader.acquire_resource("/tmp/x.shp", {})


def test_coastlines_from_offline_data_and_the_fallback(small_case, monkeypatch, tmp_path):
    src = static.coastline_source()
    if os.path.isdir("/usr/share/cartopy/data/shapefiles/gshhs/c"):
        assert src is not None and src[1].exists()  # Debian python-cartopy-data ships GSHHS c
    assert static.coastline_source([str(tmp_path)]) is None
    monkeypatch.setattr(static, "coastline_source", lambda folders=None: None)
    fig = static.map_figure(small_case, "ertel_pv", 320.0, settings={"dpi": 40})
    assert "without coastlines" in static.figure_text(fig)


def test_plain_dataarray_map(small_case):
    da = small_case.map_field("geopotential_height", "500hPa")
    fig = static.map_figure(da, annotations=[ann.Label("ridge", 10, 50)], case=small_case,
                            surface="500hPa")
    text = _flat(static.figure_text(fig))
    assert "geopotential height (m) at 500 hPa" in text and "ridge" in text
    with pytest.raises(InputError, match="2-D"):
        static.map_figure(small_case.isentropic([320.0])["ertel_pv"])


# --------------------------------------------------------------------------- sections

def test_section_figure_from_a_state(state):
    fig = static.section_figure(state)
    text = _flat(static.figure_text(fig))
    assert "Cross-section 'main' A (30.0°W, 45.0°N) to B (30.0°E, 50.0°N)" in text
    assert "dynamic tropopause (2 PVU)" in text
    assert "upper: balanced normal wind" in text
    assert "QG ω of the full inversion" in text
    assert "fold" in text and "by id" in text  # by index and by section name
    assert "jet" not in text  # map annotations stay on maps
    assert _flat(static.CAUTION) in text
    static.save_figure(fig, ARTIFACTS / "static_section_state.png", overwrite=True)
    with pytest.raises(InputError, match="out of range"):
        static.section_figure(state, 3)


def test_section_figure_from_a_case_and_points(small_case):
    fig = static.section_figure(small_case, ((-20, 35), (20, 55)))
    assert "Cross-section" in static.figure_text(fig)
    with pytest.raises(InputError, match="needs a section"):
        static.section_figure(small_case)


# --------------------------------------------------------------------------- saving

def test_save_refuses_overwrite_and_bad_names(small_case, tmp_path):
    fig = static.map_figure(small_case, "ertel_pv", 320.0, settings={"dpi": 40})
    path = static.save_figure(fig, tmp_path / "m.png")
    before = path.read_bytes()
    with pytest.raises(ExportError, match="already exists"):
        static.save_figure(fig, path)
    assert path.read_bytes() == before
    static.save_figure(fig, path, dpi=45, overwrite=True)
    assert path.read_bytes() != before
    with pytest.raises(ExportError, match=".png, .svg or .pdf"):
        static.save_figure(fig, tmp_path / "m.jpg")
    with pytest.raises(ExportError, match="does not exist"):
        static.save_figure(fig, tmp_path / "no" / "m.png")
    with pytest.raises(ExportError, match="dpi"):
        static.save_figure(fig, tmp_path / "d.png", dpi=5)


def test_a_crash_while_saving_leaves_the_previous_figure(small_case, tmp_path, monkeypatch):
    fig = static.map_figure(small_case, "ertel_pv", 320.0, settings={"dpi": 40})
    path = static.save_figure(fig, tmp_path / "m.svg")
    before = path.read_bytes()
    real = type(fig).savefig

    def half_then_crash(self, fname, **kw):
        Path(fname).write_bytes(b"<svg partial")
        raise RuntimeError("simulated crash in the writer")

    monkeypatch.setattr(type(fig), "savefig", half_then_crash)
    with pytest.raises(RuntimeError, match="simulated crash"):
        static.save_figure(fig, path, overwrite=True)
    monkeypatch.setattr(type(fig), "savefig", real)
    assert path.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["m.svg"]


def test_views_do_not_import_physics_or_inversion():
    """Architecture rule: views never compute physics."""
    src = Path(static.__file__).read_text()
    mods = set()
    for node in ast.walk(ast.parse(src)):
        if isinstance(node, ast.Import):
            mods.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            mods.add(node.module or "")
    assert not any(m.startswith(("workbench.physics", "workbench.inversion")) for m in mods)
