"""Property-based test: small malformed datasets give a result or one of the package's own errors.

Hypothesis draws small pressure-level datasets with wrong dimensions, NaN or descending or
repeated coordinates, odd units, tiny sizes, non-finite values and missing variables. They go to
``workbench.open_case`` and ``Case.anomaly()`` (in memory) and, written to netCDF, to
``pvwb info`` (in process). Accepted outcomes: a result, or a
:class:`workbench.errors.WorkbenchError` (the command: exit 0 or 2, never a traceback).
The datasets are fixtures, not check values.
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest
import xarray as xr

hypothesis = pytest.importorskip("hypothesis")
from hypothesis import HealthCheck, given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

import workbench as wb  # noqa: E402
from workbench.cli import main  # noqa: E402
from workbench.errors import WorkbenchError  # noqa: E402

STANDARD = {"t": "air_temperature", "u": "eastward_wind", "v": "northward_wind", "z": "geopotential"}
UNITS = {"t": "K", "u": "m s-1", "v": "m s-1", "z": "m2 s-2"}
ODD_UNITS = ["degC", "", "banana", "m", "Pa", "knots", "dam", "kg", "K", "m s-1"]
SPECIAL = [np.nan, np.inf, -np.inf, -999.0, 1e30, 0.0, -1e30]
DEFECTS = ["missing variable", "odd units", "level units", "hPa labelled Pa", "lat NaN", "lon NaN",
           "lat descending", "lat repeated", "lon repeated", "lon irregular", "tiny", "special values",
           "all-missing variable", "transposed", "missing dimension", "pole", "equator", "one time",
           "height as geopotential", "zero kelvin", "one level", "levels ascending"]


@st.composite
def malformed_dataset(draw):
    """A small valid dataset (2 times, 5 levels, 6 x 7 points) with 0-3 defects applied."""
    defects = draw(st.lists(st.sampled_from(DEFECTS), min_size=0, max_size=3, unique=True))
    rng = np.random.default_rng(draw(st.integers(0, 2**16)))
    nt = 1 if "one time" in defects else 2
    levels = np.array([1000.0, 850.0, 700.0, 500.0, 300.0])
    if "one level" in defects:
        levels = levels[:1]
    lat = np.linspace(40.0, 55.0, 6)
    lon = np.linspace(-10.0, 20.0, 7)
    if "tiny" in defects:
        n = draw(st.sampled_from([1, 2]))
        if draw(st.booleans()):
            lat = lat[:n]
        else:
            lon = lon[:n]
    if "pole" in defects:
        lat = np.linspace(60.0, 90.0, lat.size)
    if "equator" in defects:
        lat = np.linspace(-10.0, 10.0, lat.size)
    # a standard-atmosphere-like column (fixture only)
    p = levels * 100.0
    t_col = 288.15 * (p / 101325.0) ** 0.19
    z_col = 9.81 * 44330.0 * (1.0 - (p / 101325.0) ** 0.19)
    shape = (nt, levels.size, lat.size, lon.size)
    fields = {
        "t": t_col[None, :, None, None] + rng.standard_normal(shape),
        "z": z_col[None, :, None, None] + 20.0 * rng.standard_normal(shape),
        "u": 10.0 + rng.standard_normal(shape),
        "v": rng.standard_normal(shape),
    }
    level_attrs = {"units": "hPa"}
    if "level units" in defects:
        level_attrs["units"] = draw(st.sampled_from(["K", "", "furlong", "m"]))
    if "hPa labelled Pa" in defects:
        level_attrs["units"] = "Pa"
    if "levels ascending" in defects:
        levels = levels[::-1].copy()
        fields = {k: v[:, ::-1].copy() for k, v in fields.items()}
    for name, values, k in (("lat NaN", lat, None), ("lon NaN", lon, None)):
        if name in defects:
            values[draw(st.integers(0, values.size - 1))] = np.nan
    if "lat descending" in defects:
        lat = lat[::-1].copy()
    if "lat repeated" in defects and lat.size > 1:
        lat[1] = lat[0]
    if "lon repeated" in defects and lon.size > 1:
        lon[-1] = lon[-2]
    if "lon irregular" in defects and lon.size > 2:
        lon[1] += 0.37 * (lon[2] - lon[1])
    attrs = {k: {"standard_name": STANDARD[k], "units": UNITS[k]} for k in fields}
    if "odd units" in defects:
        k = draw(st.sampled_from(list(fields)))
        attrs[k]["units"] = draw(st.sampled_from(ODD_UNITS))
    if "height as geopotential" in defects:
        fields["z"] = fields["z"] / 9.81
    if "zero kelvin" in defects:
        fields["t"][...] = 0.0
    if "special values" in defects:
        k = draw(st.sampled_from(list(fields)))
        flat = fields[k].reshape(-1)
        for _ in range(draw(st.integers(1, 4))):
            flat[draw(st.integers(0, flat.size - 1))] = draw(st.sampled_from(SPECIAL))
    if "all-missing variable" in defects:
        fields[draw(st.sampled_from(list(fields)))][...] = draw(st.sampled_from([np.nan, np.inf, 1e30]))
    dims = {k: ("time", "level", "lat", "lon") for k in fields}
    if "transposed" in defects:
        k = draw(st.sampled_from(list(fields)))
        fields[k] = np.ascontiguousarray(np.swapaxes(fields[k], 2, 3))
        dims[k] = ("time", "level", "lon", "lat")
    if "missing dimension" in defects:
        k = draw(st.sampled_from(list(fields)))
        fields[k] = fields[k][:, 0]
        dims[k] = dims[k][:1] + dims[k][2:]
    if "missing variable" in defects:
        del fields[draw(st.sampled_from(list(fields)))]
    dtype = draw(st.sampled_from(["float32", "float64"]))
    data_vars = {k: (dims[k], v.astype(dtype), attrs[k]) for k, v in fields.items()}
    coords = {
        "time": np.datetime64("2031-01-01T00") + np.arange(nt) * np.timedelta64(6, "h"),
        "level": ("level", levels, level_attrs),
        "lat": ("lat", lat, {"units": "degrees_north"}),
        "lon": ("lon", lon, {"units": "degrees_east"}),
    }
    ds = xr.Dataset(data_vars, coords=coords)
    ds.attrs["defects"] = ", ".join(defects) or "none"
    return ds


def _accept(fn, *args, **kwargs):
    """Run fn: a result or a WorkbenchError is fine; anything else fails the property."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            return fn(*args, **kwargs)
        except WorkbenchError:
            return None


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow],
          derandomize=True)
@given(ds=malformed_dataset())
def test_open_case_and_anomaly_accept_or_refuse_cleanly(ds):
    case = _accept(wb.open_case, ds)
    if case is not None:
        _accept(case.anomaly)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                  HealthCheck.function_scoped_fixture],
          derandomize=True)
@given(ds=malformed_dataset())
def test_pvwb_info_answers_in_one_line(ds, tmp_path, capsys):
    path = tmp_path / "case.nc"
    path.unlink(missing_ok=True)
    ds.to_netcdf(path)
    code = main(["info", str(path)])
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    assert code in (0, 2), err  # 1 would be an internal error (a bug)
    if code == 2:
        lines = [ln for ln in err.splitlines() if ln.strip() and not ln.startswith("note:")]
        assert len(lines) == 1 and lines[0].startswith("pvwb info: error:"), err
