"""The command line and the served page on files as forecast centres write them, with no option
beyond the file name(s): projected GRIB2 with grid-relative winds and terrain bitmaps, CF
netCDF on a rotated-pole grid, a one-time file, a folder of files (one per step)."""
from __future__ import annotations

import pytest

import forecast_files as ff
from workbench.cli import main


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("centre")
    crs, x, y, lat2d, lon2d = ff.plane_grid("lambert")
    mountain = (lat2d - 50.0) ** 2 / 9 + (lon2d + 30.0) ** 2 / 25 < 1.0
    out = {
        "lambert_terrain_one_time": d / "lcc_terrain.grib2",
        "polar_stereographic_steps": d / "ps_steps.grib2",
        "rotated_pole_netcdf": d / "rotated.nc",
        "folder_of_steps": d / "steps",
    }
    ff.write_grib(out["lambert_terrain_one_time"], "lambert", below_ground=mountain)
    ff.write_grib(out["polar_stereographic_steps"], "polar_stereographic", times=3, steps=True)
    ff.write_cf_netcdf(out["rotated_pole_netcdf"], "rotated_pole", times=2, grid_relative=True)
    out["folder_of_steps"].mkdir()
    for k in range(3):
        ff.write_grib(out["folder_of_steps"] / f"f{k:03d}.grib2", "lambert", start=3 + k)
    return out


KINDS = ["lambert_terrain_one_time", "polar_stereographic_steps", "rotated_pole_netcdf", "folder_of_steps"]


@pytest.mark.parametrize("kind", KINDS)
def test_info_and_invert_first_try(files, kind, capsys):
    path = str(files[kind])
    assert main(["info", path]) == 0
    assert main(["invert", path, "--time", "0", "--quiet"]) == 0
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    assert "full inversion" in out and "sum of pieces" in out
    assert "Native grid:" in out
    if kind == "lambert_terrain_one_time":
        # one time: a reference that works was chosen and said; terrain handled and said
        assert "area mean" in out or "zonal mean" in out
        assert "below the ground" in out


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["lambert_terrain_one_time", "folder_of_steps"])
def test_brief_first_try(files, kind, tmp_path, capsys):
    from pypdf import PdfReader

    pdf = tmp_path / "brief.pdf"
    assert main(["brief", str(files[kind]), "-o", str(pdf), "--quiet"]) == 0
    text = " ".join(page.extract_text() for page in PdfReader(pdf).pages)
    assert "How the data were read" in text and "Lambert conformal" in text
    assert "not a forecast or warning" in text


@pytest.mark.browser
@pytest.mark.slow
def test_serve_projected_grib_renders(files, tmp_path):
    """`pvwb serve FILE` on a Lambert conformal GRIB2 file with terrain: the page renders its
    map in headless Chromium with no error in the status line."""
    from pathlib import Path

    from playwright.sync_api import sync_playwright

    from workbench.testing import CHROMIUM, CHROMIUM_ARGS, JS_MAP_READY, free_port, start_server, stop_server

    if not Path(CHROMIUM).exists():
        pytest.skip("Debian chromium not installed")
    port = free_port()
    with open(tmp_path / "serve.log", "w") as log:
        proc, url = start_server(files["lambert_terrain_one_time"], port, log)
        try:
            with sync_playwright() as pw:
                browser = pw.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
                page = browser.new_page(viewport={"width": 1280, "height": 900})
                page.goto(url)
                page.wait_for_function(JS_MAP_READY, timeout=90_000)
                page.wait_for_timeout(1500)
                title = page.title()
                # every text of the page, through Panel's shadow roots
                body = page.evaluate("""() => { const out = [];
                  const walk = (n) => { if (n.shadowRoot) walk(n.shadowRoot);
                    for (const c of n.children || []) walk(c);
                    if (n.nodeType === 1 && n.children.length === 0) out.push(n.textContent); };
                  walk(document.body); return out.join(' '); }""")
                art = Path(__file__).parent / "artifacts"
                art.mkdir(exist_ok=True)
                page.screenshot(path=str(art / "serve_lambert_terrain.png"))
                browser.close()
        finally:
            stop_server(proc)
    assert "lcc_terrain.grib2" in title + body
    assert "1 time(s), 12 levels" in body
    assert "Traceback" not in body
