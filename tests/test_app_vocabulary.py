"""One vocabulary in the page: the text of every model the browser receives (labels,
titles, options, Markdown/HTML, table cells, legends) after a forecaster's steps, checked for
the words the project retired: "total" / "full flow" for the full inversion, signs as
symbols or numbers instead of positive/negative/both, negative longitudes labelled °E, and
one name each for the tropopause threshold and a piece's minimum anomaly."""
import re

from bokeh.document import Document

from workbench.app import Workbench

TROUGH = [(-20.0, 38.0), (5.0, 38.0), (5.0, 55.0), (-20.0, 55.0)]


def _strings(value, out):
    if isinstance(value, str):
        out.append(value)
    elif isinstance(value, dict):
        for k, v in value.items():
            _strings(k, out)
            _strings(v, out)
    elif isinstance(value, (list, tuple)):
        for v in value:
            _strings(v, out)
    elif hasattr(value, "tolist"):
        _strings(value.tolist(), out)


def _page_text(doc):
    out = []
    for m in doc.models:
        for prop in ("text", "label", "title", "options", "labels", "placeholder",
                     "axis_label", "data", "value"):
            if prop in m.properties():
                v = getattr(m, prop)
                if prop == "data" and isinstance(v, dict):
                    v = {k: c for k, c in v.items() if k in ("sign", "kind", "piece", "layer",
                                                             "text", "name")}
                _strings(getattr(v, "text", v), out)
    return out


def test_page_speaks_one_vocabulary(small_case_path, tmp_path):
    import shutil

    shutil.copy(small_case_path, tmp_path / "wave.nc")
    bench = Workbench(str(tmp_path / "wave.nc"))
    doc = Document()
    doc.add_root(bench.layout.get_root(doc))
    bench.lasso_piece(TROUGH)
    bench.state.page.sign = -1
    bench.lasso_piece([(10.0, 40.0), (25.0, 40.0), (25.0, 50.0), (10.0, 50.0)])
    bench.add_boundary("bottom")
    bench.draw_section((-30.0, 40.0), (20.0, 52.0))
    bench.pick_target(-5.0, 46.0)
    text = _page_text(doc)
    joined = "\n".join(text)
    assert "full inversion" in joined
    assert not re.search(r"\btotal\b", joined, re.I), [t for t in text if re.search(r"\btotal\b", t, re.I)]
    assert "full flow" not in joined.lower()
    signs = list(bench.pieces_table.value["sign"])
    assert set(signs) <= {"positive", "negative", "both", ""} and "negative" in signs
    assert not re.search(r"-\d+(\.\d+)?°E", joined), "negative longitudes must read °W"
    assert "°W" in bench.state.status or "°E" in bench.state.status
    # one name each: the tropopause threshold vs a piece's minimum anomaly
    assert "Tropopause threshold (PVU)" in text
    assert "Piece's minimum |PV anomaly| (PVU)" in text
    assert not any(t.startswith("Min. ") or t == "Tropopause (PVU)" for t in text)
    kinds = set(bench.pieces_table.value["kind"])
    assert kinds <= {"interior PV", "surface θ′", "lid θ′", "lateral boundary", "remainder"}
