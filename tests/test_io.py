"""Readers and normalisation: real files (netCDF4, h5netcdf, Zarr, GRIB2) and a catalogue of
malformed inputs, each with its specific error or its correct normalisation."""
from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest
import xarray as xr

import workbench as wb
from workbench.errors import FileFormatError, GridError, MissingVariableError, UnitsError, DomainError

from conftest import wave_dataset


def base():
    return wave_dataset(ntime=2)


def check_normalised(case):
    d = case.data
    assert list(d["temperature"].dims) == ["time", "pressure", "latitude", "longitude"]
    assert np.all(np.diff(d["pressure"].values) < 0) and d["pressure"].attrs["units"] == "Pa"
    assert np.all(np.diff(d["latitude"].values) > 0)
    assert np.all(np.diff(d["longitude"].values) > 0)
    for v in wb.io.REQUIRED:
        assert v in d


# --- the catalogue of malformed inputs -----------------------------------------------------

def _drop(name):
    return lambda ds: ds.drop_vars(name)


def _set_attr(var, key, value):
    def f(ds):
        ds[var].attrs[key] = value
        return ds
    return f


def _del_attr(var, key):
    def f(ds):
        ds[var].attrs.pop(key, None)
        return ds
    return f


def _one_level(ds):
    return ds.isel(level=[5])


def _duplicate_times(ds):
    return xr.concat([ds, ds.isel(time=[0])], dim="time")


def _nonsense_pressure_units(ds):
    ds["level"].attrs["units"] = "m"
    return ds


def _strip_std_names(ds):
    for v in ds.data_vars:
        ds[v].attrs.pop("standard_name", None)
    return ds


def _height_not_geopotential(ds):
    ds["z"] = ds["z"] / 9.80665
    ds["z"].attrs = dict(units="gpm")
    return ds.rename(z="gh")


MALFORMED_ERRORS = [
    ("missing temperature", _drop("t"), MissingVariableError, "temperature"),
    ("missing winds", lambda ds: ds.drop_vars(["u", "v"]), MissingVariableError, "u, v"),
    ("missing geopotential", _drop("z"), MissingVariableError, "geopotential"),
    ("temperature without units", _del_attr("t", "units"), UnitsError, "no units"),
    ("temperature in wind units", _set_attr("t", "units", "m s-1"), UnitsError, "cannot be converted"),
    ("unknown units string", _set_attr("u", "units", "furlongs per fortnightx"), UnitsError, "not recognised"),
    ("geopotential without units", _del_attr("z", "units"), UnitsError, "cannot be told apart"),
    ("one level only", _one_level, GridError, "at least 3"),
    ("duplicate times", _duplicate_times, GridError, "Duplicate times"),
    ("vertical coordinate in metres", _nonsense_pressure_units, UnitsError, "isobaric"),
    ("no variables", lambda ds: ds.drop_vars(list(ds.data_vars)), MissingVariableError, "no variables"),
    ("no latitude", lambda ds: ds.rename(lat="south_north").drop_vars("south_north"), GridError, "latitude"),
]


@pytest.mark.parametrize("label,make,exc,match", MALFORMED_ERRORS, ids=[m[0] for m in MALFORMED_ERRORS])
def test_malformed_inputs_raise_specific_errors(label, make, exc, match):
    ds = make(base())
    with pytest.raises(exc, match=match) as info:
        wb.open_case(ds)
    # every message says what to do
    assert len(str(info.value)) > 40


def _reversed(ds):
    return ds.isel(level=slice(None, None, -1), lat=slice(None, None, -1))


def _unsorted(ds):
    rng = np.random.default_rng(1)
    return ds.isel(level=rng.permutation(ds.sizes["level"]), lon=rng.permutation(ds.sizes["lon"]))


def _pa_levels(ds):
    return ds.assign_coords(level=("level", ds["level"].values * 100.0, dict(units="Pa")))


def _celsius(ds):
    ds["t"] = ds["t"] - 273.15
    ds["t"].attrs = dict(units="degC")
    return ds


def _non_cf_names(ds):
    ds = _strip_std_names(ds)
    return ds.rename(t="TMP", u="UGRD", v="VGRD", z="HGT", lat="latitude", lon="longitude",
                     level="isobaricInhPa")


def _non_cf_names_fixed_by_option(ds):
    return ds


def _lon_0_360_across_edge():
    ds = wave_dataset(lon=np.arange(-40.0, 40.01, 1.5))
    return ds.assign_coords(lon=np.mod(ds["lon"].values, 360.0)).sortby("lon")


def _nan_below_ground(ds):
    ds["t"][:, 0, :5, :5] = np.nan
    ds["z"][:, 0, :5, :5] = np.nan
    return ds


def _fraction_rh(ds):
    ds["r"] = ds["r"] / 100.0
    ds["r"].attrs = dict(units="1")
    return ds


NORMALISED = [
    ("reversed levels and latitudes", _reversed),
    ("unsorted levels and longitudes", _unsorted),
    ("pressure in Pa", _pa_levels),
    ("temperature in Celsius", _celsius),
    ("geopotential height in gpm", _height_not_geopotential),
    ("relative humidity as a fraction", _fraction_rh),
    ("NaN below ground kept as missing", _nan_below_ground),
    ("no time dimension", lambda ds: ds.isel(time=0, drop=True)),
]


@pytest.mark.parametrize("label,make", NORMALISED, ids=[n[0] for n in NORMALISED])
def test_malformed_inputs_normalised(label, make):
    ref = wb.open_case(base())
    case = wb.open_case(make(base()))
    check_normalised(case)
    t = case.data["temperature"].isel(time=0).values
    t0 = ref.data["temperature"].isel(time=0).values
    if label.startswith("NaN"):
        assert np.isnan(t[0, :5, :5]).all() and np.isfinite(t[1:]).all()
        # PV is still computed above ground
        assert np.isfinite(case.pv(0).values[5:]).all()
        return
    np.testing.assert_allclose(t, t0, rtol=1e-5, atol=1e-3)
    np.testing.assert_allclose(case.data["geopotential"].isel(time=0).values,
                               ref.data["geopotential"].isel(time=0).values, rtol=1e-5)
    if "relative_humidity" in ref.data:
        np.testing.assert_allclose(case.data["relative_humidity"].isel(time=0).values,
                                   ref.data["relative_humidity"].isel(time=0).values, rtol=1e-5)


def test_non_cf_names_found_by_short_names_and_options():
    case = wb.open_case(_non_cf_names(base()))
    check_normalised(case)
    ds = _strip_std_names(base()).rename(t="air_temp_k", u="wind_east")
    with pytest.raises(MissingVariableError, match="temperature"):
        wb.open_case(ds)
    case = wb.open_case(ds, variables={"temperature": "air_temp_k", "u": "wind_east"})
    assert case.data["temperature"].attrs["source_name"] == "air_temp_k"


def test_longitudes_0_360_across_the_edge_made_contiguous():
    ds = _lon_0_360_across_edge()
    assert ds["lon"].values.min() < 1.5 and ds["lon"].values.max() > 300
    case = wb.open_case(ds)
    lon = case.data["longitude"].values
    np.testing.assert_allclose(lon, np.arange(-40.0, 40.01, 1.5), atol=1e-9)
    ref = wb.open_case(wave_dataset(lon=np.arange(-40.0, 40.01, 1.5)))
    np.testing.assert_allclose(case.data["temperature"].values, ref.data["temperature"].values)


def test_dateline_crossing_kept_contiguous():
    ds = wave_dataset(lon=np.arange(150.0, 210.01, 2.0))
    ds = ds.assign_coords(lon=((ds["lon"].values + 180) % 360) - 180).sortby("lon")  # -180..180 form
    case = wb.open_case(ds)
    lon = case.data["longitude"].values
    assert np.all(np.diff(lon) > 0) and lon[0] == 150.0 and lon[-1] == 210.0


def test_domain_on_the_equator_refused_for_qg():
    ds = wave_dataset(lat=np.arange(-10.0, 30.01, 2.0))
    case = wb.open_case(ds)
    assert np.isfinite(case.pv(0).values).any()  # PV is fine
    with pytest.raises(DomainError, match="equator"):
        case.anomaly(0)


# --- files -----------------------------------------------------------------------------------

def test_empty_file(tmp_path):
    p = tmp_path / "empty.nc"
    p.write_bytes(b"")
    with pytest.raises(FileFormatError, match="empty"):
        wb.open_case(p)


def test_not_netcdf(tmp_path):
    p = tmp_path / "notes.nc"
    p.write_text("this is a text file, not an analysis\n")
    with pytest.raises(FileFormatError, match="not netCDF, GRIB2 or Zarr"):
        wb.open_case(p)


def test_truncated_file(tmp_path):
    good = tmp_path / "good.nc"
    base().to_netcdf(good, engine="netcdf4")
    data = good.read_bytes()
    bad = tmp_path / "truncated.nc"
    bad.write_bytes(data[: len(data) // 3])
    with pytest.raises(FileFormatError, match="truncated or corrupt"):
        case = wb.open_case(bad)
        case.at(0)


def test_missing_file(tmp_path):
    with pytest.raises(FileFormatError, match="not found"):
        wb.open_case(tmp_path / "nowhere.nc")


@pytest.mark.parametrize("engine", ["netcdf4", "h5netcdf"])
def test_netcdf_roundtrip_lazy(tmp_path, engine):
    p = tmp_path / f"case_{engine}.nc"
    base().to_netcdf(p, engine=engine)
    case = wb.open_case(p, chunks={})  # a file this small is read without Dask unless asked
    assert case.data["temperature"].chunks is not None  # lazy until a time is needed
    check_normalised(case)
    assert len(case.checksum) == 64
    assert "wave_fixture" not in repr(case) and "levels:" in repr(case)
    ref = wb.open_case(base())
    np.testing.assert_allclose(case.pv(1).values, ref.pv(1).values, rtol=1e-6)


def test_zarr_roundtrip(tmp_path):
    p = tmp_path / "case.zarr"
    base().to_zarr(p)
    case = wb.open_case(p)
    check_normalised(case)
    assert case.data.sizes["time"] == 2


# --- GRIB2 -------------------------------------------------------------------------------------

def write_grib2(path, ds):
    """Write pressure-level t, u, v, z messages with eccodes from its bundled GRIB2 sample."""
    import pyproj  # noqa: F401  (import order: pyproj before eccodes)
    import eccodes

    lat = ds["lat"].values
    lon = ds["lon"].values
    with open(path, "wb") as fh:
        for ti in range(ds.sizes["time"]):
            t = ds["time"].values[ti].astype("datetime64[h]").item()
            for short, var in (("t", "t"), ("u", "u"), ("v", "v"), ("z", "z")):
                for k, lev in enumerate(ds["level"].values):
                    h = eccodes.codes_grib_new_from_samples("regular_ll_pl_grib2")
                    eccodes.codes_set(h, "dataDate", int(t.strftime("%Y%m%d")))
                    eccodes.codes_set(h, "dataTime", int(t.strftime("%H%M")))
                    eccodes.codes_set(h, "Ni", lon.size)
                    eccodes.codes_set(h, "Nj", lat.size)
                    eccodes.codes_set(h, "latitudeOfFirstGridPointInDegrees", float(lat[-1]))
                    eccodes.codes_set(h, "latitudeOfLastGridPointInDegrees", float(lat[0]))
                    eccodes.codes_set(h, "longitudeOfFirstGridPointInDegrees", float(lon[0] % 360))
                    eccodes.codes_set(h, "longitudeOfLastGridPointInDegrees", float(lon[-1] % 360))
                    eccodes.codes_set(h, "iDirectionIncrementInDegrees", float(lon[1] - lon[0]))
                    eccodes.codes_set(h, "jDirectionIncrementInDegrees", float(lat[1] - lat[0]))
                    eccodes.codes_set(h, "typeOfLevel", "isobaricInhPa")
                    eccodes.codes_set(h, "level", int(lev))
                    eccodes.codes_set(h, "shortName", short)
                    eccodes.codes_set(h, "bitsPerValue", 24)
                    vals = ds[var].isel(time=ti, level=k).values[::-1, :]  # north to south
                    eccodes.codes_set_values(h, vals.astype(float).ravel())
                    eccodes.codes_write(h, fh)
                    eccodes.codes_release(h)


@pytest.fixture(scope="module")
def grib_path(tmp_path_factory):
    pytest.importorskip("eccodes")
    pytest.importorskip("cfgrib")
    ds = wave_dataset(lon=np.arange(-30.0, 30.01, 3.0), lat=np.arange(30.0, 60.01, 3.0), ntime=1, rh=False)
    path = tmp_path_factory.mktemp("grib") / "case.grib2"
    write_grib2(path, ds)
    return path, ds


def test_grib2_roundtrip(grib_path):
    path, ds = grib_path
    case = wb.open_case(path)
    check_normalised(case)
    ref = wb.open_case(ds)
    np.testing.assert_allclose(case.data["longitude"].values, ref.data["longitude"].values)
    # 24-bit packing: agreement to the packing precision
    np.testing.assert_allclose(case.at(0)["temperature"].values, ref.at(0)["temperature"].values, atol=1e-3)
    np.testing.assert_allclose(case.at(0)["geopotential"].values, ref.at(0)["geopotential"].values, rtol=1e-5)
    assert "levels:" in repr(case)


def test_grib_import_order_does_not_crash(grib_path):
    # eccodes wheels newer than 2.42 crash when loaded before pyproj: the reader imports pyproj
    # first; check in a fresh interpreter that reading GRIB and then using pyproj works.
    path, _ = grib_path
    code = ("import workbench as wb; c = wb.open_case(%r); c.at(0); import pyproj; "
            "print(pyproj.CRS('EPSG:4326').name); print(c.data.sizes['pressure'])") % str(path)
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr[-2000:]
    assert "WGS 84" in r.stdout


def test_eccodes_pinned():
    import eccodes

    major, minor = (int(x) for x in eccodes.__version__.split(".")[:2])
    assert (major, minor) <= (2, 42), "eccodes > 2.42 clashes with pyproj's bundled PROJ: keep the pin"


def test_ensemble_member_dimension():
    # an ensemble on a 'number' dimension (the GRIB convention) becomes 'member'
    ds = xr.concat([base(), base() + 0.0], dim="number").assign_coords(number=[0, 1])
    for v in ("t", "u", "v", "z", "r"):
        ds[v].attrs = base()[v].attrs
    case = wb.open_case(ds)
    assert case.data["temperature"].dims == ("time", "member", "pressure", "latitude", "longitude")
    assert list(case.members) == [0, 1]
    np.testing.assert_allclose(case.pv(1, member=1).values, case.pv(1, member=0).values)
