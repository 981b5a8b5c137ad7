"""The workbench app without a browser: data-folder access rules, binding rules, and the
page's actions run in-process (lasso, section, target, bad file). The browser tests are in
test_app_browser.py."""
import os
import shutil

import numpy as np
import pytest

from workbench.app import (Workbench, check_binding, list_data_files, main,
                           resolve_data_path)
from workbench.errors import AccessError, InputError

TROUGH = [(-20.0, 38.0), (5.0, 38.0), (5.0, 55.0), (-20.0, 55.0)]


@pytest.fixture
def data_dir(tmp_path, small_case_path):
    d = tmp_path / "data"
    d.mkdir()
    shutil.copy(small_case_path, d / "wave.nc")
    (d / "notes.txt").write_text("this is not a case file\n")
    (d / ".hidden.nc").write_text("x")
    (tmp_path / "secret.nc").write_text("outside")
    return d


def test_paths_outside_the_data_folders_are_refused(data_dir, tmp_path):
    assert resolve_data_path("wave.nc", [data_dir]) == (data_dir / "wave.nc").resolve()
    assert resolve_data_path(str(data_dir / "wave.nc"), [data_dir]).name == "wave.nc"
    for bad in ("../secret.nc", str(tmp_path / "secret.nc"), "/etc/passwd",
                "sub/../../secret.nc"):
        with pytest.raises(AccessError, match="outside the configured data folders"):
            resolve_data_path(bad, [data_dir])
    os.symlink(tmp_path / "secret.nc", data_dir / "link.nc")
    with pytest.raises(AccessError):
        resolve_data_path("link.nc", [data_dir])
    with pytest.raises(AccessError, match="not found") as missing:
        resolve_data_path("missing.nc", [data_dir])
    with pytest.raises(AccessError) as outside:  # the same words: no probe for existence
        resolve_data_path(str(tmp_path / "secret.nc"), [data_dir])
    assert str(missing.value).replace("missing.nc", "X") == \
        str(outside.value).replace(str(tmp_path / "secret.nc"), "X")
    with pytest.raises(AccessError, match="no data folders"):
        resolve_data_path("wave.nc", [])
    files = list_data_files([data_dir])
    assert sorted(os.path.basename(v) for v in files.values()) == ["link.nc", "notes.txt",
                                                                     "wave.nc"]


def test_wide_binding_needs_a_token(capsys):
    check_binding("127.0.0.1", None)
    check_binding("0.0.0.0", "s3cret")
    with pytest.raises(AccessError, match="token"):
        check_binding("0.0.0.0", None)
    assert main(["serve", "--address", "0.0.0.0"]) == 2
    assert "without a token" in capsys.readouterr().err


@pytest.fixture
def bench(data_dir):
    return Workbench(str(data_dir / "wave.nc"), data_dirs=[str(data_dir)])


def test_lasso_updates_the_overlay_in_place(bench):
    st, mv = bench.state, bench.map
    fig, src = mv.figure, mv.src["bal"]
    assert src.data["x0"] == []
    piece = bench.lasso_piece(TROUGH)
    assert st.piece_names == [piece.name] and st.status_level == "success"
    assert len(src.data["x0"]) > 0 and bench.map.figure is fig  # same figure, new data
    assert src is mv.src["bal"]
    n = len(src.data["x0"])
    st.toggle_piece(piece.name, False)
    assert src.data["x0"] == [] and mv.figure is fig
    st.toggle_piece(piece.name, True)
    assert len(src.data["x0"]) == n
    assert list(bench.pieces_table.value["name"]) == [piece.name]
    # the overlay vectors are the state's summed balanced wind, scaled for display
    ov = st.overlay()
    assert np.nanmax(np.hypot(ov["u"], ov["v"])) > 0


def test_section_target_and_attribution(bench):
    st = bench.state
    bench.lasso_piece(TROUGH)
    bench.draw_section((-30.0, 40.0), (20.0, 52.0))
    assert len(st.sections) == 1
    shown = [o.name for o in bench.section.pane.objects if o.visible]
    assert shown == ["pvwb-section-plot", "pvwb-section-pieces-plot"]  # and the pieces' flow
    bench.pick_target(-5.0, 46.0)
    table = bench.attr_table.value
    rows = table.set_index("piece")
    pieces = rows.drop(index=["sum of pieces", "full inversion"])
    assert pieces["Z′ (m)"].sum() == pytest.approx(rows.loc["full inversion", "Z′ (m)"], abs=0.11)
    with pytest.raises(InputError):
        bench.draw_section((-30.0, 40.0), (-30.2, 40.1))


def test_bad_file_shows_message_and_keeps_the_case(bench):
    case = bench.state.case
    bench.lasso_piece(TROUGH)
    bench._guard(bench.open_file, "notes.txt")
    assert bench.state.status_level == "error"
    assert "notes.txt" in bench.state.status and "netCDF" in bench.state.status
    assert "notes.txt" in bench.status.object
    assert bench.state.case is case and len(bench.state.pieces) == 1
    bench._guard(bench.open_file, "../secret.nc")
    assert bench.state.status_level == "error" and "outside" in bench.state.status
    bench._guard(bench.open_file, "wave.nc")  # a good file still opens afterwards
    assert bench.state.status_level == "success" and bench.state.pieces == []


def test_field_and_surface_changes_keep_the_figure(bench):
    st, fig = bench.state, bench.map.figure
    before = bench.map.src["field"].data["image"][0].copy()
    bench.surface.value = "tropopause"  # PV is the threshold there: theta is shown
    assert st.surface == "tropopause" and st.field == "potential_temperature"
    assert bench.map.colorbar.title.startswith("potential temperature")
    after = bench.map.src["field"].data["image"][0]
    assert after.shape == before.shape and not np.allclose(after, before, equal_nan=True)
    # the switch is said, not silent, and the field box agrees with the map
    assert st.status_level == "info" and "instead of PV" in st.status
    assert bench.field.value == "potential_temperature"
    assert "ertel_pv" not in bench.field.options.values()
    bench._guard(bench._set_state, "field", "ertel_pv")
    assert st.status_level == "error" and st.field == "potential_temperature"
    assert "threshold value everywhere" in st.status
    bench.surface.value = 320.0
    assert "ertel_pv" in bench.field.options.values()
    bench.field.value = "ertel_pv"
    assert st.field == "ertel_pv" and bench.map.colorbar.title.startswith("PV")
    bench.time.value = 1
    assert st.time_index == 1 and bench.map.figure is fig


def test_displays_inline(bench):
    bundle = bench._repr_mimebundle_()
    data = bundle[0] if isinstance(bundle, tuple) else bundle
    assert any("html" in k or "bokeh" in k for k in data)


def test_page_objects_stay_flat_over_time_steps_with_a_section(bench):
    """The page's Bokeh models are counted in a document (what the browser receives): drawing
    the section adds its figures once; 20 time steps afterwards add nothing."""
    from bokeh.document import Document

    doc = Document()
    doc.add_root(bench.layout.get_root(doc))
    bench.lasso_piece(TROUGH)
    bench.draw_section((-30.0, 40.0), (20.0, 52.0))
    counts = []
    n = len(bench.state.case.times)
    for k in range(20):
        bench.state.time_index = (bench.state.time_index + 1) % n
        counts.append(len(doc.models))
    assert counts[0] > 100
    assert bench.section.main_pane.visible and bench.section.pieces_pane.visible
    assert len(set(counts)) == 1, counts
    titles = [m.title.text for m in doc.models if getattr(m, "name", None) == "pvwb-section-plot"]
    assert len(titles) == 1 and titles[0].startswith("Section A")
