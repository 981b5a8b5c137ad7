"""Helpers of the read-out, compare and file browser tests: a served page in Debian's
headless Chromium (Playwright's Python API, never a downloaded browser) with every request
off 127.0.0.1 aborted, and page-pixel positions of data points of any named figure."""
from __future__ import annotations

import contextlib
import os
from pathlib import Path
from urllib.parse import urlparse

import pytest

from workbench.testing import (CHROMIUM, CHROMIUM_ARGS, JS_MAP_READY, free_port, start_server,
                               stop_server)

#: (figure name, [(x, y), ...] in data units) -> page pixels, through the figure's own scales
JS_FIG_TO_SCREEN = """([name, pts]) => {
  const fig = Bokeh.documents[0].get_model_by_name(name);
  const v = Bokeh.index.find_one(fig);
  const r = v.canvas_view.el.getBoundingClientRect();
  const xs = v.frame.x_scale, ys = v.frame.y_scale;
  return pts.map(([x, y]) => [r.left + xs.compute(x), r.top + ys.compute(y)]);
}"""

#: the visible x range of a figure's view (what the browser draws)
JS_VIEW_X = """(name) => {
  const v = Bokeh.index.find_one(Bokeh.documents[0].get_model_by_name(name));
  return [v.frame.x_range.start, v.frame.x_range.end];
}"""


@contextlib.contextmanager
def served_page(case, data_dir, log_path, env=None, viewport=(1500, 1300)):
    """Serve ``case`` with ``data_dir`` as data folder and open it in Chromium; yields the
    page (``page.problems`` collects console errors, page errors, failed requests and the
    aborted off-machine requests)."""
    if not Path(CHROMIUM).exists():
        pytest.skip(f"{CHROMIUM} is missing: install Debian's chromium package")
    from playwright.sync_api import sync_playwright

    old = {k: os.environ.get(k) for k in (env or {})}
    os.environ.update(env or {})
    log = open(log_path, "w")
    try:
        proc, url = start_server(case, free_port(), log, ["--data-folder", data_dir])
    except RuntimeError as exc:
        log.close()
        pytest.fail(str(exc))
    finally:
        for k, v in old.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
    try:
        with sync_playwright() as p:
            browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
            context = browser.new_context(viewport=dict(width=viewport[0], height=viewport[1]))
            page = context.new_page()
            page.problems = []

            def route(r):
                host = urlparse(r.request.url).hostname
                if host in ("127.0.0.1", "localhost") or r.request.url.startswith(("data:", "blob:")):
                    r.continue_()
                else:
                    page.problems.append(f"off-machine request aborted: {r.request.url}")
                    r.abort()

            context.route("**/*", route)
            page.on("console", lambda m: m.type == "error" and page.problems.append(m.text))
            page.on("pageerror", lambda e: page.problems.append(str(e)))
            page.goto(url)
            page.wait_for_function(JS_MAP_READY, timeout=120000)
            page.wait_for_timeout(1500)
            yield page
            browser.close()
    finally:
        stop_server(proc)
        log.close()


def status(page):
    return page.locator(".pvwb-status-text").inner_text()


def wait_status(page, text, timeout=60000):
    """Wait until the status line contains ``text``; returns the status."""
    import time

    deadline = time.time() + timeout / 1000
    while text not in status(page) and time.time() < deadline:
        page.wait_for_timeout(150)
    return status(page)


def drag(page, fig, pts, steps=3):
    """Press, move through ``pts`` (data units of figure ``fig``) and release."""
    px = page.evaluate(JS_FIG_TO_SCREEN, [fig, pts])
    page.mouse.move(*px[0])
    page.mouse.down()
    for x, y in px[1:]:
        page.mouse.move(x, y, steps=steps)
    page.mouse.up()
    return px
