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
