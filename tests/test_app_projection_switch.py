"""The map's projection switch in the served page (headless Chromium, requests off 127.0.0.1
aborted), on a Lambert-conformal GRIB2 file as a regional model writes it: the map is rebuilt
on longitude-latitude and back, the old figures leave the browser's model index each time (one
map found by name, the count of models back where it was: nothing accumulates over a long
session), a lasso on the rebuilt map makes a piece, and Escape during a lasso clears it with
no page error. Screenshots go to tests/artifacts/."""
from __future__ import annotations

from pathlib import Path

import pytest

import forecast_files as ff
from browser_served import served_page
from workbench.testing import choose_mouse_mode, drag_on_map, ring

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ARTIFACTS = Path(__file__).parent / "artifacts"

JS_MAPS = """() => Array.from(Bokeh.documents[0]._all_models.values())
  .filter(m => m.name == 'pvwb-map').length"""
JS_MODELS = "() => Bokeh.documents[0]._all_models.size"
JS_X0 = "() => Bokeh.documents[0].get_model_by_name('pvwb-map').x_range.start"
JS_PIECES = "() => Bokeh.documents[0].get_model_by_name('pvwb-pieces').data.name"


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    folder = tmp_path_factory.mktemp("projection") / "data"
    folder.mkdir()
    path = folder / "regional.grib2"
    ff.write_grib(path, "lambert")
    with served_page(path, folder, folder.parent / "server.log") as pg:
        yield pg


def _switch(page, label, native):
    """Click the projection button ``label``; wait for the rebuilt map (plane metres or
    degrees), then for the old one to leave the model index (the page asks the browser to
    recompute it right after a rebuild; BokehJS alone leaves it stale for tens of seconds)."""
    page.get_by_text(label, exact=True).click()
    test = "Math.abs(x) > 1000" if native else "Math.abs(x) < 360"
    page.wait_for_function(f"() => Array.from(Bokeh.documents[0]._all_models.values()).some("
                           f"m => {{ if (m.name != 'pvwb-map') return false; "
                           f"const x = m.x_range.start; return {test}; }})", timeout=60000)
    page.wait_for_function(f"() => ({JS_MAPS})() == 1", timeout=10000)


def test_switching_projection_leaves_one_map_and_no_old_models(page):
    assert page.evaluate(JS_MAPS) == 1
    assert abs(page.evaluate(JS_X0)) > 1000  # the data's own projection: plane metres
    n0 = page.evaluate(JS_MODELS)
    counts = []
    for _ in range(2):
        _switch(page, "lon–lat", native=False)
        _switch(page, "its own projection", native=True)
        page.wait_for_timeout(500)
        counts.append(page.evaluate(JS_MODELS))
    print(f"models in the browser: {n0} at start, {counts} after each round trip")
    assert max(counts) <= n0 + 20  # the old figures are gone (each map holds ~300 models)
    assert page.problems == []


def test_lasso_and_escape_on_the_rebuilt_map(page):
    _switch(page, "lon–lat", native=False)
    choose_mouse_mode(page, "Lasso a piece")
    page.wait_for_timeout(300)

    drag_on_map(page, ring(-30.0, 49.0, 6.0, 4.0, n=30), steps=2)
    page.wait_for_function(f"() => ({JS_PIECES})().length == 1", timeout=60000)
    # Escape while a second lasso is drawn: the outline is cleared, nothing is made
    drag_on_map(page, ring(-24.0, 52.0, 3.0, 2.0, n=30), steps=2,
                before_release=lambda: page.keyboard.press("Escape"))
    page.wait_for_timeout(1500)
    assert len(page.evaluate(JS_PIECES)) == 1
    page.mouse.move(5, 5)
    page.screenshot(path=str(ARTIFACTS / "app_projection_switch.png"), full_page=True)
    assert page.problems == []
