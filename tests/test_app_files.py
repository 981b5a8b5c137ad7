"""Opening files from the served page in headless Chromium: the data-folder list shows each
file's times and size; an uploaded small invented netCDF file opens; an upload that is not
netCDF gives the usual one-line error and the page keeps working; a file over the cap is
refused in the browser before it is sent. The server runs with PVWB_UPLOAD_MAX_MB=2.
Screenshots go to /tmp/shots/readouts/ and tests/artifacts/."""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from browser_served import served_page, status, wait_status
from conftest import wave_dataset

pytestmark = [pytest.mark.browser, pytest.mark.slow]

ROOT = Path(__file__).resolve().parents[1]
ARTIFACTS = Path(__file__).parent / "artifacts"
SHOTS = Path("/tmp/shots/readouts")


def _small_wave(path):
    """An invented wave case small enough for the 2 MB cap (a fixture, not a check value)."""
    wave_dataset(lat=np.arange(30.0, 60.01, 2.0), lon=np.arange(-40.0, 40.01, 2.0)).to_netcdf(path)
    return path


@pytest.fixture(scope="module")
def files(tmp_path_factory, small_case_path):
    SHOTS.mkdir(parents=True, exist_ok=True)
    root = tmp_path_factory.mktemp("files")
    folder = root / "data"
    folder.mkdir()
    samples = sorted((ROOT / "sample_cases").glob("*.nc"))
    src = samples[0] if samples else small_case_path
    shutil.copy(src, folder / src.name)
    _small_wave(folder / "listed_wave.nc")
    up = root / "to_upload"
    up.mkdir()
    good = _small_wave(up / "uploaded wave.nc")
    bad = up / "broken.nc"
    bad.write_bytes(b"CDF\x01" + b"this is not a netCDF file " * 400)
    big = up / "big.nc"
    big.write_bytes(np.random.default_rng(0).bytes(3 * 1024 * 1024))
    return dict(case=folder / src.name, folder=folder, good=good, bad=bad, big=big)


@pytest.fixture(scope="module")
def page(files):
    with served_page(files["case"], files["folder"], files["folder"].parent / "server.log",
                     env={"PVWB_UPLOAD_MAX_MB": "2"}) as pg:
        yield pg


def _upload(page, path):
    page.locator(".pvwb-upload input[type=file]").set_input_files(str(path))


def test_data_folder_list_shows_times_and_sizes(page, files):
    table = page.locator(".pvwb-file-table")
    table.scroll_into_view_if_needed()
    row = table.get_by_text("listed_wave.nc", exact=False)
    assert row.count() >= 1
    cells = table.locator(".tabulator-cell")
    text = " | ".join(cells.nth(k).inner_text().replace("\n", " ") for k in range(cells.count()))
    assert "2: 2031-01-01 00:00 … 2031-01-01 06:00 UTC" in text, text
    assert "kB" in text and "MB" in text
    if files["case"].name == "skerrywind.nc":
        assert "15: 2051-02-09 00:00 … 2051-02-12 12:00 UTC" in text
    page.screenshot(path=str(SHOTS / "file_list.png"))
    assert page.problems == []


def test_upload_of_a_bad_file_shows_the_error_and_the_page_keeps_working(page, files):
    title = page.evaluate("() => Bokeh.documents[0].get_model_by_name('pvwb-map').title.text")
    _upload(page, files["bad"])
    level = page.locator(".pvwb-status-text")
    for _ in range(300):  # "Opening broken.nc …" first, then the error
        if level.get_attribute("data-level") == "error":
            break
        page.wait_for_timeout(100)
    text = status(page)
    assert "broken.nc" in text and "\n" not in text.strip()
    assert page.locator(".pvwb-status-text").get_attribute("data-level") == "error"
    page.screenshot(path=str(SHOTS / "upload_bad.png"))
    for _ in range(50):  # removed again, with its folder
        if not list(files["folder"].glob(".pvwb-upload-*/broken.nc")):
            break
        page.wait_for_timeout(100)
    assert not list(files["folder"].glob(".pvwb-upload-*/broken.nc"))
    # the page still works: same map, and a new field draws
    assert page.evaluate("() => Bokeh.documents[0].get_model_by_name('pvwb-map')"
                         ".title.text") == title
    field = page.locator("select").filter(has=page.locator("option", has_text="wind speed"))
    field.select_option(label=field.locator("option", has_text="wind speed").inner_text())
    page.wait_for_function("() => Bokeh.documents[0].get_model_by_name('pvwb-colorbar')"
                           ".title.startsWith('wind speed')", timeout=30000)
    assert [p for p in page.problems if "broken.nc" not in p] == []


def test_upload_of_a_good_file_opens_it(page, files):
    _upload(page, files["good"])
    text = wait_status(page, "Opened")
    assert "uploaded_wave.nc (uploaded" in text, text
    # the new case's map (the wave fixture spans 40 W .. 40 E, 2 degree steps)
    page.wait_for_function("() => Array.from(Bokeh.documents[0]._all_models.values()).some("
                           "m => m.name == 'pvwb-map' && Math.abs(m.x_range.start + 41) < 0.01)",
                           timeout=60000)
    # the old case's map (and its data) leaves the browser's model index: one map is found by
    # name, as the page's own key handling and these tests look it up
    page.wait_for_function("() => Array.from(Bokeh.documents[0]._all_models.values()).filter("
                           "m => m.name == 'pvwb-map').length == 1", timeout=30000)
    assert abs(page.evaluate("() => Bokeh.documents[0].get_model_by_name('pvwb-map')"
                             ".x_range.start") + 41) < 0.01
    saved = list(files["folder"].glob(".pvwb-upload-*/uploaded_wave.nc"))
    assert len(saved) == 1 and saved[0].stat().st_size == files["good"].stat().st_size
    page.mouse.move(5, 5)
    page.evaluate("() => window.scrollTo(0, 0)")
    page.wait_for_timeout(300)
    page.screenshot(path=str(SHOTS / "upload_good.png"))
    page.screenshot(path=str(ARTIFACTS / "app_upload.png"), full_page=True)
    # nothing asked off the machine after the case switch (rebuilt panels included)
    assert [p for p in page.problems if "broken.nc" not in p] == []


def test_upload_over_the_cap_is_refused_before_it_is_sent(page, files):
    before = status(page)
    _upload(page, files["big"])
    msg = page.get_by_text("too large", exact=False)
    msg.first.wait_for(timeout=15000)
    assert page.get_by_text("2 MB", exact=False).count() + \
        page.get_by_text("2MB", exact=False).count() >= 1
    page.wait_for_timeout(1000)
    assert status(page) == before  # nothing reached the server
    assert not list(files["folder"].glob(".pvwb-upload-*/big.nc"))
    page.screenshot(path=str(SHOTS / "upload_over_cap.png"))
