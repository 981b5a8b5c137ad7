"""Background jobs on the served page in real headless Chromium (Debian's /usr/bin/chromium
through Playwright; no browser is downloaded; requests off 127.0.0.1 are blocked).

A forecaster's sequence on the invented sample storm: load a session (standard pieces, target
at the storm centre), start the briefing PDF, watch its progress, cancel it (no PDF is left),
refine the attribution to nonlinear balance (the table's balance label changes), run a 12 h
and a 36 h what-if from the page (the page answers other clicks meanwhile). Timings are
written to tests/artifacts/app_jobs_timings.json and screenshots to /tmp/shots/jobs/.
"""
from __future__ import annotations

import json
import shutil
import time
import warnings
from pathlib import Path

import pytest

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = Path(__file__).parent / "artifacts"
SHOTS = Path("/tmp/shots/jobs")
from workbench.testing import (CHROMIUM, CHROMIUM_ARGS as ARGS, JS_MAP_READY,  # noqa: E402
                               free_port, start_server, stop_server)

TIMINGS = {}


@pytest.fixture(scope="module")
def folders(tmp_path_factory, sample_case_path):
    """A data folder with the sample storm and a session on it; a separate output folder."""
    import workbench as wb
    from workbench.analysis import standard_pieces, storm_centre
    from workbench.session import save_session
    from workbench.state import State

    base = tmp_path_factory.mktemp("jobs_browser")
    data, out = base / "data", base / "out"
    data.mkdir()
    out.mkdir()
    case_file = data / sample_case_path.name
    shutil.copy(sample_case_path, case_file)
    case = wb.open_case(case_file)
    st = State(case)
    st.pieces = standard_pieces()
    lon, lat = storm_centre(case, 0)
    st.set_target(lon, lat, 950.0)
    st.briefing = {"headline": "Invented storm: upper trough drives the deepening",
                   "pages": ["map", "tropopause", "attribution", "tendency"]}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        save_session(st, data / "jobs-session.json")
    return case_file, out


@pytest.fixture(scope="module")
def server(folders):
    case_file, out = folders
    log = open(out.parent / "server.log", "w")
    try:
        proc, url = start_server(case_file, free_port(), log,
                                 ["--data-folder", case_file.parent, "--output-folder", out])
    except RuntimeError as exc:
        log.close()
        pytest.fail(str(exc))
    yield url
    stop_server(proc)
    log.close()
    ARTIFACTS.mkdir(exist_ok=True)
    (ARTIFACTS / "app_jobs_timings.json").write_text(json.dumps(TIMINGS, indent=2))


@pytest.fixture(scope="module")
def page(server):
    if not Path(CHROMIUM).exists():
        pytest.skip(f"{CHROMIUM} is missing: install Debian's chromium package")
    from playwright.sync_api import sync_playwright

    SHOTS.mkdir(parents=True, exist_ok=True)
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        context = browser.new_context(viewport={"width": 1500, "height": 1300})
        context.route("**/*", lambda route: route.continue_()
                      if route.request.url.startswith(("http://127.0.0.1", "ws://127.0.0.1",
                                                       "data:", "blob:"))
                      else route.abort())
        pg = context.new_page()
        pg.problems = []
        pg.on("pageerror", lambda e: pg.problems.append(str(e)))
        pg.goto(server)
        pg.wait_for_function(JS_MAP_READY, timeout=120000)
        pg.wait_for_timeout(1000)
        yield pg
        browser.close()


def _status(page):
    return page.locator(".pvwb-status-text").inner_text()


def _wait_status(page, words, timeout=120.0):
    deadline = time.time() + timeout
    while time.time() < deadline:
        text = _status(page)
        if any(w in text for w in words):
            return text
        page.wait_for_timeout(50)
    raise AssertionError(f"status never said {words}: {_status(page)!r}")


def _job_text(page):
    loc = page.locator(".pvwb-job-label")
    return loc.inner_text() if loc.count() and loc.is_visible() else ""


def _tab(page, name):
    page.get_by_text(name, exact=True).first.click()
    page.wait_for_timeout(300)


def test_load_the_session(page):
    _tab(page, "Save & export")
    sel = page.locator(".pvwb-session-list select")
    sel.select_option(label=sel.locator("option", has_text="jobs-session.json").inner_text())
    page.locator(".pvwb-load-session button").click()
    text = _wait_status(page, ["Loaded session", "error", "✖"])
    assert "Loaded session jobs-session.json" in text, text
    assert page.locator(".pvwb-brief-headline input").input_value().startswith("Invented storm")


def test_briefing_progress_then_cancel_leaves_no_pdf(page, folders):
    _, out = folders
    before = sorted(p.name for p in out.iterdir())
    t0 = time.perf_counter()
    page.locator(".pvwb-export-brief button").click()
    texts, t_first, t_progress = [], None, None
    deadline = time.time() + 60
    while time.time() < deadline:
        t = _job_text(page)
        if t and (not texts or texts[-1] != t):
            texts.append(t)
            if t_first is None:
                t_first = time.perf_counter() - t0
            if "made" in t and t_progress is None:
                t_progress = time.perf_counter() - t0
            if len(texts) >= 2 and "made" in t:  # the text changed at least once
                break
        page.wait_for_timeout(20)
    assert t_progress is not None, texts
    page.mouse.move(5, 5)
    page.screenshot(path=str(SHOTS / "briefing_progress.png"), full_page=False)
    tc = time.perf_counter()
    page.locator(".pvwb-job-cancel button").click()
    text = _wait_status(page, ["cancelled", "Briefing saved"], timeout=60)
    cancel_s = time.perf_counter() - tc
    assert "cancelled" in text, text
    assert page.locator(".pvwb-status-text").get_attribute("data-level") == "warning"
    assert any(" of 5 made" in t for t in texts) and len(texts) >= 2, texts  # the text changed
    time.sleep(0.5)
    assert sorted(p.name for p in out.iterdir()) == before  # no PDF, no temporary file
    assert not page.locator(".pvwb-job").is_visible()
    page.screenshot(path=str(SHOTS / "briefing_cancelled.png"), full_page=False)
    TIMINGS.update(briefing_click_to_readout_s=round(t_first, 3),
                   briefing_click_to_first_page_progress_s=round(t_progress, 3),
                   briefing_cancel_click_to_status_s=round(cancel_s, 3), briefing_texts=texts)


def test_refine_changes_the_balance_label_to_nonlinear(page):
    _tab(page, "Attribution")
    assert page.locator(".pvwb-balance[data-balance='qg']").count() == 1
    t0 = time.perf_counter()
    page.locator(".pvwb-refine button").click()
    seen = set()
    deadline = time.time() + 120
    while time.time() < deadline and not page.locator(".pvwb-balance[data-balance='nonlinear']").count():
        t = _job_text(page)
        if t:
            seen.add(t)
        page.wait_for_timeout(30)
    refine_s = time.perf_counter() - t0
    assert page.locator(".pvwb-balance[data-balance='nonlinear']").count() == 1, _status(page)
    table = page.locator(".pvwb-attribution")
    table.get_by_text("nonlinear remainder").first.wait_for(timeout=10000)
    assert table.get_by_text("QG", exact=True).count() == 0  # every row says nonlinear
    assert table.get_by_text("nonlinear", exact=True).count() >= 3
    assert "refined" in _wait_status(page, ["refined", "✖"], timeout=30)
    assert any("Newton step" in t for t in seen), seen
    page.mouse.move(5, 5)
    page.screenshot(path=str(SHOTS / "refined.png"), full_page=False)
    TIMINGS.update(refine_click_to_nonlinear_table_s=round(refine_s, 3))


def _run_whatif(page, hours, during=None):
    _tab(page, "Why & what if")
    box = page.locator(".pvwb-whatif-hours input")
    box.fill(str(hours))
    box.press("Enter")
    page.wait_for_timeout(300)
    t0 = time.perf_counter()
    page.locator(".pvwb-whatif-run button").click()
    page.locator(".pvwb-job").wait_for(state="visible", timeout=10000)
    if during is not None:
        during()
    text = _wait_status(page, ["What-if ready", "✖", "error"], timeout=300)
    elapsed = time.perf_counter() - t0
    assert "What-if ready" in text, text
    _tab(page, "Why & what if")
    page.wait_for_timeout(500)
    return elapsed


def test_whatif_12h_from_the_page(page):
    elapsed = _run_whatif(page, 12)
    table = page.locator(".pvwb-whatif-table")
    table.get_by_text("Δ hPa").first.wait_for(timeout=10000)
    assert table.get_by_text("12", exact=True).count() >= 1  # the +h column
    assert page.locator(".pvwb-whatif-title").get_by_text("QG what-if experiment, not a forecast").count() == 1
    page.mouse.move(5, 5)
    page.screenshot(path=str(SHOTS / "whatif_12h.png"), full_page=True)
    TIMINGS.update(whatif_12h_click_to_table_s=round(elapsed, 3))


def test_whatif_36h_while_the_page_answers_other_clicks(page):
    answered = {}

    def during():
        # the page keeps serving: switch the balance back to QG while the run goes on
        _tab(page, "Attribution")
        t0 = time.perf_counter()
        page.locator(".pvwb-balance-choice").get_by_text("QG (instant)").click()
        page.locator(".pvwb-balance[data-balance='qg']").wait_for(timeout=10000)
        answered["s"] = time.perf_counter() - t0
        answered["job_still_running"] = page.locator(".pvwb-job").is_visible()
        page.screenshot(path=str(SHOTS / "whatif_running_page_usable.png"), full_page=False)

    elapsed = _run_whatif(page, 36, during)
    assert answered["job_still_running"], answered
    assert answered["s"] < 3.0, answered
    table = page.locator(".pvwb-whatif-table")
    table.get_by_text("Δ hPa").first.wait_for(timeout=10000)
    assert table.get_by_text("36", exact=True).count() >= 1  # the +h column
    page.mouse.move(5, 5)
    page.screenshot(path=str(SHOTS / "whatif_36h.png"), full_page=True)
    TIMINGS.update(whatif_36h_click_to_table_s=round(elapsed, 3),
                   balance_switch_during_job_s=round(answered["s"], 3))
    assert page.problems == []
