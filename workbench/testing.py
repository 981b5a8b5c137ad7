"""Driving the served app in headless Chromium: shared by the browser tests and the lasso
latency benchmark. Uses Debian's /usr/bin/chromium through Playwright (never a downloaded
browser) and a `pvwb serve` subprocess on 127.0.0.1."""
from __future__ import annotations

import math
import os
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

__all__ = ["CHROMIUM", "CHROMIUM_ARGS", "JS_TO_SCREEN", "JS_MAP_READY", "choose_mouse_mode",
           "ring", "drag_on_map", "free_port", "start_server", "stop_server"]

ROOT = Path(__file__).resolve().parents[1]
CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"]

#: map (lon, lat) points to page pixels through the map figure's own scales
JS_TO_SCREEN = """(pts) => {
  const fig = Bokeh.documents[0].get_model_by_name('pvwb-map');
  const v = Bokeh.index.find_one(fig);
  const r = v.canvas_view.el.getBoundingClientRect();
  const xs = v.frame.x_scale, ys = v.frame.y_scale;
  return pts.map(([x, y]) => [r.left + xs.compute(x), r.top + ys.compute(y)]);
}"""

#: true once the page's Bokeh document holds the map
JS_MAP_READY = ("() => window.Bokeh && Bokeh.documents.length > 0 && "
                "Bokeh.documents[0].get_model_by_name('pvwb-map') != null")


#: the map tool each mouse mode switches on, by the start of the tool's description
MODE_TOOLS = {"Lasso a piece": "Lasso a piece", "Draw a section": "Draw a section",
              "Pick target point": "Pick the attribution", "Place a label": "Pick the attribution",
              "Draw an arrow": "Pick the attribution", "Edit piece outlines": "Edit piece outlines",
              "Move annotations": "Move annotations", "Pan / zoom": None}

JS_MODE_ON = """(prefix) => {
  const tb = Bokeh.documents[0].get_model_by_name('pvwb-map').toolbar;
  const on = [tb.active_drag, tb.active_tap, tb.active_multi].filter(t => t != null);
  if (prefix == null)  // pan / zoom: the pan tool dragging, no tap or several-gesture tool
    return tb.active_tap == null && tb.active_multi == null && on.length == 1;
  return on.some(t => (t.description || '').startsWith(prefix));
}"""


def choose_mouse_mode(page, label, timeout=30000):
    """Click the mouse-mode button ``label`` and wait until the server has switched the map's
    tool on in the browser (a click on the map before that goes to the old tool)."""
    page.get_by_role("button", name=label).first.click()
    page.wait_for_function(JS_MODE_ON, arg=MODE_TOOLS[label], timeout=timeout)


def ring(lon, lat, rx, ry, n=36):
    """A closed ellipse of ``n`` + 1 (lon, lat) points round (``lon``, ``lat``), semi-axes
    ``rx``, ``ry`` degrees (a lasso's path)."""
    return [(lon + rx * math.cos(t), lat + ry * math.sin(t))
            for t in [2 * math.pi * k / n for k in range(n + 1)]]


def drag_on_map(page, lonlat, steps=3, before_release=None):
    """Press the mouse at the first (lon, lat) of the map, move through the others
    (``steps`` mouse events each) and release; ``before_release()`` runs with the button
    still held (e.g. a key press)."""
    pts = page.evaluate(JS_TO_SCREEN, lonlat)
    page.mouse.move(*pts[0])
    page.mouse.down()
    for x, y in pts[1:]:
        page.mouse.move(x, y, steps=steps)
    if before_release is not None:
        before_release()
    page.mouse.up()


def free_port() -> int:
    """A free TCP port on 127.0.0.1."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_server(case, port, log, extra_args=(), timeout=120.0):
    """Start `pvwb serve CASE --page-port PORT [extra_args]` writing to the open file ``log``;
    return (process, url) once the page answers. Raises RuntimeError (with the log's tail when
    the server exits) if it does not answer within ``timeout`` seconds."""
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.Popen([sys.executable, "-m", "workbench.cli", "serve", str(case),
                             "--page-port", str(port), *map(str, extra_args)],
                            cwd=str(ROOT), env=env, stdout=log, stderr=subprocess.STDOUT)
    url = f"http://127.0.0.1:{port}/"
    t0 = time.time()
    while True:
        if proc.poll() is not None:
            log.flush()
            tail = Path(log.name).read_text()[-2000:] if hasattr(log, "name") else ""
            raise RuntimeError(f"server exited with {proc.returncode}: {tail}")
        try:
            urllib.request.urlopen(url, timeout=5).read(100)
            return proc, url
        except Exception:
            if time.time() - t0 > timeout:
                proc.kill()
                raise RuntimeError(f"server did not answer within {timeout:g} s") from None
            time.sleep(0.5)


def stop_server(proc, wait=20.0):
    """Terminate the server, killing it if it does not stop within ``wait`` seconds."""
    proc.terminate()
    try:
        proc.wait(wait)
    except subprocess.TimeoutExpired:
        proc.kill()
