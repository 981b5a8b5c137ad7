"""The served workbench in real headless Chromium (Debian's /usr/bin/chromium through
Playwright's Python API; no browser is ever downloaded).

One server (``python -m workbench.cli serve CASE --page-port P --data-folder D`` on 127.0.0.1) and one
page serve the tests of this module, which run in order like a forecaster's session: load,
lasso a piece, draw a section, open a bad file. Screenshots go to tests/artifacts/.
"""
from __future__ import annotations

import io
import shutil
import time
from pathlib import Path

import numpy as np
import pytest

pytestmark = pytest.mark.browser

ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = Path(__file__).parent / "artifacts"
from workbench.testing import (CHROMIUM, CHROMIUM_ARGS as ARGS, JS_MAP_READY, JS_TO_SCREEN,  # noqa: E402
                               choose_mouse_mode, drag_on_map as _drag, free_port, ring,
                               start_server, stop_server)

JS_MAP_RECT = """() => {
  const v = Bokeh.index.find_one(Bokeh.documents[0].get_model_by_name('pvwb-map'));
  const r = v.canvas_view.el.getBoundingClientRect();
  return [r.left, r.top, r.width, r.height];
}"""


@pytest.fixture(scope="module")
def case_file(tmp_path_factory, small_case_path):
    """The sample storm if committed, else the small fixture case, in a fresh data folder
    next to a text file that is not a case."""
    folder = tmp_path_factory.mktemp("browser") / "data"
    folder.mkdir()
    samples = sorted((ROOT / "sample_cases").glob("*.nc"))
    src = samples[0] if samples else small_case_path
    dst = folder / src.name
    shutil.copy(src, dst)
    (folder / "notes.txt").write_text("this is a forecaster's note, not a case file\n")
    return dst


@pytest.fixture(scope="module")
def server(case_file):
    log = open(case_file.parent.parent / "server.log", "w")
    try:
        proc, url = start_server(case_file, free_port(), log, ["--data-folder", case_file.parent])
    except RuntimeError as exc:
        log.close()
        pytest.fail(str(exc))
    yield url
    stop_server(proc)
    log.close()


@pytest.fixture(scope="module")
def page(server):
    if not Path(CHROMIUM).exists():
        pytest.skip(f"{CHROMIUM} is missing: install Debian's chromium package")
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        pg = browser.new_page(viewport={"width": 1500, "height": 1250})
        pg.problems = []
        pg.on("console", lambda m: m.type == "error" and pg.problems.append(m.text))
        pg.on("pageerror", lambda e: pg.problems.append(str(e)))
        pg.on("requestfailed", lambda r: pg.problems.append(f"request failed: {r.url}"))
        pg.goto(server)
        pg.wait_for_function(JS_MAP_READY, timeout=120000)
        pg.wait_for_timeout(1500)
        yield pg
        browser.close()


@pytest.fixture(scope="module")
def anomaly_centre(case_file):
    """Where the map's PV anomaly is strongest (the lasso goes round it)."""
    import workbench as wb

    case = wb.open_case(case_file)
    pv = case.map_field("ertel_pv_anomaly", 320.0, time=0)
    inner = pv.isel(latitude=slice(3, -3), longitude=slice(3, -3))
    k = np.nanargmax(np.abs(inner.values))
    j, i = np.unravel_index(k, inner.shape)
    d = case.domain
    return (float(inner.longitude[i]), float(inner.latitude[j]),
            0.07 * (d["lon_max"] - d["lon_min"]), 0.08 * (d["lat_max"] - d["lat_min"]))


def _map_pixels(page):
    from PIL import Image

    x, y, w, h = page.evaluate(JS_MAP_RECT)
    png = page.screenshot(clip=dict(x=x, y=y, width=w, height=h))
    return np.asarray(Image.open(io.BytesIO(png)).convert("RGB"))


def _status(page):
    return page.locator(".pvwb-status-text").inner_text()


def test_page_loads_without_errors_and_draws_the_map(page):
    assert page.problems == []
    assert page.title() == "PV Workbench"
    assert page.get_by_text("not a forecast or warning", exact=False).count() >= 1
    img = _map_pixels(page)
    assert img.shape[0] > 200 and img.shape[1] > 200
    colours = np.unique(img.reshape(-1, 3), axis=0)
    assert len(colours) > 100 and img.std() > 20  # a drawn field, not a blank canvas
    page.screenshot(path=str(ARTIFACTS / "app_loaded.png"), full_page=True)


def test_lasso_makes_a_piece_and_updates_the_overlay_in_place(page, anomaly_centre):
    choose_mouse_mode(page, "Lasso a piece")
    page.evaluate("""() => {
      const doc = Bokeh.documents[0];
      const fig = doc.get_model_by_name('pvwb-map');
      window._fig_id = fig.id;
      const v = Bokeh.index.find_one(fig);
      window._canvas = v.canvas_view.el; window._canvas._pvwb_mark = true;
      const src = doc.get_model_by_name('pvwb-balanced-vectors');
      window._src_id = src.id;
      window._changes = 0;
      src.properties.data.change.connect(() => { window._changes += 1; });
    }""")
    assert page.evaluate("() => Bokeh.documents[0].get_model_by_name("
                         "'pvwb-balanced-vectors').data.x0.length") == 0
    lon, lat, rx, ry = anomaly_centre
    _drag(page, ring(lon, lat, rx, ry))
    page.wait_for_function("() => window._changes > 0", timeout=60000)
    page.wait_for_timeout(1000)
    res = page.evaluate("""() => {
      const doc = Bokeh.documents[0];
      const fig = doc.get_model_by_name('pvwb-map');
      const v = Bokeh.index.find_one(fig);
      const src = doc.get_model_by_name('pvwb-balanced-vectors');
      return {same_figure: fig.id === window._fig_id,
              same_canvas: v.canvas_view.el === window._canvas && window._canvas._pvwb_mark,
              same_source: src.id === window._src_id,
              vectors: src.data.x0.length,
              contours: doc.get_model_by_name('pvwb-height-pos').data.xs.length +
                        doc.get_model_by_name('pvwb-height-neg').data.xs.length,
              pieces: doc.get_model_by_name('pvwb-pieces').data.name};
    }""")
    assert res["same_figure"] and res["same_canvas"] and res["same_source"]
    assert res["vectors"] > 0 and res["contours"] > 0
    assert res["pieces"] == ["piece"]
    assert "inverted" in _status(page)
    assert page.locator(".pvwb-pieces").get_by_text("interior").count() == 1
    assert page.problems == []
    page.mouse.move(5, 5)  # no hover tooltip in the picture
    page.screenshot(path=str(ARTIFACTS / "app_lasso.png"), full_page=True)


def test_section_line_drawn_with_the_mouse_shows_the_section(page, anomaly_centre):
    lon, lat, rx, ry = anomaly_centre
    choose_mouse_mode(page, "Draw a section")
    page.wait_for_timeout(300)
    # the line through the anomaly, kept inside the map (the anomaly may lie near an edge)
    x0, x1, y0, y1 = page.evaluate("""() => {
      const f = Bokeh.documents[0].get_model_by_name('pvwb-map');
      return [f.x_range.start, f.x_range.end, f.y_range.start, f.y_range.end]; }""")
    mx, my = 0.03 * (x1 - x0), 0.03 * (y1 - y0)

    def inside(pt):
        return (min(max(pt[0], x0 + mx), x1 - mx), min(max(pt[1], y0 + my), y1 - my))

    a = inside((lon - 2.5 * rx, lat - 1.5 * ry))
    b = inside((lon + 2.5 * rx, lat + 1.5 * ry))
    line = [(a[0] + (b[0] - a[0]) * k / 24, a[1] + (b[1] - a[1]) * k / 24) for k in range(25)]
    _drag(page, line)
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name("
                           "'pvwb-section-plot') != null", timeout=60000)
    page.wait_for_timeout(2000)
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name("
                           "'pvwb-section-pieces-plot') != null", timeout=60000)
    titles = page.evaluate("""() => ['pvwb-section-plot', 'pvwb-section-pieces-plot'].map(
        n => Bokeh.documents[0].get_model_by_name(n).title.text)""")
    assert titles[0].startswith("Section A")
    assert titles[1].startswith("Balanced flow of the visible pieces")
    ends = page.evaluate("() => Bokeh.documents[0].get_model_by_name("
                         "'pvwb-section-ends').data.text")
    assert ends == ["A", "B"]
    assert page.problems == []
    page.mouse.move(5, 5)
    page.screenshot(path=str(ARTIFACTS / "app_after_lasso.png"), full_page=True)


def test_bad_file_shows_its_message_and_the_page_still_works(page):
    select = page.locator("select").filter(has=page.locator("option", has_text="notes.txt"))
    select.select_option(label=select.locator("option", has_text="notes.txt").inner_text())
    page.locator(".pvwb-open").get_by_role("button").click()
    page.wait_for_function("() => document.querySelector('body') && true")
    deadline = time.time() + 30
    while "notes.txt" not in _status(page) and time.time() < deadline:
        page.wait_for_timeout(200)
    text = _status(page)
    assert "notes.txt" in text and "netCDF" in text
    assert page.locator(".pvwb-status-text").get_attribute("data-level") == "error"
    page.screenshot(path=str(ARTIFACTS / "app_bad_file.png"), full_page=True)
    # the page still works: the old case and its piece are there, a new field draws
    assert page.evaluate("() => Bokeh.documents[0].get_model_by_name('pvwb-pieces')"
                         ".data.name") == ["piece"]
    field = page.locator("select").filter(has=page.locator("option", has_text="wind speed"))
    field.select_option(label=field.locator("option", has_text="wind speed").inner_text())
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name('pvwb-colorbar')"
                           ".title.startsWith('wind speed')", timeout=30000)
    assert [p for p in page.problems if "notes.txt" not in p] == []


def test_label_and_save_session_from_the_page(page, case_file, anomaly_centre):
    """Place a label with the mouse, then save the session with the page's button: the file
    appears in the output folder (here the data folder) and the status says where."""
    import json

    lon, lat, rx, ry = anomaly_centre
    page.get_by_text("Annotate", exact=True).click()
    page.locator(".pvwb-label-text input").fill("L")
    choose_mouse_mode(page, "Place a label")
    page.evaluate("() => window.scrollTo(0, 0)")  # the map in view (the sidebar is long)
    page.wait_for_timeout(300)
    x, y = page.evaluate(JS_TO_SCREEN, [(lon, lat + 2 * ry)])[0]
    page.mouse.click(x, y)
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name('pvwb-ann-text')"
                           ".data.text.includes('L')", timeout=30000)
    page.get_by_text("Save & export", exact=True).click()
    name = "browser-session.json"
    target = case_file.parent / name
    assert not target.exists()
    page.locator(".pvwb-session-name input").fill(name)
    page.locator(".pvwb-save-session").get_by_role("button").click()
    deadline = time.time() + 30
    while "saved" not in _status(page) and time.time() < deadline:
        page.wait_for_timeout(200)
    text = _status(page)
    assert "Session saved to" in text and name in text, text
    assert page.locator(".pvwb-status-text").get_attribute("data-level") == "success"
    assert target.is_file()
    doc = json.loads(target.read_text())
    assert doc["schema"] == "pv-workbench-session"
    assert [p["name"] for p in doc["pieces"]] == ["piece"] and len(doc["sections"]) == 1
    assert [a["text"] for a in doc["annotations"] if a["type"] == "label"] == ["L"]
    assert page.locator(".pvwb-download").count() == 1
    assert page.problems == []
    page.mouse.move(5, 5)
    page.screenshot(path=str(ARTIFACTS / "app_saved_session.png"), full_page=True)
