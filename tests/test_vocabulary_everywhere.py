"""One vocabulary wherever words leave the tool: the page (the text of its Bokeh models, as
collected by test_app_vocabulary), every `pvwb <command> --help`, the `pvwb invert` table and
the briefing PDF made from the same page state (text extracted with pypdf).

One name per idea ("full inversion", never also "total" or "full flow"; the piece kinds
"surface θ′", "lid θ′", "lateral boundary", "remainder"; the tropopause threshold versus a
piece's minimum |PV anomaly|), signs as words, longitudes as °E/°W written by the one
formatter (``views.styles.lon_label``), and the height-anomaly and QG omega contours drawn
with the same colours and dashes in the page and the figures."""
from __future__ import annotations

import re
import shutil

import pytest
from bokeh.document import Document

from test_app_vocabulary import TROUGH, _page_text
from workbench import cli
from workbench.views import styles

RETIRED = [
    (re.compile(r"\btotal\b", re.I), "'total' for the full inversion"),
    (re.compile(r"full flow", re.I), "'full flow' for the full inversion"),
    (re.compile(r"-\d+(\.\d+)?\s*°?\s*E\b"), "a negative longitude labelled E"),
    (re.compile(r"\d\s+[EW]\b,"), "a longitude without the degree sign"),
    (re.compile(r"sign\s*[:=]?\s*[-+±]?\s*[01]\b|±1"), "a sign as a number"),
    (re.compile(r"\|PV'\||Min\. "), "an old name of a piece's minimum |PV anomaly|"),
    (re.compile(r"\((interior|bottom|top|lateral)[,)]"), "a piece kind in the code's words"),
]


def _offences(text):
    return [(why, m.group(0)) for rx, why in RETIRED for m in rx.finditer(text)]


@pytest.fixture(scope="module")
def everything(small_case_path, tmp_path_factory):
    """(page text, help text, invert text, briefing text, the page's State) after a forecaster's steps."""
    import contextlib
    import io

    from pypdf import PdfReader

    from workbench.app import Workbench
    from workbench.brief import make_briefing

    tmp = tmp_path_factory.mktemp("vocab")
    shutil.copy(small_case_path, tmp / "wave.nc")
    bench = Workbench(str(tmp / "wave.nc"))
    doc = Document()
    doc.add_root(bench.layout.get_root(doc))
    bench.lasso_piece(TROUGH)
    bench.state.page.sign = -1
    bench.lasso_piece([(10.0, 40.0), (25.0, 40.0), (25.0, 50.0), (10.0, 50.0)])
    bench.add_boundary("bottom")
    bench.draw_section((-30.0, 40.0), (20.0, 52.0))
    bench.pick_target(-5.0, 46.0)
    page = "\n".join(_page_text(doc))

    helps = []
    for command in sorted(cli.COMMANDS):
        out = io.StringIO()
        with contextlib.redirect_stdout(out):
            assert cli.main([command, "--help"]) == 0
        helps.append(out.getvalue())
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert cli.main(["--help"]) == 0
    helps.append(out.getvalue())

    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert cli.main(["--quiet", "invert", str(tmp / "wave.nc"), "--time", "0",
                         "--target", "-5,46,850"]) == 0
    invert = out.getvalue()

    pdf = make_briefing(bench.state.case, bench.state, tmp / "b.pdf")
    brief = "\n".join(p.extract_text() for p in PdfReader(str(pdf)).pages)
    (tmp / "brief.txt").write_text(brief)
    return dict(page=page, help="\n".join(helps), invert=invert, brief=brief, state=bench.state)


@pytest.mark.parametrize("where", ["page", "help", "invert", "brief"])
def test_no_retired_words(everything, where):
    text = everything[where]
    assert text.strip()
    assert not _offences(text), _offences(text)[:10]


def test_one_name_for_each_idea(everything):
    page, brief, invert, helps = (everything[k] for k in ("page", "brief", "invert", "help"))
    for text in (page, brief, invert):
        assert "full inversion" in text
    # the piece kinds: the page's table and the briefing's piece list use the same words
    assert "surface θ′" in page and "surface θ′" in brief
    assert "interior PV" in brief
    assert "surface θ′" in invert and "lid θ′" in invert  # the standard pieces' names
    # signs as words in the page and the briefing
    assert "negative" in page and "sign negative" in brief
    # the tropopause threshold (a map setting) vs a piece's minimum anomaly
    assert "Tropopause threshold (PVU)" in page
    assert re.search(r"tropopause threshold \d", brief)
    assert "tropopause threshold" not in helps.lower() or "--threshold" not in helps


def test_longitudes_written_by_one_formatter(everything):
    """The target (5°W, 46°N) and the domain's western edge read the same in page, CLI and brief."""
    page, brief, invert = everything["page"], everything["brief"], everything["invert"]
    west = styles.lon_label(-5.0)  # "5.0°W"
    assert west == "5.0°W"
    assert styles.lon_label(-5.0, 2) in page  # the page's status line: "5.00°W 46.00°N"
    assert f"{west}, {styles.lat_label(46.0)}" in brief
    assert f"target {west}, {styles.lat_label(46.0)}" in invert
    d = everything["state"].case.domain
    assert styles.domain_label(d) in brief
    assert styles.lon_label(d["lon_min"], None) in cli_info(everything)


def cli_info(everything):
    import contextlib
    import io

    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        assert cli.main(["info", str(everything["state"].case.source)]) == 0
    return out.getvalue()


def test_contours_drawn_the_same_way_in_page_and_figures(everything):
    """Height anomaly and QG omega: the page's Bokeh glyphs and the figure's matplotlib
    contours take colour and dash from views.styles."""
    import matplotlib.colors as mcolors
    from matplotlib.contour import ContourSet

    from workbench.views import static
    from workbench.views.interactive import MapView, SectionView

    st = everything["state"]
    mv = MapView(st)
    glyphs = {r.name: r.glyph for r in mv.figure.renderers if getattr(r, "name", None)}
    assert glyphs["pvwb-zpos-lines"].line_color == styles.HEIGHT_POSITIVE["colour"]
    assert glyphs["pvwb-zneg-lines"].line_color == styles.HEIGHT_NEGATIVE["colour"]
    assert glyphs["pvwb-zpos-lines"].line_dash == styles.HEIGHT_POSITIVE["dash"] == "solid"
    assert glyphs["pvwb-zneg-lines"].line_dash == styles.HEIGHT_NEGATIVE["dash"] == "dashed"
    sv = SectionView(st)
    lines = [r.glyph for r in sv.lower.renderers if hasattr(r.glyph, "line_dash")
             and r.glyph.line_color == styles.OMEGA_ASCENT["colour"]]
    dashes = {g.line_dash if isinstance(g.line_dash, str) else tuple(g.line_dash) for g in lines}
    assert {styles.OMEGA_ASCENT["dash"], styles.OMEGA_DESCENT["dash"]} <= dashes  # ascent dashed, descent solid

    fig = static.map_figure(st)
    ax = fig.axes[0]
    seen = set()
    for coll in ax.collections:
        if not isinstance(coll, ContourSet) or coll.filled:
            continue
        cols = coll.get_edgecolor()
        styles_ = coll.get_linestyle()
        for c, ls in zip(cols, styles_ if len(styles_) == len(cols) else [styles_[0]] * len(cols)):
            seen.add((mcolors.to_hex(c), ls[1] is not None and len(ls[1]) > 0))
    assert (styles.HEIGHT_POSITIVE["colour"], False) in seen, seen
    assert (styles.HEIGHT_NEGATIVE["colour"], True) in seen, seen

    sfig = static.section_figure(st)
    sax = sfig.axes[0]
    omega = [c for c in sax.collections
             if isinstance(c, ContourSet) and not c.filled and len(c.get_edgecolor()) and mcolors.to_hex(c.get_edgecolor()[0]) == styles.OMEGA_COLOURS[0]]
    if omega:  # the pieces' QG omega is drawn when it exceeds the negligible floor
        dashed = {ls[1] is not None and len(ls[1]) > 0 for c in omega for ls in c.get_linestyle()}
        assert dashed == {True, False}
    legend = [t.get_text() for t in sax.get_legend().get_texts()] if sax.get_legend() else []
    assert not any("full flow" in t for t in legend)
