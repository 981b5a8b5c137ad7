"""Read-outs and overlay settings in the served page, with real mouse events in headless
Chromium: the map hover names the field with its value and units, the point's pressure and
the balanced flow of the visible pieces; the section hover gives distance, pressure, PV, θ and
the normal wind; the arrow density box changes the arrows drawn and the legend arrow.
Screenshots go to /tmp/shots/readouts/ and tests/artifacts/."""
from __future__ import annotations

import math
import shutil
import time
from pathlib import Path

import numpy as np
import pytest

from browser_served import JS_FIG_TO_SCREEN, drag, served_page, status, wait_status
from workbench.testing import choose_mouse_mode

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = Path(__file__).parent / "artifacts"
SHOTS = Path("/tmp/shots/readouts")


@pytest.fixture(scope="module")
def case_file(tmp_path_factory, small_case_path):
    folder = tmp_path_factory.mktemp("readouts") / "data"
    folder.mkdir()
    samples = sorted((ROOT / "sample_cases").glob("*.nc"))
    src = samples[0] if samples else small_case_path
    shutil.copy(src, folder / src.name)
    return folder / src.name


@pytest.fixture(scope="module")
def page(case_file):
    SHOTS.mkdir(parents=True, exist_ok=True)
    with served_page(case_file, case_file.parent, case_file.parent.parent / "server.log") as pg:
        yield pg


@pytest.fixture(scope="module")
def anomaly(case_file):
    """Where the 320 K PV anomaly is strongest (lon, lat) and the state's values there."""
    import workbench as wb

    case = wb.open_case(case_file)
    pv = case.map_field("ertel_pv_anomaly", 320.0, time=0)
    inner = pv.isel(latitude=slice(4, -4), longitude=slice(4, -4))
    j, i = np.unravel_index(int(np.nanargmax(np.abs(inner.values))), inner.shape)
    d = case.domain
    return (float(inner.longitude[i]), float(inner.latitude[j]),
            0.08 * (d["lon_max"] - d["lon_min"]), 0.09 * (d["lat_max"] - d["lat_min"]))


def _tooltip_text(page, must, timeout=10.0):
    """The text of the visible Bokeh tooltip holding ``must`` (shadow roots searched)."""
    t0 = time.perf_counter()
    while time.perf_counter() - t0 < timeout:
        loc = page.get_by_text(must, exact=False)
        for k in range(loc.count()):
            el = loc.nth(k)
            if el.is_visible():
                box = el.locator("xpath=ancestor-or-self::*[contains(@class,'bk-tooltip-content')"
                                 " or contains(@class,'bk-Tooltip')][1]")
                return (box.inner_text() if box.count() else el.inner_text()), \
                    time.perf_counter() - t0
        page.wait_for_timeout(30)
    raise AssertionError(f"no tooltip with {must!r} within {timeout} s")


def _hover_map(page, fig, lon, lat, must):
    page.mouse.move(5, 5)
    page.wait_for_timeout(200)
    (x, y), = page.evaluate(JS_FIG_TO_SCREEN, [fig, [(lon, lat)]])
    page.mouse.move(x - 6, y - 4)
    page.mouse.move(x, y, steps=4)
    return _tooltip_text(page, must)


def test_map_hover_names_the_field_with_units_and_the_point(page, anomaly):
    lon, lat, rx, ry = anomaly
    text, latency = _hover_map(page, "pvwb-map", lon, lat, "PV on 320 K")
    assert "PVU" in text and "pressure" in text and "hPa" in text
    assert ("°W" in text or "°E" in text) and ("°N" in text or "°S" in text)
    value = float(text.split("PV on 320 K")[1].split("PVU")[0].strip(" :\n"))
    assert 0.0 <= value < 30.0
    page.screenshot(path=str(SHOTS / "map_hover_field.png"))
    print(f"map hover latency (mouse at rest to tooltip, incl. polling): {latency:.3f} s")
    assert page.problems == []


def test_map_hover_gives_the_balanced_flow_of_the_pieces(page, anomaly):
    lon, lat, rx, ry = anomaly
    choose_mouse_mode(page, "Lasso a piece")
    ring = [(lon + rx * math.cos(t), lat + ry * math.sin(t))
            for t in [2 * math.pi * k / 36 for k in range(37)]]
    drag(page, "pvwb-map", ring)
    wait_status(page, "inverted")
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name("
                           "'pvwb-balanced-vectors').data.x0.length > 0", timeout=60000)
    choose_mouse_mode(page, "Pan / zoom")
    text, _ = _hover_map(page, "pvwb-map", lon, lat, "balanced Z′")
    assert "balanced wind" in text and "m/s from" in text and "°" in text
    z = float(text.split("balanced Z′")[1].split(":")[1].split("m")[0].strip())
    assert z != 0.0 and abs(z) < 2000
    page.screenshot(path=str(SHOTS / "map_hover_balanced.png"))
    assert page.problems == []


def test_section_hover_gives_distance_pressure_pv_theta_and_normal_wind(page, anomaly):
    lon, lat, rx, ry = anomaly
    choose_mouse_mode(page, "Draw a section")
    page.wait_for_timeout(300)
    x0, x1, y0, y1 = page.evaluate("""() => {
      const f = Bokeh.documents[0].get_model_by_name('pvwb-map');
      return [f.x_range.start, f.x_range.end, f.y_range.start, f.y_range.end]; }""")

    def inside(pt):  # a stroke must start and end on the map
        return (min(max(pt[0], x0 + 0.03 * (x1 - x0)), x1 - 0.03 * (x1 - x0)),
                min(max(pt[1], y0 + 0.03 * (y1 - y0)), y1 - 0.03 * (y1 - y0)))

    a, b = inside((lon - 2.5 * rx, lat - 1.2 * ry)), inside((lon + 2.5 * rx, lat + 1.2 * ry))
    drag(page, "pvwb-map", [(a[0] + (b[0] - a[0]) * k / 20, a[1] + (b[1] - a[1]) * k / 20)
                            for k in range(21)])
    page.wait_for_function("() => { const f = Bokeh.documents[0].get_model_by_name("
                           "'pvwb-section-plot'); return f && f.visible && "
                           "Bokeh.documents[0].get_model_by_name('pvwb-section-pv')"
                           ".data.dist.length > 0; }", timeout=60000)
    page.wait_for_timeout(800)
    x0, x1 = page.evaluate("() => { const f = Bokeh.documents[0].get_model_by_name("
                           "'pvwb-section-plot'); return [f.x_range.start, f.x_range.end]; }")
    page.locator(".pvwb-section").scroll_into_view_if_needed()
    page.mouse.move(5, 5)
    (x, y), = page.evaluate(JS_FIG_TO_SCREEN, ["pvwb-section-plot", [(0.5 * (x0 + x1), 500.0)]])
    page.mouse.move(x - 5, y - 5)
    page.mouse.move(x, y, steps=3)
    text, latency = _tooltip_text(page, "distance from A")
    for part in ("km", "pressure", "hPa", "PVU", "θ", "K", "normal wind", "m/s"):
        assert part in text, (part, text)
    dist = float(text.split("distance from A")[1].split(":")[1].split("km")[0].strip())
    assert 0.3 * (x1 - x0) < dist < 0.7 * (x1 - x0)
    p = float(text.split("pressure")[1].split(":")[1].split("hPa")[0].strip())
    assert 400 < p < 620  # the cell under the mouse at 500 hPa (levels are uneven)
    page.screenshot(path=str(SHOTS / "section_hover.png"))
    print(f"section hover latency: {latency:.3f} s")
    assert page.problems == []


def test_arrow_density_changes_the_arrows_and_the_legend_arrow(page):
    page.mouse.move(5, 5)
    before = page.evaluate("""() => { const d = Bokeh.documents[0];
      const a = d.get_model_by_name('pvwb-legend-arrow').data;
      return [d.get_model_by_name('pvwb-balanced-vectors').data.x0.length, a.x1[0] - a.x0[0],
              d.get_model_by_name('pvwb-legend-arrow-text').data.text[0]]; }""")
    assert before[0] > 0 and before[1] > 0 and before[2].endswith("m/s")
    box = page.locator(".pvwb-overlay-stride input")
    box.fill("1")
    box.press("Enter")
    page.wait_for_function("""([n, w]) => { const d = Bokeh.documents[0];
      const a = d.get_model_by_name('pvwb-legend-arrow').data;
      return d.get_model_by_name('pvwb-balanced-vectors').data.x0.length != n &&
             a.x1[0] - a.x0[0] != w; }""", arg=before[:2], timeout=30000)
    after = page.evaluate("""() => { const d = Bokeh.documents[0];
      const a = d.get_model_by_name('pvwb-legend-arrow').data;
      return [d.get_model_by_name('pvwb-balanced-vectors').data.x0.length, a.x1[0] - a.x0[0],
              d.get_model_by_name('pvwb-legend-arrow-text').data.text[0]]; }""")
    assert after[0] > 2 * before[0]  # an arrow at every grid point
    assert after[1] < before[1]      # the legend arrow is one (shorter) spacing long
    speed = page.locator(".pvwb-overlay-speed input")
    speed.fill("20")
    speed.press("Enter")
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name("
                           "'pvwb-legend-arrow-text').data.text[0] == '20 m/s'", timeout=30000)
    box.fill("3")
    box.press("Enter")
    page.wait_for_function("(n) => Bokeh.documents[0].get_model_by_name("
                           "'pvwb-balanced-vectors').data.x0.length < n", arg=after[0],
                           timeout=30000)
    page.mouse.move(5, 5)
    page.evaluate("() => window.scrollTo(0, 0)")
    page.wait_for_timeout(500)
    page.screenshot(path=str(SHOTS / "overlay_density.png"))
    page.screenshot(path=str(ARTIFACTS / "app_overlay_settings.png"), full_page=True)
    assert "error" != page.locator(".pvwb-status-text").get_attribute("data-level"), status(page)
    assert page.problems == []
