"""netCDF export of balanced fields: CF attributes, provenance, exact values, atomic writes."""
from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

import workbench as wb
from workbench import export
from workbench.errors import ExportError
from workbench.state import State
from workbench.units import units

from conftest import wave_dataset

PIECE = dict(name="upper", kind="interior", polygon=[(-20, 40), (10, 40), (10, 58), (-20, 58)],
             layer=(400, 150), sign=1)


@pytest.fixture
def state(small_case):
    st = State(small_case)
    st.add_piece(**PIECE)
    st.add_boundary_piece("bottom")
    return st


def test_export_writes_cf_variables_with_provenance(state, tmp_path):
    results = state.results()
    t0 = dt.datetime.now(dt.timezone.utc).replace(microsecond=0)
    path = export.export_balanced(results, ["upper", "total"], tmp_path / "b.nc",
                                  case=state.case, settings=state.to_dict())
    with xr.open_dataset(path) as ds:
        ds.load()
    assert ds.attrs["Conventions"] == "CF-1.8"
    assert ds.attrs["workbench_version"] == wb.__version__
    stamp = dt.datetime.fromisoformat(ds.attrs["export_time_utc"].replace("Z", "+00:00"))
    assert t0 - dt.timedelta(seconds=2) <= stamp <= dt.datetime.now(dt.timezone.utc)
    assert ds.attrs["source_sha256"] == state.case.checksum
    assert ds.attrs["source_file"] == state.case.source
    assert "not a forecast" in ds.attrs["caution"]
    settings = json.loads(ds.attrs["settings"])
    assert settings["pieces"][0]["name"] == "upper"
    assert "invented_case" not in ds.attrs  # the fixture is not labelled invented
    # only the chosen pieces, every balanced variable of each
    for var in results["upper"].data_vars:
        assert f"upper_{var}" in ds and f"total_{var}" in ds
    assert not any(v.startswith("surface") for v in ds.data_vars)
    # CF standard names (from memory of the CF standard-name table) and units that a units
    # library (pint, through MetPy's registry) reads as the right dimensions
    # a piece's fields are partial fields: long_name only, never an analysed standard_name;
    # the full inversion's QG winds are geostrophic winds
    assert not any("standard_name" in ds[v].attrs for v in ds.data_vars if v.startswith("upper_"))
    assert "attributed to the piece" in ds["upper_u"].attrs["long_name"]
    assert ds["total_u"].attrs["standard_name"] == "geostrophic_eastward_wind"
    assert ds["total_v"].attrs["standard_name"] == "geostrophic_northward_wind"
    assert ds["total_relative_vorticity"].attrs["standard_name"] == "atmosphere_relative_vorticity"
    assert units(ds["upper_u"].attrs["units"].replace("s-1", "s**-1")).check("[velocity]")
    assert units(ds["upper_height_anomaly"].attrs["units"]).check("[length]")
    assert ds["upper_u"].attrs["piece"] == "upper"
    assert ds["pressure"].attrs["standard_name"] == "air_pressure"
    assert ds["latitude"].attrs["units"] == "degrees_north"
    # values written exactly
    np.testing.assert_array_equal(ds["upper_height_anomaly"].values,
                                  results["upper"]["height_anomaly"].values)
    np.testing.assert_array_equal(ds["total_u"].values, results["total"]["u"].values)


def test_export_from_a_state_and_the_invented_label(tmp_path):
    data = wave_dataset(ntime=2)
    data.attrs["comment"] = "invented storm for a demonstration scenario"
    data.attrs["invented"] = "yes"
    f = tmp_path / "invented.nc"
    data.to_netcdf(f)
    case = wb.open_case(f)
    st = State(case)
    st.add_piece(**PIECE)
    path = export.export_balanced(st, ["upper"], tmp_path / "s.nc")
    with xr.open_dataset(path) as ds:
        assert ds.attrs["invented_case"].startswith("Invented case")
        assert json.loads(ds.attrs["settings"])["pieces"][0]["name"] == "upper"
        assert set(ds.data_vars) == {f"upper_{v}" for v in st.results()["upper"].data_vars}


def test_export_refuses_overwrite_unknown_pieces_and_missing_path(state, tmp_path):
    results = state.results()
    path = export.export_balanced(results, ["total"], tmp_path / "b.nc")
    before = path.read_bytes()
    with pytest.raises(ExportError, match="already exists"):
        export.export_balanced(results, ["total"], path)
    assert path.read_bytes() == before
    with pytest.raises(ExportError, match="no inversion result"):
        export.export_balanced(results, ["nope"], tmp_path / "c.nc")
    with pytest.raises(ExportError, match="output path"):
        export.export_balanced(results, ["total"])
    with pytest.raises(ExportError, match="variable"):
        export.export_balanced(results, ["total"], tmp_path / "d.nc", variables=["omega2"])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["b.nc"]
    export.export_balanced(results, ["upper"], path, overwrite=True)
    with xr.open_dataset(path) as ds:
        assert "upper_u" in ds and "total_u" not in ds


def test_a_crash_while_writing_leaves_the_previous_export(state, tmp_path, monkeypatch):
    results = state.results()
    path = export.export_balanced(results, ["total"], tmp_path / "b.nc")
    before = path.read_bytes()

    def half_then_crash(self, target, *a, **k):
        Path(target).write_bytes(b"CDF\x01 partial")
        raise OSError("simulated crash in the writer")

    monkeypatch.setattr(xr.Dataset, "to_netcdf", half_then_crash)
    with pytest.raises(OSError, match="simulated crash"):
        export.export_balanced(results, ["upper"], path, overwrite=True)
    monkeypatch.undo()
    assert path.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["b.nc"]


def test_atomic_target_never_clobbers_a_file_that_appears_meanwhile(tmp_path):
    path = tmp_path / "x.txt"
    with pytest.raises(ExportError, match="appeared"):
        with export.atomic_target(path) as tmp:
            tmp.write_text("new")
            path.write_text("someone else's")  # appears while we write
    assert path.read_text() == "someone else's"
    assert [p.name for p in tmp_path.iterdir()] == ["x.txt"]
    with pytest.raises(ExportError, match="no data"):
        with export.atomic_target(tmp_path / "empty.txt"):
            pass
    assert not (tmp_path / "empty.txt").exists()
