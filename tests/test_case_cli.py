"""The Case model, its cache and repr, the layering rule, and the info/invert commands."""
from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

import workbench as wb
from workbench.errors import InputError


def test_case_metadata_and_repr(small_case):
    s = small_case.summary()
    assert s["n_times"] == 2 and s["grid"]["nz"] == small_case.data.sizes["pressure"]
    text = repr(small_case)
    assert "times:" in text and "levels:" in text and "hPa" in text
    assert "<table>" in small_case._repr_html_()
    # f0 at the central latitude (2 Omega sin phi; from memory Omega = 7.292e-5 s-1)
    lat = 0.5 * (s["domain"]["lat_min"] + s["domain"]["lat_max"])
    assert small_case.f0 == pytest.approx(2 * 7.292115e-5 * np.sin(np.deg2rad(lat)), rel=1e-6)


def test_derived_fields_cached(small_case):
    a = small_case.pv(1)
    assert small_case.pv(1) is a
    assert small_case.isentropic([320.0], 1) is small_case.isentropic([320.0], 1)
    assert small_case.pv(0) is not a


def test_time_selection_errors(small_case):
    with pytest.raises(InputError, match="out of range"):
        small_case.at(5)
    with pytest.raises(InputError, match="not in the case"):
        small_case.at("1999-01-01T00")
    assert small_case.time_index(str(small_case.times[1])) == 1


def test_map_fields_on_each_surface(small_case):
    for field in wb.Case.MAP_FIELDS:
        da = small_case.map_field(field, 320.0, 1)
        assert da.dims == ("latitude", "longitude") and da.attrs["surface"] == "320 K"
    assert small_case.map_field("pressure", "tropopause", 1).attrs["units"] == "Pa"
    assert small_case.map_field("ertel_pv", "500hPa", 1).attrs["units"] == "PVU"
    with pytest.raises(InputError, match="not a level"):
        small_case.map_field("u", "510hPa")
    with pytest.raises(InputError, match="constant on the dynamic tropopause"):
        small_case.map_field("ertel_pv", "tropopause")


def test_full_inversion_reproduces_case_anomaly(small_case):
    # Closure: the full inversion of the case's own QG PV anomaly, boundary theta' and lateral
    # geopotential returns the geopotential anomaly (data minus reference) on the same grid.
    from workbench.analysis import standard_pieces

    anom = small_case.anomaly(1)
    res = small_case.inversion(standard_pieces(), 1)
    err = np.abs(res["total"]["geopotential_anomaly"].values - anom["geopotential_anomaly"].values).max()
    assert err < 1e-6 * np.abs(anom["geopotential_anomaly"].values).max()


def test_computation_layers_import_no_plotting_or_widgets(small_case_path):
    # Architecture rule (DEVELOPERS.md): computation never imports plotting or widget libraries.
    code = (
        "import sys, workbench as wb\n"
        "from workbench import physics, io, case, analysis, batch\n"
        "from workbench.inversion import operator, solver, fields, pieces, omega\n"
        f"c = wb.open_case({str(small_case_path)!r}); analysis.analyse(c, 1); c.isentropic([320.0], 1)\n"
        "bad = [m for m in ('matplotlib.pyplot', 'cartopy', 'holoviews', 'panel', 'bokeh', 'hvplot', 'geoviews')"
        " if m in sys.modules]\n"
        "print('LOADED', bad)\n")
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr[-2000:]
    assert "LOADED []" in r.stdout, r.stdout
    # MetPy's unit registry itself loads matplotlib's unit support (pint.matplotlib), so check our
    # own computation modules' import statements as well.
    import ast
    from pathlib import Path

    root = Path(wb.__file__).parent
    files = [root / f for f in ("io.py", "physics.py", "case.py", "analysis.py", "batch.py", "units.py")]
    files += sorted((root / "inversion").glob("*.py"))
    for f in files:
        for node in ast.walk(ast.parse(f.read_text())):
            names = [a.name for a in node.names] if isinstance(node, ast.Import) else (
                [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
            for n in names:
                assert n.split(".")[0] not in ("matplotlib", "cartopy", "holoviews", "panel", "bokeh",
                                               "hvplot", "geoviews"), f"{f.name} imports {n}"


def test_cli_info_and_invert(small_case_path, tmp_path, capsys):
    from workbench.cli import main

    assert main(["info", str(small_case_path)]) == 0
    assert "levels:" in capsys.readouterr().out
    out = tmp_path / "attr.csv"
    assert main(["invert", str(small_case_path), "--time", "1", "-o", str(out)]) == 0
    text = capsys.readouterr().out
    assert "not a forecast or warning" in text and "full inversion" in text
    assert out.exists()
    assert main(["invert", str(small_case_path), "--target", "nonsense"]) == 2
    assert "--target must be" in capsys.readouterr().err
    assert main(["bogus"]) == 2
