"""Start-up: computation never imports plotting or widget libraries (fresh interpreters)."""
from __future__ import annotations

import json
import subprocess
import sys

import pytest

PLOTTING = ("matplotlib", "cartopy", "panel", "bokeh", "holoviews", "geoviews", "hvplot")

SCRIPT = """
import json, sys
{body}
print(json.dumps(sorted({{m.split('.')[0] for m in sys.modules}})))
"""


def _modules(body, tmp_path):
    out = subprocess.run([sys.executable, "-c", SCRIPT.format(body=body)], capture_output=True, text=True,
                         timeout=120, cwd=tmp_path, env={"PATH": "/usr/bin:/bin", "MPLBACKEND": "Agg"})
    assert out.returncode == 0, out.stderr[-2000:]
    return set(json.loads(out.stdout.strip().splitlines()[-1]))


def test_open_case_imports_no_plotting_or_widgets(small_case_path, tmp_path):
    mods = _modules(f"import workbench\ncase = workbench.open_case({str(small_case_path)!r})\n"
                    "case.anomaly(0)", tmp_path)
    assert "workbench" in mods and "xarray" in mods
    assert not mods & set(PLOTTING), sorted(mods & set(PLOTTING))


@pytest.mark.parametrize("command", ["info", "invert"])
def test_computation_commands_import_no_plotting(small_case_path, tmp_path, command):
    args = [command, str(small_case_path)] + ([] if command == "info" else ["--quiet", "--time", "0"])
    body = f"from workbench.cli import main\nassert main({args!r}) == 0"
    mods = _modules(body, tmp_path)
    assert not mods & set(PLOTTING), sorted(mods & set(PLOTTING))


def test_units_still_work_without_matplotlib_support(tmp_path):
    mods = _modules("from workbench.units import units\nassert str(units('1 PVU').to('K m**2/kg/s')"
                    ".magnitude) == '1e-06'", tmp_path)
    assert "metpy" in mods and "matplotlib" not in mods


def test_info_on_a_small_file_computes_without_dask(sample_case_path, small_case_path, tmp_path):
    # a small single netCDF file is read without Dask chunks (io.SMALL_FILE_BYTES): nothing is
    # computed through Dask, so its scheduler lookup never imports distributed (about 0.1 s;
    # dask.array itself is imported by xarray's array-type checks whenever Dask is installed)
    for path in (sample_case_path, small_case_path):
        body = f"from workbench.cli import main\nassert main(['info', {str(path)!r}]) == 0"
        mods = _modules(body, tmp_path)
        assert "workbench" in mods and "distributed" not in mods, path


def test_small_and_large_files_give_the_same_case(small_case_path, monkeypatch):
    import warnings

    import numpy as np

    import workbench as wb
    import workbench.io as io

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        small = wb.open_case(small_case_path)
        assert small.data["temperature"].chunks is None  # no Dask
        monkeypatch.setattr(io, "SMALL_FILE_BYTES", 0)  # every file is "large": Dask, one chunk per time
        large = wb.open_case(small_case_path)
        assert large.data["temperature"].chunks is not None
        assert set(large.data["temperature"].chunksizes["time"]) == {1}
        for v in ("temperature", "u", "v", "geopotential"):
            np.testing.assert_array_equal(small.data[v].values, large.data[v].values)
        np.testing.assert_array_equal(small.qgpv(1).values, large.qgpv(1).values)
