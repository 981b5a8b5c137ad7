"""The served page's layout in headless Chromium (Debian's /usr/bin/chromium through
Playwright; no browser is downloaded): no sideways scrolling at 1024 px, the tables inside the
window (they scroll inside themselves), one column under 800 px, the map's aspect kept.
Screenshots go to tests/artifacts/."""
from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from workbench.testing import (CHROMIUM, CHROMIUM_ARGS, JS_MAP_READY, free_port, start_server,
                               stop_server)

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = Path(__file__).parent / "artifacts"

JS_GEOMETRY = """() => {
  const doc = Bokeh.documents[0];
  const fig = doc.get_model_by_name('pvwb-map');
  const v = Bokeh.index.find_one(fig);
  const c = v.canvas_view.el.getBoundingClientRect();
  const box = (sel) => {
    // Panel renders inside shadow roots: search them too
    const stack = [document];
    while (stack.length) {
      const root = stack.pop();
      const el = root.querySelector(sel);
      if (el) { const r = el.getBoundingClientRect();
                return {left: r.left, right: r.right, top: r.top, bottom: r.bottom, width: r.width}; }
      for (const e of root.querySelectorAll('*')) { if (e.shadowRoot) stack.push(e.shadowRoot); }
    }
    return null;
  };
  return {scroll_width: document.documentElement.scrollWidth,
          client_width: document.documentElement.clientWidth,
          map: {left: c.left, top: c.top, width: c.width, height: c.height,
                fig_width: fig.width, fig_height: fig.height},
          side: box('.pvwb-side'), pieces: box('.pvwb-pieces'), tabs: box('.pvwb-tabs')};
}"""


@pytest.fixture(scope="module")
def server(tmp_path_factory, small_case_path):
    folder = tmp_path_factory.mktemp("layout") / "data"
    folder.mkdir()
    samples = sorted((ROOT / "sample_cases").glob("*.nc"))
    src = samples[0] if samples else small_case_path
    shutil.copy(src, folder / src.name)
    log = open(folder.parent / "server.log", "w")
    try:
        proc, url = start_server(folder / src.name, free_port(), log)
    except RuntimeError as exc:
        log.close()
        pytest.fail(str(exc))
    yield url
    stop_server(proc)
    log.close()


@pytest.fixture(scope="module")
def browser():
    if not Path(CHROMIUM).exists():
        pytest.skip(f"{CHROMIUM} is missing: install Debian's chromium package")
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        yield b
        b.close()


def _geometry(browser, url, width):
    page = browser.new_page(viewport={"width": width, "height": 900})
    page.goto(url)
    page.wait_for_function(JS_MAP_READY, timeout=120000)
    page.wait_for_timeout(2000)
    geo = page.evaluate(JS_GEOMETRY)
    page.screenshot(path=str(ARTIFACTS / f"app_layout_{width}.png"), full_page=True)
    page.close()
    return geo


@pytest.mark.parametrize("width", [1024, 760])
def test_no_sideways_scrolling_and_tables_inside_the_window(browser, server, width):
    geo = _geometry(browser, server, width)
    assert geo["scroll_width"] <= geo["client_width"] + 1, geo
    for key in ("map", "pieces", "tabs"):
        box = geo[key]
        assert box is not None, key
        right = box["left"] + box["width"] if key == "map" else box["right"]
        assert right <= width + 1, (key, box)
    # the map keeps the aspect of the figure as built (lon/lat spacing of the case)
    m = geo["map"]
    assert m["width"] / m["height"] == pytest.approx(m["fig_width"] / m["fig_height"], rel=0.03)
    if width < 800:  # one column: the map below the controls, the tables below the map
        assert m["top"] >= geo["side"]["bottom"] - 1, geo
        assert geo["pieces"]["top"] >= m["top"] + m["height"] - 1, geo
