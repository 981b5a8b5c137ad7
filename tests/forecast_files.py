"""Builders of files that look like what forecast centres write (used by the tests; nothing
large is committed): pressure-level GRIB2 on Lambert conformal and polar stereographic grids
written with eccodes (grid-relative winds, several hypercubes in one file, bitmapped
below-ground values), CF netCDF with a ``grid_mapping`` variable, and regular files.

The atmosphere written is the bundled invented sample storm, interpolated to the projected
grid's points: fixtures only, never a check value. Winds are turned to grid-relative with the
meridian convergence that ``pyproj.Proj.get_factors`` reports (a route independent of the
reader's own angle).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pyproj  # noqa: F401  (before eccodes: import order that newer eccodes wheels need)
import xarray as xr

SAMPLE = sorted((Path(__file__).resolve().parents[1] / "sample_cases").glob("*.nc"))[0]
LEVELS = (1000, 925, 850, 700, 600, 500, 400, 300, 250, 200, 150, 100)
R_EARTH = 6371229.0  # GRIB shapeOfTheEarth 6 (WMO code table 3.2)

PROJECTIONS = {
    # name: (proj string without the earth, cf grid_mapping attrs, grib gridDefinitionTemplateNumber)
    "lambert": ("+proj=lcc +lat_1=35 +lat_2=60 +lat_0=47 +lon_0=-30",
                dict(grid_mapping_name="lambert_conformal_conic", standard_parallel=[35.0, 60.0],
                     longitude_of_central_meridian=-30.0, latitude_of_projection_origin=47.0), 30),
    "polar_stereographic": ("+proj=stere +lat_0=90 +lat_ts=60 +lon_0=-30",
                            dict(grid_mapping_name="polar_stereographic", straight_vertical_longitude_from_pole=-30.0,
                                 latitude_of_projection_origin=90.0, standard_parallel=60.0), 20),
    "mercator": ("+proj=merc +lat_ts=45 +lon_0=0",
                 dict(grid_mapping_name="mercator", standard_parallel=45.0, longitude_of_projection_origin=0.0), 10),
    "rotated_pole": (None, dict(grid_mapping_name="rotated_latitude_longitude", grid_north_pole_latitude=43.0,
                                grid_north_pole_longitude=150.0), 1),
}


def sample_times(n=1, start=4):
    ds = xr.open_dataset(SAMPLE)
    return ds.isel(time=slice(start, start + n)).load()


def plane_grid(kind, nx=48, ny=40, dx=50000.0, centre=(-30.0, 50.0)):
    """(crs, x 1-D, y 1-D, lat2d, lon2d) of a projected grid of nx x ny points around ``centre``."""
    proj, cf, _ = PROJECTIONS[kind]
    if kind == "rotated_pole":
        crs = pyproj.CRS.from_cf(dict(cf, earth_radius=R_EARTH))
        dx = dx / 111200.0  # degrees of the rotated grid
    else:
        crs = pyproj.CRS.from_proj4(f"{proj} +R={R_EARTH} +units=m +no_defs")
    fwd = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True)
    inv = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
    xc, yc = fwd.transform(*centre)
    x = xc + (np.arange(nx) - (nx - 1) / 2) * dx
    y = yc + (np.arange(ny) - (ny - 1) / 2) * dx
    X, Y = np.meshgrid(x, y)
    lon2d, lat2d = inv.transform(X, Y)
    return crs, x, y, np.asarray(lat2d), np.asarray(lon2d)


def convergence_angle(crs, lat2d, lon2d):
    """Angle (rad, counter-clockwise) from east to the grid x axis, from pyproj's meridian
    convergence (get_factors): grid x is rotated by minus the convergence."""
    f = pyproj.Proj(crs).get_factors(lon2d, lat2d)
    return -np.deg2rad(np.asarray(f.meridian_convergence))


def atmosphere_on(lat2d, lon2d, times=1, start=4, levels=LEVELS):
    """The sample storm's fields (earth-relative winds) at the given 2-D points: Dataset with
    dims (time, pressure hPa, y, x)."""
    src = sample_times(times, start).sel(pressure=[p * 100.0 for p in levels])
    lat = xr.DataArray(lat2d, dims=("y", "x"))
    lon = xr.DataArray(lon2d, dims=("y", "x"))
    out = src.interp(latitude=lat, longitude=lon)
    out = out.drop_vars(["latitude", "longitude"])
    return out.assign_coords(pressure=np.asarray(levels, float))


def to_grid_relative(u, v, angle):
    c, s = np.cos(angle), np.sin(angle)
    return u * c + v * s, -u * s + v * c


# --- GRIB2 ----------------------------------------------------------------------------------

def _grib_grid(h, kind, crs, x, y, lat2d, lon2d, grid_relative):
    import eccodes as ec

    _, _, template = PROJECTIONS[kind]
    ec.codes_set(h, "gridDefinitionTemplateNumber", template)
    ec.codes_set(h, "shapeOfTheEarth", 6)
    ny, nx = lat2d.shape
    ec.codes_set(h, "Nx", nx)
    ec.codes_set(h, "Ny", ny)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # only the parameters are read
        p = crs.to_dict()
    if kind == "lambert":
        ec.codes_set(h, "LaDInDegrees", p["lat_0"])
        ec.codes_set(h, "LoVInDegrees", p["lon_0"] % 360)
        ec.codes_set(h, "Latin1InDegrees", p["lat_1"])
        ec.codes_set(h, "Latin2InDegrees", p["lat_2"])
        ec.codes_set(h, "latitudeOfSouthernPoleInDegrees", -90)
        ec.codes_set(h, "longitudeOfSouthernPoleInDegrees", 0)
    else:
        ec.codes_set(h, "LaDInDegrees", p["lat_ts"])
        ec.codes_set(h, "orientationOfTheGridInDegrees", p["lon_0"] % 360)
        ec.codes_set(h, "projectionCentreFlag", 0)
    ec.codes_set(h, "DxInMetres", float(x[1] - x[0]))
    ec.codes_set(h, "DyInMetres", float(y[1] - y[0]))
    ec.codes_set(h, "iScansNegatively", 0)
    ec.codes_set(h, "jScansPositively", 1)
    ec.codes_set(h, "latitudeOfFirstGridPointInDegrees", float(lat2d[0, 0]))
    ec.codes_set(h, "longitudeOfFirstGridPointInDegrees", float(lon2d[0, 0]) % 360)
    ec.codes_set(h, "resolutionAndComponentFlags", 8 if grid_relative else 0)


def write_grib(path, kind="lambert", *, times=1, grid_relative=True, below_ground=None, extra_levels=True,
               nx=48, ny=40, dx=50000.0, steps=False, start=4, pa_levels=(), members=0):
    """Write a pressure-level GRIB2 file on a projected grid (one message per field and level).

    ``below_ground``: boolean (ny, nx) mask of a mountain; levels with pressure above the
    mountain's surface pressure are written as missing (bitmap). ``extra_levels`` adds surface
    pressure and orography (surface), mean-sea-level pressure, tropopause and max-wind fields,
    as forecast centres put them in the same file. ``members``: an ensemble of that many
    members (product template 4.1), member m's temperature warmer by 0.1 m K. ``steps``: times as forecast steps of one
    run instead of analysis times. ``pa_levels``: these levels (hPa) are written as
    ``isobaricInPa`` levels in Pa, as some centres write the upper levels. Returns the grid (crs, x, y, lat2d, lon2d) and the source
    Dataset (earth-relative winds).
    """
    import eccodes as ec

    crs, x, y, lat2d, lon2d = plane_grid(kind, nx, ny, dx)
    atm = atmosphere_on(lat2d, lon2d, times, start)
    angle = convergence_angle(crs, lat2d, lon2d)
    ug, vg = to_grid_relative(atm["u"].values, atm["v"].values, angle) if grid_relative else (
        atm["u"].values, atm["v"].values)
    sp = None
    if below_ground is not None:
        # surface pressure: 640 hPa on the mountain, else the lowest level's pressure + 10 hPa
        sp = np.where(below_ground, 64000.0, 101000.0)
    fields = dict(t=atm["temperature"].values, u=ug, v=vg, gh=atm["geopotential"].values / 9.80665,
                  r=atm["relative_humidity"].values)
    t0 = np.datetime64(str(atm["time"].values[0])[:19])
    with open(path, "wb") as fh:
        def message(short, level_type, level, values, ti, bitmap=None, member=None):
            h = ec.codes_grib_new_from_samples("GRIB2")
            ec.codes_set(h, "centre", 255)  # no originating centre (WMO common code table C-11: missing)
            _grib_grid(h, kind, crs, x, y, lat2d, lon2d, grid_relative and short in ("u", "v"))
            tv = atm["time"].values[ti]
            if steps:
                ref = t0
                step = int((tv - t0) / np.timedelta64(1, "h"))
            else:
                ref, step = np.datetime64(str(tv)[:19]), 0
            d = str(ref)
            ec.codes_set(h, "dataDate", int(d[:10].replace("-", "")))
            ec.codes_set(h, "dataTime", int(d[11:13]) * 100)
            ec.codes_set(h, "productDefinitionTemplateNumber", 0 if member is None else 1)
            if member is not None:
                ec.codes_set(h, "typeOfEnsembleForecast", 3)
                ec.codes_set(h, "numberOfForecastsInEnsemble", members)
                ec.codes_set(h, "perturbationNumber", member)
            ec.codes_set(h, "typeOfGeneratingProcess", 2 if step else 0)
            ec.codes_set(h, "stepUnits", 1)
            ec.codes_set(h, "forecastTime", step)
            ec.codes_set(h, "typeOfLevel", level_type)
            if level is not None:
                ec.codes_set(h, "level", level)
            ec.codes_set(h, "shortName", short)
            vals = np.asarray(values, float).copy()
            if bitmap is not None and bitmap.any():
                ec.codes_set(h, "bitmapPresent", 1)
                ec.codes_set(h, "missingValue", 9999.0)
                vals[bitmap] = 9999.0
            ec.codes_set(h, "packingType", "grid_simple")
            ec.codes_set(h, "bitsPerValue", 24)
            ec.codes_set_values(h, vals.ravel())
            ec.codes_write(h, fh)
            ec.codes_release(h)

        for ti in range(atm.sizes["time"]):
            for k, lev in enumerate(LEVELS):
                mask = None if sp is None else (lev * 100.0 > sp)
                for short, arr in fields.items():
                    if members:
                        for m in range(members):
                            vals = arr[ti, k] + (0.1 * m if short == "t" else 0.0)
                            message(short, "isobaricInhPa", lev, vals, ti, mask, member=m)
                    elif lev in pa_levels:
                        message(short, "isobaricInPa", int(lev * 100), arr[ti, k], ti, mask)
                    else:
                        message(short, "isobaricInhPa", lev, arr[ti, k], ti, mask)
            if extra_levels:
                mslp = atm["mslp"].values[ti]
                message("prmsl", "meanSea", None, mslp, ti)
                message("sp", "surface", None, sp if sp is not None else mslp - 500.0, ti)
                orog = np.where(below_ground, 3700.0, 0.0) if below_ground is not None else np.zeros_like(lat2d)
                message("orog", "surface", None, orog, ti)
                message("pres", "tropopause", None, np.full(lat2d.shape, 22000.0), ti)
                message("u", "maxWind", None, np.full(lat2d.shape, 40.0), ti)
                message("v", "maxWind", None, np.full(lat2d.shape, 5.0), ti)
    return (crs, x, y, lat2d, lon2d), atm


# --- CF netCDF ------------------------------------------------------------------------------

def write_cf_netcdf(path, kind="lambert", *, times=1, grid_relative=False, nx=48, ny=40, dx=50000.0,
                    with_latlon=True, start=4):
    """CF-1.8 netCDF on a projected grid: 1-D x/y (metres, or degrees for the rotated pole), a
    ``grid_mapping`` variable, optional 2-D latitude/longitude; winds as x_wind/y_wind when
    ``grid_relative`` (CF standard names for grid-relative components)."""
    crs, x, y, lat2d, lon2d = plane_grid(kind, nx, ny, dx)
    atm = atmosphere_on(lat2d, lon2d, times, start)
    u, v = atm["u"].values, atm["v"].values
    if grid_relative:
        u, v = to_grid_relative(u, v, convergence_angle(crs, lat2d, lon2d))
    rotated = kind == "rotated_pole"
    xname, yname = ("rlon", "rlat") if rotated else ("x", "y")
    dims = ("time", "pressure", yname, xname)
    gm = dict(PROJECTIONS[kind][1], earth_radius=R_EARTH)
    data = {
        "ta": (dims, atm["temperature"].values.astype("float32"),
               dict(standard_name="air_temperature", units="K", grid_mapping="crs")),
        "ua": (dims, u.astype("float32"), dict(standard_name="x_wind" if grid_relative else "eastward_wind",
                                               units="m s-1", grid_mapping="crs")),
        "va": (dims, v.astype("float32"), dict(standard_name="y_wind" if grid_relative else "northward_wind",
                                               units="m s-1", grid_mapping="crs")),
        "zg": (dims, (atm["geopotential"].values / 9.80665).astype("float32"),
               dict(standard_name="geopotential_height", units="m", grid_mapping="crs")),
        "crs": ((), np.int32(0), gm),
    }
    coords = {
        "time": atm["time"].values,
        "pressure": ("pressure", np.asarray(LEVELS, float), dict(standard_name="air_pressure", units="hPa")),
        xname: (xname, x, dict(standard_name="grid_longitude" if rotated else "projection_x_coordinate",
                               units="degrees" if rotated else "m")),
        yname: (yname, y, dict(standard_name="grid_latitude" if rotated else "projection_y_coordinate",
                               units="degrees" if rotated else "m")),
    }
    if with_latlon:
        coords["lat"] = ((yname, xname), lat2d, dict(standard_name="latitude", units="degrees_north"))
        coords["lon"] = ((yname, xname), lon2d, dict(standard_name="longitude", units="degrees_east"))
        for name in ("ta", "ua", "va", "zg"):
            data[name][2]["coordinates"] = "lat lon"
    ds = xr.Dataset(data, coords=coords, attrs=dict(Conventions="CF-1.8",
                                                    title="INVENTED test storm on a projected grid"))
    ds.to_netcdf(path)
    return (crs, x, y, lat2d, lon2d), atm
