"""The compare tab in the served page, with real mouse events in headless Chromium: panning
map A moves map B (shared ranges), and map B's difference of a time with itself is zero.
Screenshots go to /tmp/shots/readouts/ and tests/artifacts/."""
from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from browser_served import JS_VIEW_X, drag, served_page

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = Path(__file__).parent / "artifacts"
SHOTS = Path("/tmp/shots/readouts")

JS_IMAGE_MAX = """(name) => {
  const img = Bokeh.documents[0].get_model_by_name(name).data.image[0];
  let m = -1, n = 0;
  for (const x of (img.length !== undefined && typeof img[0] === 'number') ? img : img.flat()) {
    if (Number.isFinite(x)) { m = Math.max(m, Math.abs(x)); n += 1; }
  }
  return [m, n];
}"""


@pytest.fixture(scope="module")
def page(tmp_path_factory, small_case_path):
    SHOTS.mkdir(parents=True, exist_ok=True)
    folder = tmp_path_factory.mktemp("compare") / "data"
    folder.mkdir()
    samples = sorted((ROOT / "sample_cases").glob("*.nc"))
    src = samples[0] if samples else small_case_path
    shutil.copy(src, folder / src.name)
    with served_page(folder / src.name, folder, folder.parent / "server.log") as pg:
        pg.get_by_text("Compare", exact=True).click()
        pg.wait_for_function("() => { const f = Bokeh.documents[0].get_model_by_name("
                             "'pvwb-cmp-b-map'); return f && Bokeh.index.find_one(f); }",
                             timeout=60000)
        pg.locator(".pvwb-compare").scroll_into_view_if_needed()
        pg.wait_for_timeout(1000)
        yield pg


def test_panning_map_a_moves_map_b(page):
    a0, b0 = page.evaluate(JS_VIEW_X, "pvwb-cmp-a-map"), page.evaluate(JS_VIEW_X, "pvwb-cmp-b-map")
    assert a0 == b0
    page.mouse.move(5, 5)
    page.screenshot(path=str(SHOTS / "compare_tab.png"))
    # zoom in first (wheel over map A), so there is room to pan inside the bounds
    (x, y), = page.evaluate("""([n, p]) => { const v = Bokeh.index.find_one(
        Bokeh.documents[0].get_model_by_name(n)); const r = v.canvas_view.el.getBoundingClientRect();
        return [[r.left + v.frame.x_scale.compute(p[0]), r.top + v.frame.y_scale.compute(p[1])]]; }""",
                            ["pvwb-cmp-a-map", [0.5 * (a0[0] + a0[1]), 45.0]])
    page.mouse.move(x, y)
    for _ in range(2):
        page.mouse.wheel(0, -200)
        page.wait_for_timeout(150)
    z = page.evaluate(JS_VIEW_X, "pvwb-cmp-a-map")
    assert z[1] - z[0] < 0.9 * (a0[1] - a0[0])
    mid = 0.5 * (z[0] + z[1])
    drag(page, "pvwb-cmp-a-map", [(mid, 45.0), (mid + 0.25 * (z[1] - z[0]), 45.0)], steps=8)
    page.wait_for_timeout(500)
    a1, b1 = page.evaluate(JS_VIEW_X, "pvwb-cmp-a-map"), page.evaluate(JS_VIEW_X, "pvwb-cmp-b-map")
    assert a1 != z and abs(a1[0] - z[0]) > 0.05 * (z[1] - z[0])  # map A panned ...
    assert b1 == pytest.approx(a1)                                # ... and map B followed
    page.mouse.move(5, 5)
    page.screenshot(path=str(SHOTS / "compare_linked.png"))
    assert page.problems == []


def test_difference_of_a_time_with_itself_is_zero(page):
    page.locator(".pvwb-compare-diff input").check()
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name('pvwb-cmp-b-map')"
                           ".title.text.includes('−')", timeout=30000)
    m, n = page.evaluate(JS_IMAGE_MAX, "pvwb-cmp-b-field")
    assert m > 0 and n > 100  # B (next time) minus A: not zero
    select_b = page.locator(".pvwb-compare-time-b select")
    first = page.locator(".pvwb-compare-time-a select").input_value()
    select_b.select_option(value=first)
    page.wait_for_function(f"(n) => ({JS_IMAGE_MAX})(n)[0] === 0", arg="pvwb-cmp-b-field",
                           timeout=30000)
    m, n = page.evaluate(JS_IMAGE_MAX, "pvwb-cmp-b-field")
    assert m == 0 and n > 100
    page.mouse.move(5, 5)
    page.screenshot(path=str(SHOTS / "compare_difference_zero.png"))
    page.screenshot(path=str(ARTIFACTS / "app_compare.png"), full_page=True)
    assert page.problems == []
