"""The quick-start notebook served by Voilà on 127.0.0.1 with the workbench's page template
(``--template=pvwb-offline``, in ``share/jupyter/voila/templates``), opened in Debian's Chromium
with every non-loopback request aborted and recorded: the workbench renders (its Bokeh map
document arrives), nothing at all leaves the machine, and the page shows the caution.

Panel reaches Voilà through its ipywidgets route (jupyter_bokeh), as in the other front ends
that host ipywidgets only (PANEL_COMMS=ipywidgets in the kernel's environment).

Voilà's own "lab" template links two Font Awesome stylesheets on a public CDN; the
workbench's template is that template without them. The second test shows the gap that
template closes: the same page with Voilà's own template asks for exactly those two.
"""
from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

from test_notebooks_offline import JS_DOC, _loopback
from workbench.export import CAUTION
from workbench.testing import CHROMIUM, CHROMIUM_ARGS, free_port

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = Path(__file__).parent / "artifacts"
NOTEBOOK = "01_quick_start.ipynb"  # the shortest notebook
VOILA_TEMPLATE_CDN = "https://cdn.jsdelivr.net/npm/@fortawesome/fontawesome-free@"


def _serve(tmp_path_factory, template):
    pytest.importorskip("voila")
    if not Path(CHROMIUM).exists():
        pytest.skip(f"{CHROMIUM} is missing: install Debian's chromium package")
    base = tmp_path_factory.mktemp("voila")
    root = base / "notebooks"
    shutil.copytree(ROOT / "notebooks", root)
    for sub in ("config", "runtime", "data", "ipython"):
        (base / sub).mkdir()
    port = free_port()
    env = dict(os.environ, JUPYTER_CONFIG_DIR=str(base / "config"),
               JUPYTER_RUNTIME_DIR=str(base / "runtime"), IPYTHONDIR=str(base / "ipython"),
               PANEL_COMMS="ipywidgets", JUPYTER_PATH=str(ROOT / "share" / "jupyter"),
               PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    log = open(base / "voila.log", "w")
    proc = subprocess.Popen([sys.executable, "-m", "voila", NOTEBOOK, "--no-browser",
                             f"--port={port}", "--Voila.ip=127.0.0.1", f"--template={template}"],
                            cwd=str(root), env=env, stdout=log, stderr=subprocess.STDOUT)
    url = f"http://127.0.0.1:{port}/"
    t0 = time.time()
    try:
        while True:
            if proc.poll() is not None:
                pytest.fail(f"voila exited: {(base / 'voila.log').read_text()[-2000:]}")
            if "is running at" in (base / "voila.log").read_text():
                break
            if time.time() - t0 > 120:
                pytest.fail("voila did not start within 120 s")
            time.sleep(0.5)
        from playwright.sync_api import sync_playwright

        requests, outside, errors = [], [], []
        with sync_playwright() as p:
            browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
            ctx = browser.new_context(viewport={"width": 1280, "height": 1000})

            def route(r):
                requests.append(r.request.url)
                if _loopback(r.request.url):
                    r.continue_()
                else:
                    outside.append(r.request.url)
                    r.abort()

            ctx.route("**/*", route)
            page = ctx.new_page()
            page.on("pageerror", lambda e: errors.append(str(e)))
            t1 = time.time()
            page.goto(url, timeout=240_000)  # Voilà runs every cell before it answers
            rendered = False
            while time.time() - t1 < 240:
                if page.evaluate(f"!!{JS_DOC}"):
                    rendered = True
                    break
                time.sleep(0.5)
            seconds = time.time() - t1
            text = page.inner_text("body")
            ARTIFACTS.mkdir(exist_ok=True)
            page.screenshot(path=str(ARTIFACTS / f"voila_quick_start_{template}.png"))
            browser.close()
        yield dict(rendered=rendered, seconds=seconds, requests=requests, outside=outside,
                   errors=errors, text=text)
    finally:
        proc.terminate()
        try:
            proc.wait(20)
        except subprocess.TimeoutExpired:
            proc.kill()
        log.close()


@pytest.fixture(scope="module")
def voila_page(tmp_path_factory):
    yield from _serve(tmp_path_factory, "pvwb-offline")


def test_voila_renders_the_workbench_offline(voila_page):
    v = voila_page
    assert v["rendered"], f"no workbench map after {v['seconds']:.0f} s; page errors: {v['errors'][:3]}"
    assert len(v["requests"]) > 20  # the page and its resources really went through the route
    assert v["outside"] == [], v["outside"]  # nothing at all left the machine
    assert not v["errors"], v["errors"][:3]
    assert "not forecasts or warnings" in v["text"] or CAUTION in v["text"]


def test_voilas_own_template_would_ask_for_two_icon_stylesheets(tmp_path_factory):
    served = _serve(tmp_path_factory, "lab")
    try:
        v = next(served)
    finally:
        served.close()  # stops Voilà
    assert v["rendered"]
    assert len(v["outside"]) == 2 and all(u.startswith(VOILA_TEMPLATE_CDN) for u in v["outside"]), \
        v["outside"]
