"""Plausibility checks at open time (workbench.checks): a catalogue of bad inputs built here,
each refused with the package's own one-line error naming the variable, or opened with a note.

Reference values: U.S. Standard Atmosphere 1976 (NOAA/NASA/USAF 1976) table heights, and
MetPy's ``pressure_to_height_std`` (the 1976 tropospheric formula) as an outside library.
"""
from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

import workbench as wb
from workbench import checks
from workbench.errors import DomainError, FileFormatError, GridError, InputError, UnitsError, WorkbenchError

from conftest import wave_dataset


def base(**kw):
    kw.setdefault("ntime", 2)
    return wave_dataset(**kw)


def _set(var, fn, units=None):
    def make(ds):
        attrs = dict(ds[var].attrs)
        ds[var] = fn(ds[var])
        ds[var].attrs = attrs if units is None else dict(attrs, units=units)
        return ds
    return make


def _block(var, value, frac=0.1):
    """Set a block of points (about ``frac`` of each level) of one variable to ``value``."""
    def make(ds):
        a = ds[var].values.copy()
        ny = ds.sizes["lat"]
        a[:, :, : max(1, int(ny * frac)), :] = value
        ds[var] = ds[var].copy(data=a)
        return ds
    return make


def _level_units(ds, values, units):
    return ds.assign_coords(level=("level", values, dict(units=units)))


def _nan_coord(name):
    def make(ds):
        c = ds[name].values.astype(float).copy()
        c[3] = np.nan
        return ds.assign_coords({name: (name, c, dict(ds[name].attrs))})
    return make


def _with_mslp(fn):
    def make(ds):
        shape = (ds.sizes["time"], ds.sizes["lat"], ds.sizes["lon"])
        p = np.broadcast_to(np.linspace(98000.0, 103000.0, shape[2]), shape).astype("float32")
        ds["msl"] = (("time", "lat", "lon"), fn(p), dict(units="Pa", standard_name="air_pressure_at_mean_sea_level"))
        return ds
    return make


def _with_q(fn, units="kg kg-1"):
    def make(ds):
        q = np.broadcast_to(np.linspace(0.0005, 0.015, ds.sizes["lon"]), ds["t"].shape).astype("float32")
        ds["q"] = (ds["t"].dims, fn(q), dict(units=units, standard_name="specific_humidity"))
        return ds
    return make


def _gpm(fn):
    """geopotential height in gpm under the name gh, then ``fn`` applied."""
    def make(ds):
        z = ds["z"].values / 9.80665
        ds = ds.drop_vars("z")
        ds["gh"] = (ds["t"].dims, fn(z).astype("float32"), dict(units="gpm", standard_name="geopotential_height"))
        return ds
    return make


# (label, make, error class, words the message must hold: the variable's name first)
REFUSED = [
    ("hPa values labelled Pa", lambda ds: _level_units(ds, ds["level"].values, "Pa"), UnitsError,
     ["Pressure levels", "hPa labelled Pa"]),
    ("temperature in degC labelled K", _set("t", lambda t: t - 273.15), UnitsError,
     ["'t'", "Celsius labelled K"]),
    ("temperature in K labelled degC", _set("t", lambda t: t, units="degC"), UnitsError,
     ["'t'", "kelvin labelled degrees Celsius"]),
    ("temperature 0 K everywhere", _set("t", lambda t: t * 0.0), InputError, ["'t'", "mostly fill values"]),
    ("temperature mostly -999", _block("t", -999.0, frac=0.7), InputError, ["'t'", "-999", "mostly fill"]),
    ("temperature random 0..1000 K", _set("t", lambda t: t.copy(data=np.random.default_rng(0).uniform(
        0, 1000, t.shape).astype("float32"))), UnitsError, ["'t'", "outside the plausible 150 .. 350 K"]),
    ("heights in dam labelled m", _gpm(lambda z: z / 10.0), UnitsError, ["'gh'", "dam labelled m"]),
    ("geopotential labelled as height", _set("z", lambda z: z, units="m"), UnitsError,
     ["'z'", "9.8 times too large"]),
    ("height labelled as geopotential", _set("z", lambda z: z / 9.80665), UnitsError,
     ["'z'", "10 times too small"]),
    ("heights in km labelled m", _gpm(lambda z: z / 1000.0), UnitsError, ["'gh'", "km labelled m"]),
    ("u in cm/s labelled m/s", _set("u", lambda u: u * 100.0 + 50.0), UnitsError, ["'u'", "200 m s-1"]),
    ("v random +-999", _set("v", lambda v: v.copy(data=np.random.default_rng(1).uniform(
        -999, 999, v.shape).astype("float32"))), UnitsError, ["'v'", "outside the plausible"]),
    ("v infinite everywhere", _set("v", lambda v: v * np.inf), InputError, ["'v'", "infinite"]),
    ("NaN in the latitude coordinate", _nan_coord("lat"), GridError, ["latitude coordinate", "NaN"]),
    ("NaN in the longitude coordinate", _nan_coord("lon"), GridError, ["longitude coordinate", "NaN"]),
    ("3x3 domain", lambda ds: ds.isel(lat=slice(0, 3), lon=slice(0, 3)), GridError, ["3 latitude", "at least 5 x 5"]),
    ("4x40 domain", lambda ds: ds.isel(lat=slice(0, 4)), GridError, ["4 latitude", "at least 5 x 5"]),
    ("mslp in hPa labelled Pa", _with_mslp(lambda p: p / 100.0), UnitsError, ["'msl'", "hPa labelled Pa"]),
    ("specific humidity in g/kg labelled kg/kg", _with_q(lambda q: q * 1000.0), UnitsError,
     ["'q'", "g kg-1 labelled kg kg-1"]),
    ("relative humidity in per mille", _set("r", lambda r: r * 10.0 + 300.0), InputError, ["'r'", "relative humidity"]),
]


@pytest.mark.parametrize("label,make,exc,words", REFUSED, ids=[r[0] for r in REFUSED])
def test_refused_with_one_line(label, make, exc, words):
    with pytest.raises(exc) as info:
        wb.open_case(make(base()))
    msg = str(info.value)
    assert "\n" not in msg and len(msg) > 60
    for w in words:
        assert w in msg, (w, msg)


def _two_fills(ds):
    a = ds["u"].values.copy()
    a[:, :, :1, :] = -999.0
    a[:, :, 1:3, :] = 1e20
    ds["u"] = ds["u"].copy(data=a)
    return ds


# (label, make, variable, words the note must hold)
NOTED = [
    ("u -999 without _FillValue", _block("u", -999.0), "u", "-999"),
    ("v -9999 without _FillValue", _block("v", -9999.0), "v", "-9999"),
    ("temperature 9.999e20", _block("t", 9.999e20), "temperature", "9.999e+20"),
    ("geopotential 1e30", _block("z", 1e30), "geopotential", "1e+30"),
    ("geopotential -999 m2 s-2", _block("z", -999.0), "geopotential", "-999"),
    ("height -9999 gpm", _gpm(lambda z: np.where(np.arange(z.shape[2])[None, None, :, None] < 2, -9999.0, z)),
     "geopotential", "-9999 in the file's units"),
    ("temperature 0 K at some points", _block("t", 0.0), "temperature", " 0 K"),
    ("temperature -999 degC", lambda ds: _block("t", -999.0)(_set("t", lambda t: t - 273.15, units="degC")(ds)),
     "temperature", "-725.85"),
    ("relative humidity -999", _block("r", -999.0), "relative_humidity", "-999"),
    ("two fill values in one variable", lambda ds: _two_fills(ds), "u", "-999, 1e+20"),
    ("temperature +inf at some points", _block("t", np.inf), "temperature", "infinite"),
    ("u -inf at some points", _block("u", -np.inf), "u", "infinite"),
]


@pytest.mark.parametrize("label,make,var,words", NOTED, ids=[n[0] for n in NOTED])
def test_fill_and_infinite_values_masked_with_a_note(label, make, var, words):
    case = wb.open_case(make(base()))
    notes = [n for n in case.notes if n.startswith(var + ":")]
    assert notes and words in notes[0], case.notes
    a = case.data[var].values
    # the bad points are missing now; everything left is finite and plausible
    assert np.isnan(a[:, :, :1, :]).all()
    good = a[np.isfinite(a)]
    assert good.size > 0.5 * a.size
    assert np.abs(good).max() < 1e7


def test_fill_values_in_lazy_files_masked_everywhere(tmp_path):
    """Found on the first time, masked at every time (lazily): the other time's -999 too."""
    ds = _block("u", -999.0)(base())
    path = tmp_path / "fill.nc"
    ds.to_netcdf(path)
    case = wb.open_case(path, chunks={})  # Dask chunks asked for (small files are read without)
    assert any(n.startswith("u:") and "-999" in n for n in case.notes)
    u = case.data["u"]
    assert hasattr(u.data, "dask")  # still lazy
    assert np.isnan(u.isel(time=1).values[:, :1, :]).all()


def test_check_reads_only_the_first_time():
    """The check is cheap on big lazy files: normalising (which runs the check) never computes
    a later time."""
    import dask
    import dask.array as dsa

    ds = base(ntime=1)

    def boom():
        raise RuntimeError("time 1 was read")

    lazy = {}
    for v in ("t", "u", "v", "z", "r"):
        good = dsa.from_array(ds[v].values, chunks=(1,) + ds[v].shape[1:])
        bad = dsa.from_delayed(dask.delayed(boom)(), shape=good.shape, dtype=good.dtype)
        lazy[v] = (ds[v].dims, dsa.concatenate([good, bad], axis=0), ds[v].attrs)
    times = np.concatenate([ds["time"].values, ds["time"].values + np.timedelta64(6, "h")])
    big = xr.Dataset(lazy, coords=dict(ds.coords, time=times))
    data = wb.io.normalise(big)
    assert data["temperature"].sizes["time"] == 2 and hasattr(data["temperature"].data, "dask")
    with pytest.raises(FileFormatError, match="Could not read the data"):
        # the missing-value census or loading time 1 reads the bad block: a one-line error
        wb.case.Case(data).at(1)


def test_truncated_zarr_chunk(tmp_path):
    pytest.importorskip("zarr")
    ds = base(ntime=3).chunk({"time": 1})
    store = tmp_path / "case.zarr"
    ds.to_zarr(store, zarr_format=2)
    chunk = store / "t" / "2.0.0.0"
    chunk.write_bytes(chunk.read_bytes()[:40])  # a chunk cut short, as by an interrupted copy
    with pytest.raises(FileFormatError) as info:
        # small cases count missing values over every time at open; larger ones when a time loads
        wb.open_case(store).at(2)
    msg = str(info.value)
    assert "\n" not in msg and "truncated or corrupt" in msg
    # a truncated first time is reported when the case is opened
    chunk0 = store / "t" / "0.0.0.0"
    chunk0.write_bytes(chunk0.read_bytes()[:40])
    with pytest.raises(FileFormatError, match="'t'.*truncated or corrupt"):
        wb.open_case(store)


# --- calendars ---------------------------------------------------------------------------------

def _cf_times(calendar, start, n, step="6h"):
    return xr.date_range(start, periods=n, freq=step, calendar=calendar, use_cftime=True)


def test_360_day_netcdf_file_converted_with_a_note(tmp_path):
    ds = base(ntime=3)
    ds["time"] = _cf_times("360_day", "2051-01-10", 3)
    path = tmp_path / "calendar360.nc"
    ds.to_netcdf(path)
    assert xr.open_dataset(path).time.encoding["calendar"] == "360_day"
    case = wb.open_case(path)
    assert case.times.dtype.kind == "M"
    assert str(case.times[0])[:16] == "2051-01-10T00:00" and str(case.times[-1])[:16] == "2051-01-10T12:00"
    assert any("360_day calendar" in n and "kept as they are" in n for n in case.notes)
    assert np.isfinite(case.pv(0).values).any()


def test_360_day_dates_missing_from_the_standard_calendar_moved_by_position_in_year():
    ds = base(ntime=1)
    ds["time"] = _cf_times("360_day", "2051-02-30", 1)
    case = wb.open_case(ds)
    assert str(case.times[0])[:10] in ("2051-03-01", "2051-03-02")
    assert any("position in the year" in n and "2051-02-30" in n for n in case.notes)
    # the raw function keeps every time of a longer 360-day axis
    raw = xr.Dataset({"a": ("time", np.arange(12.0))}, coords={"time": _cf_times("360_day", "2051-02-28", 12)})
    out = checks.standard_calendar(raw)
    assert out.sizes["time"] == 12 and out["time"].dtype.kind == "M"
    assert np.all(np.diff(out["time"].values).astype("timedelta64[h]").astype(int) > 0)


def test_360_day_netcdf_file_with_february_30(tmp_path):
    """Several times including 2051-02-29/30: opened (dates moved by position in the year)."""
    ds = base(ntime=4)
    ds["time"] = _cf_times("360_day", "2051-02-29T12", 4)
    path = tmp_path / "calendar360_feb.nc"
    ds.to_netcdf(path)
    try:
        case = wb.open_case(path)
    except WorkbenchError as exc:  # refused is acceptable, in one line
        assert "\n" not in str(exc)
        return
    assert case.times.dtype.kind == "M" and case.times.size == 4


def test_noleap_calendar_converted():
    ds = base(ntime=2)
    ds["time"] = _cf_times("noleap", "2051-03-01", 2)
    case = wb.open_case(ds)
    assert case.times.dtype.kind == "M" and any("noleap calendar" in n for n in case.notes)


def test_all_leap_date_missing_from_the_standard_calendar_refused():
    ds = base(ntime=1)
    ds["time"] = _cf_times("all_leap", "2051-02-29", 1)
    with pytest.raises(InputError) as info:
        wb.open_case(ds)
    msg = str(info.value)
    assert "\n" not in msg and "all_leap calendar" in msg and "2051-02-29" in msg


# --- poles and the equator -------------------------------------------------------------------

def test_pole_row_pv_masked_with_a_note():
    ds = base(lat=np.arange(60.0, 88.51, 1.5), ntime=1)
    # a pole row as analyses carry it: one value of T and z (the zonal mean of the last row), winds
    # of the last row (fixture)
    pole = ds.isel(lat=[-1]).assign_coords(lat=[90.0])
    for v in ("t", "z", "r"):
        pole[v] = pole[v].mean("lon").broadcast_like(pole[v]).astype("float32")
    ds = xr.concat([ds, pole], dim="lat")
    case = wb.open_case(ds)
    assert any("pole row at 90N" in n for n in case.notes)
    pv = case.pv(0)
    assert np.isnan(pv.sel(latitude=90.0).values).all()
    inner = pv.sel(latitude=slice(60.0, 88.6)).values
    assert np.isfinite(inner).all()
    # no 1e12 PVU artefact next to the pole: Ertel PV in the troposphere and lower stratosphere
    # is of order 0.1-10 PVU (common practice)
    assert np.nanmax(np.abs(inner)) < 100.0


def test_equator_noted_then_refused_for_qg():
    case = wb.open_case(base(lat=np.arange(-10.0, 30.01, 2.0), ntime=1))
    assert any("reaches the equator" in n for n in case.notes)
    with pytest.raises(DomainError) as info:
        case.anomaly(0)
    msg = str(info.value)
    assert "\n" not in msg and "equator" in msg and "one hemisphere" in msg


# --- standard heights and groups -------------------------------------------------------------

def test_standard_heights_match_the_1976_standard():
    # U.S. Standard Atmosphere 1976 table values (geopotential metres, from memory): 500 hPa
    # 5574 m, 250 hPa 10363 m, 100 hPa 16180 m, 10 hPa 31055 m, 1 hPa 47820 m
    z = checks.standard_height([50000.0, 25000.0, 10000.0, 1000.0, 100.0])
    np.testing.assert_allclose(z, [5574, 10363, 16180, 31055, 47820], atol=3.0)
    # MetPy's pressure_to_height_std is the same standard's tropospheric formula (geometric
    # height, which differs from geopotential height by under 0.2 % below 11 km)
    from metpy.calc import pressure_to_height_std
    from metpy.units import units

    p = np.array([100000.0, 85000.0, 70000.0, 50000.0, 30000.0])
    ref = pressure_to_height_std(units.Quantity(p, "Pa")).m_as("m")
    np.testing.assert_allclose(checks.standard_height(p), ref, rtol=2e-3, atol=2.0)


def test_netcdf_groups_named(tmp_path):
    import netCDF4

    path = tmp_path / "groups.nc"
    ds = base(ntime=1)
    ds.to_netcdf(path, group="analysis/pressure_levels")
    with netCDF4.Dataset(path, "a") as nc:
        nc.title = "variables in a group only"
    groups = checks.netcdf_groups(path)
    assert groups == {"/analysis/pressure_levels": sorted(["t", "u", "v", "z", "r", "time", "level", "lat", "lon"])}
    with pytest.raises(WorkbenchError) as info:
        wb.open_case(path)
    assert "\n" not in str(info.value)


def test_good_files_untouched():
    """The sample storm and a clean fixture open without a plausibility note or change."""
    from workbench.analysis import default_case_path

    for case in (wb.open_case(default_case_path()), wb.open_case(base())):
        assert not [n for n in case.notes if "fill" in n or "infinite" in n or "calendar" in n]
    ds = base()
    case = wb.open_case(ds)
    np.testing.assert_allclose(case.data["u"].isel(time=0).values,
                               wb.open_case(base()).data["u"].isel(time=0).values)
