"""Time, undo and editing in the served workbench, driven with real mouse and keyboard events in
headless Chromium (Debian's /usr/bin/chromium through Playwright's Python API; nothing
downloaded, requests off the loopback address blocked).

One server and one page serve the tests of this module, in order: the → / ← keys step the
time, play advances the time and pause stops it, a lasso is undone with Ctrl+Z and redone with
Ctrl+Shift+Z, Escape cancels a lasso being drawn, dragging a vertex changes the piece's outline
and its inversion, a piece that follows its anomaly has a different outline at two times of the
sample storm, Delete removes the selected piece, and an arrow is drawn with the mouse.
Screenshots go to tests/artifacts/ (and /tmp/shots/timeloop/ when that folder exists).
"""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from workbench.testing import (CHROMIUM, CHROMIUM_ARGS as ARGS, JS_MAP_READY, JS_TO_SCREEN,
                               choose_mouse_mode, drag_on_map as _drag, free_port, ring,
                               start_server, stop_server)

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = Path(__file__).parent / "artifacts"
SHOTS = Path("/tmp/shots/timeloop")

JS_MODEL = "(name) => Bokeh.documents[0].get_model_by_name(name)"
JS_TITLE = "() => Bokeh.documents[0].get_model_by_name('pvwb-map').title.text"
JS_PIECES = "() => Bokeh.documents[0].get_model_by_name('pvwb-pieces').data.name"


def _shot(page, name):
    page.mouse.move(5, 5)
    page.screenshot(path=str(ARTIFACTS / name), full_page=True)
    if SHOTS.is_dir():
        shutil.copy(ARTIFACTS / name, SHOTS / name)


@pytest.fixture(scope="module")
def case_file(tmp_path_factory, small_case_path):
    folder = tmp_path_factory.mktemp("timeloop") / "data"
    folder.mkdir()
    samples = sorted((ROOT / "sample_cases").glob("*.nc"))
    src = samples[0] if samples else small_case_path
    dst = folder / src.name
    shutil.copy(src, dst)
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
        context = browser.new_context(viewport={"width": 1500, "height": 1250})
        context.route("**/*", lambda route: route.continue_()
                      if route.request.url.startswith(("http://127.0.0.1", "ws://127.0.0.1",
                                                       "data:", "blob:"))
                      else route.abort())
        pg = context.new_page()
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
def times(case_file):
    import workbench as wb

    case = wb.open_case(case_file)
    return [str(t)[:16].replace("T", " ") + " UTC" for t in case.times]


@pytest.fixture(scope="module")
def anomaly_centre(case_file):
    """Where the PV anomaly on 320 K is strongest at the first time (the lassos go round it)."""
    import workbench as wb

    case = wb.open_case(case_file)
    pv = case.map_field("ertel_pv_anomaly", 320.0, time=0)
    inner = pv.isel(latitude=slice(4, -4), longitude=slice(4, -4))
    k = np.nanargmax(inner.values)
    j, i = np.unravel_index(k, inner.shape)
    d = case.domain
    return (float(inner.longitude[i]), float(inner.latitude[j]),
            0.07 * (d["lon_max"] - d["lon_min"]), 0.08 * (d["lat_max"] - d["lat_min"]))


def _problems(page):
    """The page's errors, less the upload widget's plug-in registration (a resource of the
    file-upload widget, which is another panel's concern)."""
    return [p for p in page.problems if "registerPlugin" not in p]


def _status(page):
    return page.locator(".pvwb-status-text").inner_text()


def _focus_page(page):
    """Keys go to the document, not to a text box (click an empty part of the page)."""
    page.mouse.click(3, 3)


def _wait_title(page, text, timeout=60000):
    page.wait_for_function(f"() => ({JS_TITLE})().includes({text!r})", timeout=timeout)


def _arm_source(page, name):
    """Count changes of a Bokeh data source from now on (window._pvwb_changes[name])."""
    page.evaluate("""(name) => {
      window._pvwb_changes = window._pvwb_changes || {};
      window._pvwb_changes[name] = [];
      const src = Bokeh.documents[0].get_model_by_name(name);
      if (!src._pvwb_armed) {
        src._pvwb_armed = true;
        src.properties.data.change.connect(() => window._pvwb_changes[name].push(performance.now()));
      }
    }""", name)


def test_arrow_keys_step_the_time(page, times):
    assert _problems(page) == []
    assert times[0] in page.evaluate(JS_TITLE)
    _focus_page(page)
    page.keyboard.press("ArrowRight")
    _wait_title(page, times[1])
    page.keyboard.press("ArrowRight")
    _wait_title(page, times[2])
    page.keyboard.press("ArrowLeft")
    _wait_title(page, times[1])
    page.keyboard.press("ArrowLeft")
    _wait_title(page, times[0])
    # keys typed into a text box stay there
    page.get_by_text("Annotate", exact=True).click()
    box = page.locator(".pvwb-label-text input")
    box.fill("ab")
    box.press("ArrowLeft")
    page.wait_for_timeout(800)
    assert times[0] in page.evaluate(JS_TITLE)
    assert _problems(page) == []


def _time_index(page, times):
    title = page.evaluate(JS_TITLE)
    return next(k for k, lab in enumerate(times) if lab in title)


def _back_to_first_time(page, times):
    """Step back with ← to the case's first time (the lassos of the tests are drawn there)."""
    n = _time_index(page, times)
    if n == 0:
        return
    _focus_page(page)
    for k in range(n - 1, -1, -1):
        page.keyboard.press("ArrowLeft")
        _wait_title(page, times[k])


def _arm_title(page):
    """Record every change of the map's title in the browser (window._pvwb_titles): a poll
    from here can miss a title that the next step replaced within the poll's round trip."""
    page.evaluate("""() => {
      const t = Bokeh.documents[0].get_model_by_name('pvwb-map').title;
      window._pvwb_titles = [t.text];
      if (!t._pvwb_armed) {
        t._pvwb_armed = true;
        t.properties.text.change.connect(() => window._pvwb_titles.push(t.text));
      }
    }""")


def test_play_advances_the_time_and_pause_stops_it(page, times):
    try:
        fps = page.locator(".pvwb-fps input")
        fps.fill("4")
        fps.press("Enter")
        page.wait_for_timeout(300)
        _arm_title(page)
        page.locator(".pvwb-play").get_by_role("button").click()
        page.wait_for_function("() => window._pvwb_titles.length >= 4", timeout=40000)
        _shot(page, "timeloop_playing.png")
        page.locator(".pvwb-play").get_by_role("button").click()
        page.wait_for_timeout(1200)  # a step in flight lands
        stopped = page.evaluate(JS_TITLE)
        page.wait_for_timeout(1500)  # at 4 frames/s that is 6 steps if it still ran
        assert page.evaluate(JS_TITLE) == stopped
        seen = page.evaluate("() => window._pvwb_titles")
        assert seen[-1] == stopped
        # every step went one time forward through the case's times, wrapping round
        idx = [next(k for k, lab in enumerate(times) if lab in t) for t in seen]
        assert len(idx) >= 4, idx  # three steps at least
        assert all((b - a) % len(times) == 1 for a, b in zip(idx, idx[1:])), idx
        assert _problems(page) == []
    finally:
        if page.locator(".pvwb-play").get_by_role("button").inner_text().startswith("⏸"):
            page.locator(".pvwb-play").get_by_role("button").click()
            page.wait_for_timeout(1200)
        _back_to_first_time(page, times)  # the next tests lasso at the first time


def test_ctrl_z_undoes_a_lasso_and_ctrl_shift_z_redoes_it(page, anomaly_centre, times):
    _back_to_first_time(page, times)
    choose_mouse_mode(page, "Lasso a piece")
    page.wait_for_timeout(300)
    _drag(page, ring(*anomaly_centre))
    page.wait_for_function(f"() => ({JS_PIECES})().length == 1", timeout=60000)
    _focus_page(page)
    _arm_source(page, "pvwb-pieces")
    t0 = page.evaluate("() => performance.now()")
    page.keyboard.press("Control+z")
    page.wait_for_function(f"() => ({JS_PIECES})().length == 0", timeout=30000)
    undo_ms = page.evaluate("(t0) => window._pvwb_changes['pvwb-pieces'][0] - t0", t0)
    print(f"undo: key to outline gone {undo_ms:.0f} ms")
    assert page.evaluate("() => Bokeh.documents[0].get_model_by_name('pvwb-balanced-vectors')"
                         ".data.x0.length") == 0
    page.keyboard.press("Control+Shift+z")
    page.wait_for_function(f"() => ({JS_PIECES})().length == 1", timeout=30000)
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name('pvwb-balanced-vectors')"
                           ".data.x0.length > 0", timeout=30000)
    # Escape while drawing a lasso: the lasso makes nothing
    lon, lat, rx, ry = anomaly_centre
    _drag(page, ring(lon + 2.5 * rx, lat, rx, ry), steps=2,
          before_release=lambda: page.keyboard.press("Escape"))
    page.wait_for_timeout(2000)
    assert page.evaluate(JS_PIECES) == ["piece"]
    assert "cancelled" in _status(page)
    assert _problems(page) == []


def test_dragging_a_vertex_changes_the_outline_and_its_inversion(page, anomaly_centre):
    choose_mouse_mode(page, "Edit piece outlines")
    page.wait_for_timeout(300)
    lon, lat, rx, ry = anomaly_centre
    before = page.evaluate("""() => {
      const d = Bokeh.documents[0];
      return {xs: Array.from(d.get_model_by_name('pvwb-pieces').data.xs[0]),
              ys: Array.from(d.get_model_by_name('pvwb-pieces').data.ys[0]),
              z: d.get_model_by_name('pvwb-height-pos').data.xs.length + ':' +
                 JSON.stringify(d.get_model_by_name('pvwb-balanced-vectors').data.x1.slice(0, 50))};
    }""")
    # press and hold inside the outline: its vertices show
    x, y = page.evaluate(JS_TO_SCREEN, [(lon, lat)])[0]
    page.mouse.move(x, y)
    page.mouse.down()
    page.wait_for_timeout(900)
    page.mouse.up()
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name('pvwb-piece-vertices')"
                           ".data.x.length > 3", timeout=10000)
    # drag the easternmost vertex 3 radii further east
    vxs, vys = page.evaluate("""() => {const d = Bokeh.documents[0].get_model_by_name(
        'pvwb-piece-vertices').data; return [Array.from(d.x), Array.from(d.y)]; }""")
    k = int(np.argmax(vxs))
    vx, vy = vxs[k], vys[k]
    _arm_source(page, "pvwb-balanced-vectors")
    path = [(vx + 3 * rx * s / 10, vy) for s in range(11)]
    _drag(page, path, steps=2)
    page.wait_for_timeout(300)
    page.mouse.click(3, 3)
    page.wait_for_function("() => window._pvwb_changes['pvwb-balanced-vectors'].length > 0",
                           timeout=30000)
    page.wait_for_timeout(800)
    after = page.evaluate("""() => {
      const d = Bokeh.documents[0];
      return {xs: Array.from(d.get_model_by_name('pvwb-pieces').data.xs[0]),
              z: d.get_model_by_name('pvwb-height-pos').data.xs.length + ':' +
                 JSON.stringify(d.get_model_by_name('pvwb-balanced-vectors').data.x1.slice(0, 50))};
    }""")
    assert "edited" in _status(page), _status(page)
    assert max(after["xs"]) > max(before["xs"]) + 2 * rx
    assert after["z"] != before["z"]  # the balanced flow changed with the outline
    _shot(page, "timeloop_vertex_edit.png")
    # one undo step brings the outline back
    _focus_page(page)
    page.keyboard.press("Control+z")
    page.wait_for_function(f"""() => Math.max(...Bokeh.documents[0].get_model_by_name(
        'pvwb-pieces').data.xs[0]) < {max(before['xs']) + 1e-6}""", timeout=30000)
    assert _problems(page) == []


def test_following_piece_outline_differs_between_two_times(page, anomaly_centre, times):
    _back_to_first_time(page, times)
    choose_mouse_mode(page, "Lasso a piece")
    page.locator(".pvwb-lasso-follow input").check()
    page.evaluate("() => window.scrollTo(0, 0)")  # the box is below the fold; the map is not
    page.wait_for_timeout(300)
    lon, lat, rx, ry = anomaly_centre
    _drag(page, ring(lon, lat, 1.3 * rx, 1.3 * ry))
    page.wait_for_function(f"() => ({JS_PIECES})().length == 2", timeout=60000)
    outline = """(name) => {
      const d = Bokeh.documents[0].get_model_by_name('pvwb-pieces').data;
      const k = d.name.indexOf(name);
      return k < 0 ? null : [Array.from(d.xs[k]), Array.from(d.ys[k])];
    }"""
    name = page.evaluate(JS_PIECES)[1]
    first = page.evaluate(outline, name)
    _focus_page(page)
    _arm_source(page, "pvwb-pieces")
    t0 = page.evaluate("() => performance.now()")
    page.keyboard.press("ArrowRight")
    _wait_title(page, times[1])
    page.wait_for_function("() => window._pvwb_changes['pvwb-pieces'].length > 0", timeout=60000)
    step_ms = page.evaluate("(t0) => window._pvwb_changes['pvwb-pieces'].slice(-1)[0] - t0", t0)
    print(f"time step with a tracked piece: key to tracked outline {step_ms:.0f} ms")
    page.wait_for_timeout(500)
    second = page.evaluate(outline, name)
    assert second is not None
    assert len(first[0]) != len(second[0]) or not np.allclose(first, second)
    labels = page.evaluate("() => Bokeh.documents[0].get_model_by_name('pvwb-piece-labels').data.text")
    assert any("tracked" in t or "lost" in t for t in labels), labels
    assert page.locator(".pvwb-pieces").get_by_text("follows its anomaly").count() == 1
    _shot(page, "timeloop_tracked_t1.png")
    page.keyboard.press("ArrowLeft")
    _wait_title(page, times[0])
    page.wait_for_timeout(500)
    back = page.evaluate(outline, name)
    assert np.allclose(back, first)  # at the time it was drawn: the lassoed outline
    _shot(page, "timeloop_tracked_t0.png")
    page.locator(".pvwb-lasso-follow input").uncheck()
    page.evaluate("() => window.scrollTo(0, 0)")
    assert _problems(page) == []


def test_delete_key_removes_the_selected_piece_and_an_arrow_is_drawn(page, anomaly_centre):
    name = page.evaluate(JS_PIECES)[1]
    page.locator(".pvwb-pieces").get_by_text(name, exact=True).click()
    page.wait_for_timeout(500)
    _focus_page(page)
    page.keyboard.press("Delete")
    page.wait_for_function(f"() => ({JS_PIECES})().length == 1", timeout=30000)
    assert name not in page.evaluate(JS_PIECES)
    choose_mouse_mode(page, "Draw an arrow")
    page.evaluate("() => window.scrollTo(0, 0)")
    page.wait_for_timeout(300)
    lon, lat, rx, ry = anomaly_centre
    tail, head = page.evaluate(JS_TO_SCREEN, [(lon - 2 * rx, lat - ry), (lon, lat - ry)])
    page.mouse.click(*tail)
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name('pvwb-arrow-tail')"
                           ".data.x.length == 1", timeout=30000)
    page.wait_for_timeout(700)  # two quick clicks would be a double click
    page.mouse.click(*head)
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name('pvwb-ann-arrows')"
                           ".data.x0.length == 1", timeout=30000)
    x0, x1 = page.evaluate("""() => {const d = Bokeh.documents[0].get_model_by_name(
        'pvwb-ann-arrows').data; return [d.x0[0], d.x1[0]]; }""")
    assert x1 - x0 > 1.5 * rx  # drawn from west to east
    _shot(page, "timeloop_arrow.png")
    # move its head north by dragging the square at the head
    choose_mouse_mode(page, "Move annotations")
    page.evaluate("() => window.scrollTo(0, 0)")
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name('pvwb-ann-handle-glyphs')"
                           ".visible", timeout=30000)
    y1 = page.evaluate("() => Bokeh.documents[0].get_model_by_name('pvwb-ann-arrows').data.y1[0]")
    _drag(page, [(lon, lat - ry), (lon, lat - 0.5 * ry), (lon, lat + ry)])
    page.wait_for_function(f"() => Bokeh.documents[0].get_model_by_name('pvwb-ann-arrows')"
                           f".data.y1[0] > {y1} + 0.5", timeout=30000)
    assert "Moved 1 annotation" in _status(page)
    _shot(page, "timeloop_arrow_moved.png")
    assert _problems(page) == []
