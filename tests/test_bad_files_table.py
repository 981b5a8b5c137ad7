"""Awkward and malformed files on disk, each given to `pvwb info` exactly as a user would: every
one ends either in a clear one-line refusal (exit 2, no traceback) or opens with a note saying
what was done. The outcome table is written to tests/artifacts/bad_files.md."""
from __future__ import annotations

import io
import shutil
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

import forecast_files as ff
from test_plausibility import NOTED, REFUSED, base
from workbench.cli import main

ART = Path(__file__).parent / "artifacts"
ROWS: list = []


def _nc(ds, path):
    ds.to_netcdf(path)
    return path


# --- file-level cases: (label, builder(tmp) -> path or str, expected "refused" | "opened") ---------

def _empty(tmp):
    p = tmp / "empty.nc"
    p.write_bytes(b"")
    return p


def _random(tmp):
    p = tmp / "noise.nc"
    p.write_bytes(np.random.default_rng(0).bytes(4096))
    return p


def _text(tmp):
    p = tmp / "notes.grib2"
    p.write_text("temperature,u,v\n1,2,3\n")
    return p


def _truncated_nc(tmp):
    src = _nc(base(), tmp / "full.nc")
    p = tmp / "truncated.nc"
    p.write_bytes(src.read_bytes()[: src.stat().st_size // 3])
    return p


def _truncated_grib(tmp):
    src = tmp / "full.grib2"
    ff.write_grib(src, "lambert", extra_levels=False)
    p = tmp / "truncated.grib2"
    p.write_bytes(src.read_bytes()[: src.stat().st_size // 2 + 100])
    return p


def _grib_surface_only(tmp):
    src = tmp / "all.grib2"
    ff.write_grib(src, "lambert")
    import eccodes as ec

    p = tmp / "surface_only.grib2"
    with open(src, "rb") as fin, open(p, "wb") as fout:
        while True:
            h = ec.codes_grib_new_from_file(fin)
            if h is None:
                break
            if ec.codes_get(h, "typeOfLevel") != "isobaricInhPa":
                ec.codes_write(h, fout)
            ec.codes_release(h)
    return p


def _drop(var):
    return lambda tmp: _nc(base().drop_vars(var), tmp / f"no_{var}.nc")


def _attr(var, **attrs):
    def make(tmp):
        ds = base()
        a = {k: v for k, v in ds[var].attrs.items() if k not in attrs}
        a.update({k: v for k, v in attrs.items() if v is not None})
        ds[var].attrs = a
        return _nc(ds, tmp / f"{var}_attrs.nc")
    return make


def _two_levels(tmp):
    return _nc(base().isel(level=[0, 1]), tmp / "two_levels.nc")


def _dup_times(tmp):
    ds = base()
    ds = xr.concat([ds, ds.isel(time=[0])], dim="time")
    return _nc(ds, tmp / "dup_times.nc")


def _latlon_2d_no_projection(tmp):
    src = tmp / "lcc.nc"
    ff.write_cf_netcdf(src, "lambert")
    ds = xr.open_dataset(src).load().drop_vars("crs")
    for v in ds.data_vars:
        ds[v].attrs.pop("grid_mapping", None)
    return _nc(ds, tmp / "no_projection.nc")


def _missing_grid_mapping(tmp):
    src = tmp / "lcc.nc"
    ff.write_cf_netcdf(src, "lambert")
    ds = xr.open_dataset(src).load().drop_vars("crs")
    return _nc(ds, tmp / "gm_missing.nc")


def _bogus_grid_mapping(tmp):
    src = tmp / "lcc.nc"
    ff.write_cf_netcdf(src, "lambert")
    ds = xr.open_dataset(src).load()
    ds["crs"].attrs = dict(grid_mapping_name="tilted_teacup", earth_radius=6371229.0)
    return _nc(ds, tmp / "gm_bogus.nc")


def _wrong_projection(tmp):
    src = tmp / "lcc.nc"
    ff.write_cf_netcdf(src, "lambert")
    ds = xr.open_dataset(src).load()
    ds["crs"].attrs = dict(ds["crs"].attrs, standard_parallel=[20.0, 80.0], longitude_of_central_meridian=10.0)
    return _nc(ds, tmp / "gm_wrong.nc")


def _nonuniform_x(tmp):
    src = tmp / "lcc.nc"
    ff.write_cf_netcdf(src, "lambert", with_latlon=False)
    ds = xr.open_dataset(src).load()
    x = ds["x"].values.copy()
    x[10:] += 20000.0
    ds = ds.assign_coords(x=("x", x, dict(ds["x"].attrs)))
    return _nc(ds, tmp / "nonuniform.nc")


def _empty_folder(tmp):
    p = tmp / "empty_folder"
    p.mkdir()
    (p / "readme.txt").write_text("nothing here")
    return p


def _glob_nothing(tmp):
    return str(tmp / "nothing_*.grib2")


def _folder_mixed_grids(tmp):
    p = tmp / "mixed"
    p.mkdir()
    ff.write_grib(p / "a.grib2", "lambert", extra_levels=False)
    ff.write_grib(p / "b.grib2", "lambert", nx=30, ny=30, start=5, extra_levels=False)
    return p


def _folder_repeated_times(tmp):
    p = tmp / "repeat"
    p.mkdir()
    ff.write_grib(p / "a.grib2", "lambert", extra_levels=False)
    ff.write_grib(p / "b.grib2", "lambert", extra_levels=False)
    return p


def _groups(tmp):
    p = tmp / "groups.nc"
    base().to_netcdf(p, group="analysis")
    return p


def _zarr_no_meta(tmp):
    p = tmp / "store.zarr"
    p.mkdir()
    (p / "t").mkdir()
    return p


def _folder_named_nc(tmp):
    p = tmp / "looks_like.nc"
    p.mkdir()
    return p


def _missing_path(tmp):
    return tmp / "does_not_exist.nc"


def _descending_lat(tmp):
    return _nc(base().isel(lat=slice(None, None, -1)), tmp / "lat_desc.nc")


def _lon_0_360(tmp):
    ds = base()
    return _nc(ds.assign_coords(lon=("lon", np.mod(ds["lon"].values, 360.0), dict(ds["lon"].attrs))).sortby("lon"),
               tmp / "lon360.nc")


def _one_time(tmp):
    return _nc(base(ntime=1), tmp / "one_time.nc")


def _terrain_grib(tmp):
    crs, x, y, lat2d, lon2d = ff.plane_grid("lambert")
    mountain = (lat2d - 50.0) ** 2 / 9 + (lon2d + 30.0) ** 2 / 25 < 1.0
    p = tmp / "terrain.grib2"
    ff.write_grib(p, "lambert", below_ground=mountain)
    return p


def _polar_grib(tmp):
    p = tmp / "polar.grib2"
    ff.write_grib(p, "polar_stereographic", times=2, steps=True)
    return p


def _pole_domain(tmp):
    p = tmp / "pole.nc"
    ff.write_cf_netcdf(p, "polar_stereographic")
    ds = xr.open_dataset(p).load()
    # the same grid moved over the pole: the latitude-longitude box cannot cover it
    import pyproj

    crs = pyproj.CRS.from_cf(dict(ds["crs"].attrs))
    inv = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    X, Y = np.meshgrid(ds["x"].values - ds["x"].values.mean(), ds["y"].values - ds["y"].values.mean())
    lon, lat = inv.transform(X, Y)
    ds = ds.assign_coords(x=("x", ds["x"].values - ds["x"].values.mean(), dict(ds["x"].attrs)),
                          y=("y", ds["y"].values - ds["y"].values.mean(), dict(ds["y"].attrs)))
    ds["lat"] = (("y", "x"), lat, dict(ds["lat"].attrs))
    ds["lon"] = (("y", "x"), lon, dict(ds["lon"].attrs))
    return _nc(ds, tmp / "over_pole.nc")


FILE_CASES = [
    ("empty file", _empty, "refused"),
    ("random bytes named .nc", _random, "refused"),
    ("CSV text named .grib2", _text, "refused"),
    ("netCDF truncated to a third", _truncated_nc, "refused"),
    ("GRIB2 truncated mid-message", _truncated_grib, "refused"),
    ("GRIB2 with surface fields only", _grib_surface_only, "refused"),
    ("no temperature", _drop("t"), "refused"),
    ("no u wind", _drop("u"), "refused"),
    ("no geopotential", _drop("z"), "refused"),
    ("temperature without units", _attr("t", units=None), "refused"),
    ("temperature in furlongs", _attr("t", units="furlongs"), "refused"),
    ("geopotential without units", _attr("z", units=None), "refused"),
    ("two pressure levels", _two_levels, "refused"),
    ("duplicate times", _dup_times, "refused"),
    ("2-D lat/lon without projection", _latlon_2d_no_projection, "refused"),
    ("grid_mapping named but missing", _missing_grid_mapping, "refused"),
    ("unknown grid mapping", _bogus_grid_mapping, "refused"),
    ("projection disagreeing with lat/lon", _wrong_projection, "refused"),
    ("projected x spacing not uniform", _nonuniform_x, "refused"),
    ("folder without case files", _empty_folder, "refused"),
    ("glob matching nothing", _glob_nothing, "refused"),
    ("folder of files on two grids", _folder_mixed_grids, "refused"),
    ("folder of files repeating a time", _folder_repeated_times, "refused"),
    ("netCDF with variables in groups", _groups, "refused"),
    ("Zarr folder without metadata", _zarr_no_meta, "refused"),
    ("folder named like a file", _folder_named_nc, "refused"),
    ("missing path", _missing_path, "refused"),
    ("projected domain over the pole", _pole_domain, "refused"),
    ("latitudes descending", _descending_lat, "opened"),
    ("longitudes 0..360", _lon_0_360, "opened"),
    ("one time only", _one_time, "opened"),
    ("Lambert GRIB2 with terrain bitmaps", _terrain_grib, "opened"),
    ("polar stereographic GRIB2 forecast steps", _polar_grib, "opened"),
]

DATA_CASES = [(f"plausibility: {label}", make, "refused") for label, make, _, _ in REFUSED] + \
             [(f"fill/infinite: {label}", make, "opened") for label, make, _, _ in NOTED]


def _run(path):
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        code = main(["info", str(path)])
    return code, out.getvalue(), err.getvalue()


def _check(label, path, expected):
    code, out, err = _run(path)
    assert "Traceback" not in out + err, (label, err[-2000:])
    assert code in (0, 2), (label, code, err)
    outcome = "opened" if code == 0 else "refused"
    msg = err.strip().splitlines()
    if outcome == "refused":
        assert len(msg) == 1 and len(msg[0]) > 30, (label, err)
        shown = msg[0]
    else:
        notes = [line.strip() for line in out.splitlines() if line.strip().startswith("note:")]
        shown = notes[0] if notes else out.splitlines()[0]
    if expected != "either":
        assert outcome == expected, (label, outcome, err or out)
    ROWS.append((label, outcome, code, shown.replace("|", "/")[:220]))


@pytest.mark.parametrize("label,build,expected", FILE_CASES, ids=[c[0] for c in FILE_CASES])
def test_bad_file_on_disk(tmp_path, label, build, expected):
    _check(label, build(tmp_path), expected)


@pytest.mark.parametrize("label,make,expected", DATA_CASES, ids=[c[0] for c in DATA_CASES])
def test_bad_values_on_disk(tmp_path, label, make, expected):
    path = tmp_path / "case.nc"
    make(base()).to_netcdf(path)
    _check(label, path, expected)


def test_write_table():
    """Runs last in this module: the table of outcomes for the record."""
    if not ROWS:
        pytest.skip("run with the whole module")
    assert len(ROWS) >= 60
    ART.mkdir(exist_ok=True)
    lines = ["| input | outcome | exit | first message line |", "|---|---|---|---|"]
    lines += [f"| {a} | {b} | {c} | {d} |" for a, b, c, d in ROWS]
    (ART / "bad_files.md").write_text("\n".join(lines) + "\n")
    shutil.copy(ART / "bad_files.md", ART / "bad_files_last.md")
