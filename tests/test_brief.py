"""Briefing PDF: pages, titles, caution on every page, attribution summary, CLI, atomic writes."""
from __future__ import annotations

import math
import shutil

import pytest

import workbench as wb
import workbench.annotations as ann
from workbench import brief
from workbench.errors import ExportError
from workbench.session import save_session
from workbench.state import State

from conftest import ARTIFACTS, wave_dataset

CAUTION = " ".join(brief.CAUTION.split())


def _flat(text):
    return " ".join(text.split())


def _pdf_pages(path):
    from pypdf import PdfReader

    reader = PdfReader(path)
    return [_flat(p.extract_text()) for p in reader.pages], reader


def _state(case, target=True):
    st = State(case)
    st.add_piece(name="upper", kind="interior", polygon=[(-20, 40), (10, 40), (10, 58), (-20, 58)],
                 layer=(400, 150), sign=1)
    st.add_boundary_piece("bottom")
    st.add_section((-30, 45), (30, 50), name="west-east")
    st.add_section((0, 32), (5, 58), name="south-north")
    st.add_annotation(ann.Label("L", 0.0, 45.0))
    if target:
        st.set_target(0.0, 45.0, 850.0)
    st.figure_settings = {"dpi": 60}
    return st


@pytest.fixture(scope="module")
def invented_case(tmp_path_factory):
    data = wave_dataset()
    data.attrs.update(title="Storm Tamsin (invented)", invented="yes",
                      comment="invented storm in a demonstration scenario")
    f = tmp_path_factory.mktemp("inv") / "tamsin.nc"
    data.to_netcdf(f)
    return wb.open_case(f)


def test_briefing_pages_titles_caution_and_summary(invented_case, tmp_path):
    st = _state(invented_case)
    path = brief.make_briefing(invented_case, st, ARTIFACTS / "briefing_fixture.pdf",
                               overwrite=True)
    pages, reader = _pdf_pages(path)
    # title, map, tropopause map, 2 sections, attribution
    assert len(pages) == 6
    assert reader.metadata.title == f"PV diagnosis briefing: {invented_case.name}"
    for text in pages:
        assert CAUTION in text
    title = pages[0]
    assert "PV diagnosis briefing" in title and invented_case.name in title
    assert "Invented case" in title
    assert invented_case.checksum in title
    assert "upper (interior PV, 150-400 hPa, sign positive" in title
    assert "2031-01-01 00:00 UTC" in title
    assert "Ertel PV (PVU) on the 320 K isentropic surface" in pages[1]
    assert "potential temperature (K) on the dynamic tropopause (2 PVU)" in pages[2]
    assert "Cross-section 'west-east'" in pages[3] and "Cross-section 'south-north'" in pages[4]
    table = pages[5]
    assert "attribution at the target point" in table
    for row in [p.name for p in st.pieces] + ["remainder", "sum of pieces", "full inversion"]:
        assert row in table
    for sentence in brief.piece_summaries(st.attribution(), st.target):
        assert _flat(sentence) in table
    for p in pages[1:]:
        assert "[INVENTED CASE]" in p or "Invented case" in p


def test_piece_summaries_word_the_table(small_case):
    st = _state(small_case)
    table = st.attribution()
    sentences = brief.piece_summaries(table, st.target)
    assert len(sentences) >= len(st.pieces) + 2  # pieces, remainder, sum
    full = float(table.loc["full inversion", "height_anomaly"])
    for name in ("upper", "remainder"):
        z = float(table.loc[name, "height_anomaly"])
        share = float(table.loc[name, "height_share_pct"])
        line = next(s for s in sentences if s.startswith(name))
        if math.isfinite(share):
            assert f"{z:+.1f} m" in line and f"{share:.0f} %" in line and f"{full:+.1f} m" in line
        else:  # full anomaly near zero: attribution gives no share (table.attrs["share_notes"])
            assert f"{z:+.1f} m" in line and "no share" in line and table.attrs["share_notes"]
    # pieces add up to the full inversion (QG inversion is linear: Davis & Emanuel 1991)
    total = float(table.loc["sum of pieces", "height_anomaly"])
    assert math.isclose(total, full, rel_tol=1e-9, abs_tol=1e-9)
    assert f"The pieces sum to {total:+.2f} m" in sentences[-2 if abs(full) < 1 else -1]


def test_briefing_without_target_picks_the_balanced_low(small_case, tmp_path):
    st = _state(small_case, target=False)
    path = brief.make_briefing(small_case, st, tmp_path / "b.pdf")
    pages, _ = _pdf_pages(path)
    assert "No target point was set" in pages[-1]
    assert "Invented case" not in pages[0]


def test_briefing_from_a_session_file_and_overwrite_refusal(small_case, tmp_path):
    st = _state(small_case)
    session = save_session(st, tmp_path / "s.json")
    out = brief.make_briefing(small_case, session, tmp_path / "b.pdf")
    before = out.read_bytes()
    with pytest.raises(ExportError, match="already exists"):
        brief.make_briefing(small_case, session, out)
    assert out.read_bytes() == before
    with pytest.raises(ExportError, match=".pdf"):
        brief.make_briefing(small_case, session, tmp_path / "b.png")


def test_a_crash_while_writing_leaves_the_previous_briefing(small_case, tmp_path, monkeypatch):
    from matplotlib.backends.backend_pdf import PdfPages

    st = _state(small_case)
    st.sections = []
    out = brief.make_briefing(small_case, st, tmp_path / "b.pdf")
    before = out.read_bytes()
    calls = {"n": 0}
    real = PdfPages.savefig

    def crash_on_third(self, *a, **k):
        calls["n"] += 1
        if calls["n"] == 3:
            raise RuntimeError("simulated crash mid-briefing")
        return real(self, *a, **k)

    monkeypatch.setattr(PdfPages, "savefig", crash_on_third)
    with pytest.raises(RuntimeError, match="simulated crash"):
        brief.make_briefing(small_case, st, out, overwrite=True)
    assert out.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["b.pdf"]


def test_cli_brief(small_case_path, tmp_path, capsys):
    case_file = tmp_path / "case.nc"
    shutil.copy(small_case_path, case_file)
    case = wb.open_case(case_file)
    session = save_session(_state(case), tmp_path / "s.json")
    out = tmp_path / "brief.pdf"
    argv = ["brief", str(case_file), "--session", str(session), "-o", str(out)]
    assert brief.main(argv) == 0
    assert out.exists() and "briefing written" in capsys.readouterr().out
    assert brief.main(argv) == 2
    assert "already exists" in capsys.readouterr().err
    assert brief.main(argv + ["--overwrite"]) == 0
    pages, _ = _pdf_pages(out)
    assert len(pages) == 6
    # a session made for other data is refused with the checksums named
    other = tmp_path / "other.nc"
    wave_dataset(amplitude=2.0).to_netcdf(other)
    assert brief.main([str(other), "--session", str(session), "-o", str(tmp_path / "x.pdf")]) == 2
    err = capsys.readouterr().err
    assert case.checksum in err and "sha256" in err
    assert not (tmp_path / "x.pdf").exists()


def test_briefing_of_the_sample_case(sample_case_path, tmp_path):
    """The committed invented sample storm: a session around its low, then `pvwb brief`."""
    from workbench.sample import track_low

    case = wb.open_case(sample_case_path)
    st = State(case)
    k = len(case.times) // 2
    st.time_index = k
    low = track_low(case.data)[k]
    lon, lat = float(low["longitude"]), float(low["latitude"])
    st.add_piece(name="upper", kind="interior",
                 polygon=[(lon - 35, lat - 15), (lon + 5, lat - 15), (lon + 5, lat + 12),
                          (lon - 35, lat + 12)], layer=(550, 100), sign=1)
    st.add_boundary_piece("bottom")
    st.add_section((lon - 30, lat - 10), (lon + 25, lat + 6), name="across the low")
    st.set_target(lon, lat, 900.0)
    st.figure_settings = {"dpi": 60, "projection": "lambert_conformal"}
    session = save_session(st, tmp_path / "sample.json")
    out = ARTIFACTS / "briefing_sample_case.pdf"
    assert brief.main([str(sample_case_path), "--session", str(session), "-o", str(out),
                       "--overwrite"]) == 0
    pages, _ = _pdf_pages(out)
    assert len(pages) == 5
    assert all(CAUTION in p for p in pages)
    assert "Invented case" in pages[0] and case.name in pages[0]
    assert "across the low" in pages[3]
    assert "sum of pieces" in pages[4]


def test_a_long_attribution_page_keeps_its_text_above_the_caution_band(invented_case):
    # eight pieces: a table of 11 rows and a summary of 11 sentences on one page; the text is
    # made smaller as needed rather than running under the caution band at the foot of the
    # page, and the first column is wide enough for the longest piece name
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    st = _state(invented_case)
    for i in range(6):
        st.add_piece(name=f"band {i} of the upper flow", kind="interior",
                     polygon=[(-20 + 5 * i, 40), (-15 + 5 * i, 40), (-15 + 5 * i, 58), (-20 + 5 * i, 58)],
                     layer=(900, 150), sign=1)
    fig, sentences = brief._table_page(invented_case, st)
    assert len(sentences) >= 10
    renderer = FigureCanvasAgg(fig).get_renderer()
    band = next(t for t in fig.texts if CAUTION in t.get_text())
    band_top = band.get_bbox_patch().get_window_extent(renderer).y1
    lowest = min(t.get_window_extent(renderer).y0 for t in fig.texts if t is not band and t.get_text())
    assert lowest > band_top
    table = next(a for a in fig.axes if a.tables).tables[0]
    for (r, c), cell in table.get_celld().items():
        if c == 0:
            assert cell.get_text().get_window_extent(renderer).width < cell.get_window_extent(renderer).width
