"""Session files: JSON round trip, atomic writes, overwrite refusal, schema and checksum checks."""
from __future__ import annotations

import json
import os
import pickle
import shutil

import numpy as np
import pytest

import workbench as wb
import workbench.annotations as ann
from workbench import session as ses
from workbench.errors import SessionError
from workbench.state import State

from conftest import ARTIFACTS, wave_dataset


def make_state(case):
    """A state with every kind of content a session must keep (fixture data)."""
    st = State(case)
    st.time_index = 1
    st.surface = 315.0
    st.overlay_level = 700.0
    st.add_piece(name="upper", kind="interior", polygon=[(-20, 40), (10, 40), (10, 58), (-20, 58)],
                 layer=(400, 150), sign=1)
    st.add_boundary_piece("bottom")
    st.add_section((-30, 45), (30, 50))
    st.set_target(0.0, 45.0, 850.0)
    st.add_annotation(ann.Label("L", 0.0, 45.0, colour="vermilion"))
    st.add_annotation(ann.Arrow(-25, 40, -5, 50, text="jet"))
    st.add_annotation(ann.Region([(-10, 40), (10, 40), (10, 50)], label="anomaly", fill="sky"))
    st.add_annotation(ann.SectionLabel("fold", 1500.0, 300.0, space="section:0"))
    st.figure_settings = ses.FigureSettings(projection="lambert_conformal", dpi=80).to_dict()
    return st


def _body(d):
    return {k: v for k, v in d.items() if k not in ("saved_at", "body_sha256")}


def test_save_and_load_restore_the_same_state(small_case, tmp_path):
    st = make_state(small_case)
    path = ses.save_session(st, tmp_path / "s.json")
    doc = json.loads(path.read_text())
    assert doc["schema"] == "pv-workbench-session" and doc["schema_version"] == 1
    assert doc["case"]["sha256"] == small_case.checksum
    assert doc["case"]["path"] == str(small_case_path_of(small_case))
    assert doc["figure_settings"]["projection"] == "lambert_conformal"
    assert len(doc["annotations"]) == 4 and len(doc["pieces"]) == 2

    back = ses.load_session(path, case=small_case)
    assert back.to_dict() == st.to_dict()
    assert back.annotations == st.annotations
    assert back.figure_settings == st.figure_settings
    # the saved file of the reloaded state is the same document
    ses.save_session(back, tmp_path / "s2.json")
    assert _body(json.loads((tmp_path / "s2.json").read_text())) == _body(doc)
    shutil.copy(path, ARTIFACTS / "session_example.json")


def small_case_path_of(case):
    from pathlib import Path

    return Path(case.source).resolve()


def test_load_opens_the_recorded_case_and_follows_a_moved_folder(small_case_path, tmp_path):
    folder = tmp_path / "work"
    folder.mkdir()
    case_file = folder / "storm.nc"
    shutil.copy(small_case_path, case_file)
    st = make_state(wb.open_case(case_file))
    ses.save_session(st, folder / "s.json")
    back = ses.load_session(folder / "s.json")  # case opened from the recorded path
    assert back.case.checksum == st.case.checksum
    assert back.pieces == st.pieces
    moved = tmp_path / "moved"
    folder.rename(moved)  # absolute path gone; the path relative to the session still works
    back = ses.load_session(moved / "s.json")
    assert back.to_dict()["pieces"] == st.to_dict()["pieces"]
    os.remove(moved / "storm.nc")
    with pytest.raises(SessionError, match="not found"):
        ses.load_session(moved / "s.json")


def test_overwrite_is_refused_without_the_option(small_case, tmp_path):
    st = make_state(small_case)
    path = ses.save_session(st, tmp_path / "s.json")
    before = path.read_bytes()
    st.surface = 330.0
    with pytest.raises(SessionError, match="already exists"):
        ses.save_session(st, path)
    assert path.read_bytes() == before
    ses.save_session(st, path, overwrite=True)
    assert json.loads(path.read_text())["surface"] == 330.0
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.json"]  # no temporary files left


@pytest.mark.parametrize("where", ["replace", "fsync"])
def test_a_crash_during_save_leaves_the_previous_file_intact(small_case, tmp_path, monkeypatch,
                                                             where):
    st = make_state(small_case)
    path = ses.save_session(st, tmp_path / "s.json")
    before = path.read_bytes()
    st.surface = 340.0

    def boom(*a, **k):
        raise OSError("simulated crash")

    monkeypatch.setattr(os, where, boom)
    with pytest.raises(OSError, match="simulated crash"):
        ses.save_session(st, path, overwrite=True)
    monkeypatch.undo()
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["s.json"]
    assert ses.load_session(path, case=small_case).surface == 315.0


def test_a_different_case_is_refused_naming_both_checksums(small_case, tmp_path):
    path = ses.save_session(make_state(small_case), tmp_path / "s.json")
    other_file = tmp_path / "other.nc"
    wave_dataset(amplitude=3.0).to_netcdf(other_file)
    other = wb.open_case(other_file)
    with pytest.raises(SessionError) as err:
        ses.load_session(path, case=other)
    msg = str(err.value)
    assert small_case.checksum in msg and other.checksum in msg
    assert "same case file" in msg


def _rewrite(path, **changes):
    doc = json.loads(path.read_text())
    doc.update(changes)
    path.write_text(json.dumps(doc))


@pytest.mark.parametrize(
    "changes, words",
    [
        ({"schema_version": 2}, "update PV Workbench"),
        ({"schema_version": 0}, "reads version 1"),
        ({"schema_version": "1"}, "integer"),
        ({"schema": "something-else"}, "not a PV Workbench session"),
        ({"case": {"sha256": "x"}}, "no case path"),
    ],
)
def test_unknown_schema_and_bad_envelopes_are_refused(small_case, tmp_path, changes, words):
    path = ses.save_session(make_state(small_case), tmp_path / "s.json")
    _rewrite(path, **changes)
    with pytest.raises(SessionError, match=words):
        ses.load_session(path, case=small_case)


def test_non_json_content_is_refused_and_never_run(small_case, tmp_path):
    marker = tmp_path / "ran"
    p = tmp_path / "pickled.json"
    p.write_bytes(pickle.dumps({"schema": "pv-workbench-session"}))
    with pytest.raises(SessionError, match="not UTF-8|not valid JSON"):
        ses.load_session(p, case=small_case)
    p.write_text('{"schema": "pv-workbench-session", "schema_version": NaN}')
    with pytest.raises(SessionError, match="NaN"):
        ses.load_session(p, case=small_case)
    p.write_text('{"schema": "pv-workbench-session", "schema": "x"}')
    with pytest.raises(SessionError, match="twice"):
        ses.load_session(p, case=small_case)
    p.write_text("{not json")
    with pytest.raises(SessionError, match="line 1"):
        ses.load_session(p, case=small_case)
    # a string that looks like code stays a string
    path = ses.save_session(make_state(small_case), tmp_path / "s.json")
    doc = json.loads(path.read_text())
    doc["annotations"][0]["text"] = f"__import__('pathlib').Path('{marker}').touch()"
    path.write_text(json.dumps(doc))
    back = ses.load_session(path, case=small_case, accept_modified=True)  # edited by hand
    assert back.annotations[0].text.startswith("__import__")
    assert not marker.exists()


def test_invalid_entries_are_refused_with_a_session_error(small_case, tmp_path):
    path = ses.save_session(make_state(small_case), tmp_path / "s.json")
    doc = json.loads(path.read_text())
    doc["annotations"][0]["lat"] = 123.0
    doc["body_sha256"] = ses.body_checksum(doc)  # sealed: the entry itself must be refused
    path.write_text(json.dumps(doc))
    with pytest.raises(SessionError, match="lat"):
        ses.load_session(path, case=small_case)
    path = ses.save_session(make_state(small_case), tmp_path / "s.json", overwrite=True)
    doc = json.loads(path.read_text())
    doc["figure_settings"] = {"projection": "gnomonic-ish"}
    doc["body_sha256"] = ses.body_checksum(doc)
    path.write_text(json.dumps(doc))
    with pytest.raises(SessionError, match="projection"):
        ses.load_session(path, case=small_case)


def test_in_memory_case_needs_the_case_on_load(tmp_path):
    case = wb.open_case(wave_dataset(ntime=1))
    st = State(case)
    path = ses.save_session(st, tmp_path / "mem.json")
    with pytest.raises(SessionError, match="in-memory"):
        ses.load_session(path)
    assert ses.load_session(path, case=case).surface == st.surface


def test_nan_in_state_is_refused_on_save(small_case, tmp_path):
    class Bad:
        case = small_case

        def to_dict(self):
            return {"surface": float("nan")}

    with pytest.raises(SessionError, match="NaN"):
        ses.save_session(Bad(), tmp_path / "bad.json")
    assert not (tmp_path / "bad.json").exists()


def test_reloaded_session_reproduces_the_same_figures(small_case, tmp_path):
    """Same data arrays and the same pixels from the saved and the reloaded state."""
    from matplotlib.image import imread

    from workbench.views import static

    st = make_state(small_case)
    st.figure_settings = ses.FigureSettings(dpi=50, width_in=6).to_dict()
    path = ses.save_session(st, tmp_path / "s.json")
    back = ses.load_session(path, data_dirs=[small_case_path_of(small_case).parent])

    def content(state):
        view = static.state_view(state)
        kw = {k: v for k, v in view.items() if k not in ("case", "sections")}
        return static.map_data(view["case"], **kw), static.state_section_data(state, 0)

    (m1, s1), (m2, s2) = content(st), content(back)
    a1, a2 = m1.arrays(), m2.arrays()
    assert a1.keys() == a2.keys() and "field" in a1 and len(m1.overlays) == 1
    for k in a1:
        np.testing.assert_array_equal(a1[k], a2[k])
    b1, b2 = s1.arrays(), s2.arrays()
    assert "balanced_normal_wind" in b1
    for k in b1:
        np.testing.assert_array_equal(b1[k], b2[k])
    for name, state in (("a", st), ("b", back)):
        static.save_figure(static.map_figure(state), tmp_path / f"{name}.png")
    np.testing.assert_array_equal(imread(tmp_path / "a.png"), imread(tmp_path / "b.png"))
