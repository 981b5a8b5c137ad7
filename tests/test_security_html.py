"""Script injection: strings from case files (attributes, file names) and session files
(piece, section, annotation and region names, the file's own name, bad entries echoed in
messages) are shown as literal text and never run, in the served page (real headless
Chromium: Debian's /usr/bin/chromium through Playwright's Python API) and in notebook
output.

Payloads tried: PAYLOADS below, in every free-text field: case attributes title, case_name,
scenario, summary, comment, source, institution, history, caution, invented_label and the
variables' long_name; a case file name; a session file name; piece names, a section name,
label / arrow / region / section-label texts, the case name recorded in the session; and in
validated fields (reference, surface, field, an annotation colour) whose error messages
quote them.
"""
from __future__ import annotations

import json
import time
from pathlib import Path

import panel as pn
import pytest

import workbench as wb
from workbench import annotations as ann
from workbench import session as ses
from workbench.app import Workbench
from workbench.state import State
from workbench.textsafe import escape

from conftest import wave_dataset

P_SCRIPT = "<script>window.__pwned=1</script>"
P_IMG = '<img src=x onerror="window.__pwned=1">'
P_SVG = "<svg onload=window.__pwned=1>"
PAYLOADS = (P_SCRIPT, P_IMG, P_SVG)
ATTRS = ("title", "case_name", "scenario", "summary", "comment", "source", "institution",
         "history", "caution", "invented_label")
FILE_PAYLOAD = P_IMG  # a file name cannot hold "/", so not the script payload
ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = Path(__file__).parent / "artifacts"
SQUARE = [(-20.0, 40.0), (10.0, 40.0), (10.0, 55.0), (-20.0, 55.0)]

#: elements a payload would have created, searched through every shadow root
JS_INJECTED = """() => {
  let n = 0;
  const walk = (root) => root.querySelectorAll('*').forEach(el => {
    const t = el.tagName;
    if ((t === 'IMG' || t === 'SVG' || t === 'svg') &&
        ((el.getAttribute('onerror') || '') + (el.getAttribute('onload') || ''))
          .includes('__pwned')) n++;
    if (t === 'SCRIPT' && el.textContent.includes('__pwned')) n++;
    if (el.shadowRoot) walk(el.shadowRoot);
  });
  walk(document);
  return n;
}"""


def payload_case_file(folder: Path) -> Path:
    """A case whose every string attribute is an injection payload, in a file whose name is
    one too."""
    ds = wave_dataset(ntime=1)
    text = " ".join(PAYLOADS)
    for k in ATTRS:
        ds.attrs[k] = f"{k} {text}"
    ds.attrs["invented"] = "yes"
    for v in ds.data_vars:
        ds[v].attrs["long_name"] = P_IMG
    path = folder / f"storm {FILE_PAYLOAD}.nc"
    ds.to_netcdf(path)
    return path


def named_only_case_file(folder: Path) -> Path:
    """A case without title attributes: its name is its file's name, a payload."""
    ds = wave_dataset(ntime=1)
    ds.attrs = {}
    path = folder / f"wave {FILE_PAYLOAD}.nc"
    ds.to_netcdf(path)
    return path


def payload_state(case) -> State:
    st = State(case)
    st.add_piece(name=P_SCRIPT, kind="interior", polygon=SQUARE, layer=(400, 150), sign=1)
    st.add_piece(name=P_IMG, kind="bottom")
    st.add_section((-30, 45), (30, 50), name=P_IMG)
    st.set_target(0.0, 45.0, 850.0)
    st.add_annotation(ann.Label(P_SCRIPT, 0.0, 45.0))
    st.add_annotation(ann.Arrow(-25, 40, -5, 50, text=P_IMG))
    st.add_annotation(ann.Region([(-10, 40), (10, 40), (10, 50)], label=P_SVG))
    st.add_annotation(ann.SectionLabel(P_IMG, 1500.0, 300.0, space="section:0"))
    return st


def write_sessions(case, folder: Path) -> dict:
    """The payload session, sessions whose validated fields hold payloads, and a changed one."""
    good = ses.save_session(payload_state(case), folder / f"sess {FILE_PAYLOAD}.json")
    doc = json.loads(good.read_text())
    out = {"good": good}
    bad = {"reference": P_IMG, "surface": P_SCRIPT, "field": P_SVG}
    for key, value in bad.items():
        d = dict(doc, **{key: value})
        d["body_sha256"] = ses.body_checksum(d)
        out[key] = folder / f"bad-{key}.json"
        out[key].write_text(json.dumps(d))
    d = json.loads(json.dumps(doc))
    d["annotations"][0]["colour"] = P_IMG
    d["body_sha256"] = ses.body_checksum(d)
    out["colour"] = folder / "bad-colour.json"
    out["colour"].write_text(json.dumps(d))
    d = json.loads(json.dumps(doc))
    d["pieces"][0]["name"] = P_SVG  # changed after saving: the confirm step
    out["edited"] = folder / "edited.json"
    out["edited"].write_text(json.dumps(d))
    return out


# --------------------------------------------------------------------------- unit checks


def test_escape_makes_markup_literal():
    for p in PAYLOADS:
        e = escape(p)
        assert "<" not in e and ">" not in e and '"' not in e
        assert e.replace("&lt;", "<").replace("&gt;", ">").replace("&quot;", '"') \
            .replace("&#x27;", "'").replace("&amp;", "&") == p
    assert escape("a & b 'c'") == "a &amp; b &#x27;c&#x27;"
    assert escape(None) == "" and escape(12) == "12"
    assert escape("x" * 10, limit=4) == "xxxx…"


def _html_objects(bench):
    """Everything the page hands to the browser as HTML or Markdown."""
    panes = bench.layout.select(pn.pane.HTML) + bench.layout.select(pn.pane.Markdown)
    tabs = [bench.export_box, bench.annotate_box]
    for t in tabs:
        panes += t.select(pn.pane.HTML) + t.select(pn.pane.Markdown)
    return [str(p.object) for p in panes]


def test_no_payload_reaches_page_html_or_notebook_output_unescaped(tmp_path):
    case = wb.open_case(payload_case_file(tmp_path))
    assert P_SCRIPT in case.name  # the payload is really in what the page shows
    html = case._repr_html_()
    assert escape(FILE_PAYLOAD) in html and P_IMG not in html and "<script>" not in html
    paths = write_sessions(case, tmp_path)
    bench = Workbench(case, data_dirs=[str(tmp_path)])
    bench.load_session_file(str(paths["good"]))
    st = bench.state
    assert st.status_level == "success", st.status
    assert st.piece_names == [P_SCRIPT, P_IMG] and st.sections[0].name == P_IMG
    shown = "\n".join(_html_objects(bench))
    for p in PAYLOADS:
        assert p not in shown
    for p in (P_SCRIPT, P_IMG, P_SVG):  # shown, escaped: the header, the list, the status
        assert escape(p) in shown
    for key in ("reference", "surface", "field", "colour"):
        bench.load_session_file(str(paths[key]))
        assert st.status_level == "error", (key, st.status)
        assert any(p in st.status for p in PAYLOADS), (key, st.status)  # quoted in the message
        shown = "\n".join(_html_objects(bench))
        assert all(p not in shown for p in PAYLOADS), key


# --------------------------------------------------------------------------- the browser


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    d = tmp_path_factory.mktemp("injection") / "data"
    d.mkdir()
    case_path = payload_case_file(d)
    named_only_case_file(d)
    write_sessions(wb.open_case(case_path), d)
    return d


@pytest.fixture(scope="module")
def page(folder):
    from workbench.testing import (CHROMIUM, CHROMIUM_ARGS, JS_MAP_READY, free_port,
                                   start_server, stop_server)

    if not Path(CHROMIUM).exists():
        pytest.skip(f"{CHROMIUM} is missing: install Debian's chromium package")
    from playwright.sync_api import sync_playwright

    case_path = next(folder.glob("storm *.nc"))
    log = open(folder.parent / "server.log", "w")
    try:
        proc, url = start_server(case_path, free_port(), log, ["--data-folder", folder])
    except RuntimeError as exc:
        log.close()
        pytest.fail(str(exc))
    try:
        with sync_playwright() as p:
            browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
            pg = browser.new_page(viewport={"width": 1500, "height": 1250})
            pg.problems = []
            pg.on("pageerror", lambda e: pg.problems.append(str(e)))
            pg.goto(url)
            pg.wait_for_function(JS_MAP_READY, timeout=120000)
            pg.wait_for_timeout(1000)
            yield pg
            browser.close()
    finally:
        stop_server(proc)
        log.close()


#: the text (textContent) of the elements with a class, shadow roots included
JS_TEXT = """(cls) => {
  const out = [];
  const text = (el) => {
    let t = el.textContent || '';
    if (el.shadowRoot) t += ' ' + Array.from(el.shadowRoot.querySelectorAll('*'))
        .map(c => c.shadowRoot ? text(c) : '').join(' ') + ' ' + el.shadowRoot.textContent;
    return t;
  };
  const walk = (root) => root.querySelectorAll('*').forEach(el => {
    if (el.classList && el.classList.contains(cls)) out.push(text(el));
    if (el.shadowRoot) walk(el.shadowRoot);
  });
  walk(document);
  return out.join('\\n');
}"""


def _text(page, cls):
    return page.evaluate(JS_TEXT, cls)


def _status(page):
    return page.locator(".pvwb-status-text").inner_text()


def _wait_status(page, words, timeout=60.0, level=None):
    deadline = time.time() + timeout
    while time.time() < deadline:
        text = _status(page)
        lev = page.locator(".pvwb-status-text").get_attribute("data-level")
        if all(w in text for w in words) and (level is None or lev == level):
            return text
        page.wait_for_timeout(200)
    raise AssertionError(f"status never said {words}: {_status(page)!r}")


def _assert_clean(page):
    assert page.evaluate("() => typeof window.__pwned") == "undefined"
    assert page.evaluate(JS_INJECTED) == 0
    assert page.problems == []


def _load_session(page, folder, name):
    select = page.locator(".pvwb-session-list select")
    select.select_option(label=f"{folder.name}/{name}")
    page.locator(".pvwb-load-session").get_by_role("button").click()


@pytest.mark.browser
def test_case_strings_are_shown_literally(page):
    _assert_clean(page)
    header = _text(page, "pvwb-header")
    assert P_SCRIPT in header and P_IMG in header  # case_name and the invented label
    assert "Invented case" in header


@pytest.mark.browser
def test_session_strings_are_shown_literally(page, folder):
    page.get_by_text("Save & export", exact=True).click()
    name = f"sess {FILE_PAYLOAD}.json"
    _load_session(page, folder, name)
    text = _wait_status(page, ["Loaded session", name])
    assert P_IMG in text
    page.wait_for_function("(p) => Bokeh.documents[0].get_model_by_name('pvwb-pieces')"
                           ".data.name.includes(p)", arg=P_SCRIPT, timeout=60000)
    page.wait_for_timeout(1500)
    _assert_clean(page)
    pieces = _text(page, "pvwb-pieces")
    assert P_SCRIPT in pieces and P_IMG in pieces
    page.get_by_text("Attribution", exact=True).click()
    page.wait_for_timeout(500)
    assert P_SCRIPT in _text(page, "pvwb-attribution")
    page.get_by_text("Annotate", exact=True).click()
    page.wait_for_timeout(500)
    listed = _text(page, "pvwb-ann-list")
    assert P_SCRIPT in listed and P_IMG in listed and P_SVG in listed
    labels = page.evaluate("() => Bokeh.documents[0].get_model_by_name('pvwb-ann-text')"
                           ".data.text")
    assert P_SCRIPT in labels and P_SVG in labels
    _assert_clean(page)
    page.mouse.move(5, 5)
    page.screenshot(path=str(ARTIFACTS / "security_session_payloads.png"), full_page=True)


@pytest.mark.browser
def test_errors_quoting_payloads_are_shown_literally(page, folder):
    page.get_by_text("Save & export", exact=True).click()
    for key, payload in (("reference", P_IMG), ("surface", P_SCRIPT), ("field", P_SVG),
                         ("colour", P_IMG)):
        _load_session(page, folder, f"bad-{key}.json")
        _wait_status(page, [payload], level="error")
        _assert_clean(page)


@pytest.mark.browser
def test_a_changed_session_is_loaded_only_after_confirming(page, folder):
    page.get_by_text("Save & export", exact=True).click()
    _load_session(page, folder, "edited.json")
    _wait_status(page, ["changed after it was saved"], level="error")
    button = page.locator(".pvwb-load-anyway").get_by_role("button")
    button.wait_for(state="visible", timeout=30000)
    button.click()
    _wait_status(page, ["Loaded session edited.json", "confirmed"])
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name('pvwb-pieces')"
                           ".data.name.includes('<svg onload=window.__pwned=1>')",
                           timeout=60000)
    page.wait_for_timeout(1000)
    _assert_clean(page)


@pytest.mark.browser
def test_a_case_file_name_is_shown_literally(page, folder):
    name = f"wave {FILE_PAYLOAD}.nc"
    select = page.locator("select").filter(has=page.locator("option", has_text="wave "))
    select.select_option(label=f"{folder.name}/{name}")
    page.locator(".pvwb-open").get_by_role("button").click()
    _wait_status(page, [f"Opened {name}"], timeout=90, level="success")
    deadline = time.time() + 60
    while FILE_PAYLOAD not in _text(page, "pvwb-header") and time.time() < deadline:
        page.wait_for_timeout(300)
    assert FILE_PAYLOAD in _text(page, "pvwb-header")
    page.wait_for_timeout(1000)
    _assert_clean(page)
    page.mouse.move(5, 5)
    page.screenshot(path=str(ARTIFACTS / "security_file_name.png"), full_page=True)

