"""Readers: netCDF (netCDF4/h5netcdf), GRIB2 (cfgrib), Zarr or an in-memory Dataset.

Everything is normalised to the conventions in DEVELOPERS.md: dimensions
``(time, [member], pressure, latitude, longitude)``, pressure in Pa decreasing,
latitude ascending, longitude ascending and contiguous, the variables
``temperature`` (K), ``u``, ``v`` (m s-1), ``geopotential`` (m2 s-2) and the
optional ``relative_humidity`` (%), ``specific_humidity`` (kg kg-1), ``mslp`` (Pa).

Files are opened with their format's reader only: nothing is unpickled or
evaluated. Large files stay lazy (Dask chunks of one time) until a view needs
a time.
"""
from __future__ import annotations

import hashlib
import os
import warnings
from pathlib import Path

import numpy as np
import xarray as xr

from .errors import FileFormatError, GridError, InputError, MissingVariableError, UnitsError
from .places import domain_label, lat_range, lon_range
from .units import G, units

__all__ = ["open_case", "read_dataset", "normalise", "file_checksum", "detect_format"]

# --- names ---------------------------------------------------------------------------------

_COORD_NAMES = {
    "latitude": ("latitude", "lat", "lats", "nav_lat", "xlat", "y_lat", "rlat"),
    "longitude": ("longitude", "lon", "lons", "long", "nav_lon", "xlong", "x_lon", "rlon"),
    "pressure": ("pressure", "isobaricinhpa", "isobaricinpa", "isobaric", "level", "lev", "plev",
                 "pressure_level", "pressure_levels", "p", "pres", "pre", "levels", "air_pressure"),
    "time": ("time", "valid_time", "t", "times", "date", "datetime"),
    "member": ("member", "number", "ensemble", "ens", "realization", "realisation", "member_id"),
}
_COORD_STANDARD_NAMES = {
    "latitude": ("latitude", "grid_latitude"),
    "longitude": ("longitude", "grid_longitude"),
    "pressure": ("air_pressure",),
    "time": ("time",),
    "member": ("realization",),
}

# target name -> (CF standard names, common short names, target units)
_VARIABLES = {
    "temperature": (("air_temperature",), ("temperature", "t", "ta", "temp", "air", "tmp", "tt"), "K"),
    "u": (("eastward_wind", "x_wind"), ("u", "ua", "uwnd", "ugrd", "u_wind", "uu", "u_component_of_wind"), "m/s"),
    "v": (("northward_wind", "y_wind"), ("v", "va", "vwnd", "vgrd", "v_wind", "vv", "v_component_of_wind"), "m/s"),
    "geopotential": (("geopotential", "geopotential_height"),
                     ("geopotential", "z", "phi", "fi", "gh", "hgt", "zg", "geopotential_height",
                      "height", "zh"), None),
    "relative_humidity": (("relative_humidity",), ("relative_humidity", "r", "rh", "hur", "rhum"), "percent"),
    "specific_humidity": (("specific_humidity",), ("specific_humidity", "q", "hus", "shum", "spfh", "qv"), "kg/kg"),
    "mslp": (("air_pressure_at_mean_sea_level", "air_pressure_at_sea_level"),
             ("mslp", "msl", "prmsl", "slp", "psl", "mslet", "pmsl"), "Pa"),
    "surface_pressure": (("surface_air_pressure",), ("surface_pressure", "sp", "ps", "psfc", "pres_sfc"), "Pa"),
    "surface_geopotential": (("surface_geopotential", "surface_altitude"),
                             ("surface_geopotential", "orog", "orography", "phis", "zs", "hgt_sfc"), None),
}
REQUIRED = ("temperature", "u", "v", "geopotential")

_ATTRS = {
    "temperature": dict(standard_name="air_temperature", long_name="air temperature", units="K"),
    "u": dict(standard_name="eastward_wind", long_name="eastward wind", units="m s-1"),
    "v": dict(standard_name="northward_wind", long_name="northward wind", units="m s-1"),
    "geopotential": dict(standard_name="geopotential", long_name="geopotential", units="m2 s-2"),
    "relative_humidity": dict(standard_name="relative_humidity", long_name="relative humidity", units="%"),
    "specific_humidity": dict(standard_name="specific_humidity", long_name="specific humidity", units="kg kg-1"),
    "mslp": dict(standard_name="air_pressure_at_mean_sea_level", long_name="mean sea-level pressure", units="Pa"),
    "surface_pressure": dict(standard_name="surface_air_pressure", long_name="surface pressure", units="Pa"),
    "surface_geopotential": dict(standard_name="surface_geopotential", long_name="surface geopotential",
                                 units="m2 s-2"),
}

# unit spellings pint does not know, mapped to ones it does
_UNIT_ALIASES = {
    "gpm": "m", "m**2 s**-2": "m**2/s**2", "m2 s-2": "m**2/s**2", "m^2/s^2": "m**2/s**2",
    "m2/s2": "m**2/s**2", "(0 - 1)": "dimensionless", "0-1": "dimensionless", "1": "dimensionless",
    "fraction": "dimensionless", "%": "percent", "degc": "degC", "deg c": "degC", "celsius": "degC",
    "c": "degC", "k": "K", "kelvin": "K", "hpa": "hPa", "mb": "hPa", "mbar": "hPa", "millibars": "hPa",
    "pa": "Pa", "kg kg**-1": "kg/kg", "kg kg-1": "kg/kg", "kg/kg": "kg/kg", "m s**-1": "m/s",
    "m s-1": "m/s", "m/s": "m/s", "ms-1": "m/s", "knots": "knot", "kt": "knot", "degrees_c": "degC",
    "degrees_celsius": "degC", "deg_c": "degC", "gpdm": "dam",
}


# --- files ---------------------------------------------------------------------------------

def detect_format(path) -> str:
    """Return ``"netcdf"``, ``"grib"`` or ``"zarr"`` for a path, from its bytes (not its name).

    Raises FileFormatError for a missing, empty or unrecognised file.
    """
    p = Path(path)
    if not p.exists():
        raise FileFormatError(f"File not found: {str(p)!r}. Check the path (and that it lies in a data folder).")
    if p.is_dir():
        if any((p / m).exists() for m in (".zgroup", ".zattrs", "zarr.json", ".zmetadata")):
            return "zarr"
        raise FileFormatError(f"{str(p)!r} is a folder but not a Zarr store (no .zgroup or zarr.json).")
    size = p.stat().st_size
    if size == 0:
        raise FileFormatError(f"File {str(p)!r} is empty (0 bytes). Re-download or re-export it.")
    with open(p, "rb") as fh:
        head = fh.read(8)
    if head[:3] == b"CDF" or head[:8] == b"\x89HDF\r\n\x1a\n":
        return "netcdf"
    if head[:4] == b"GRIB":
        with open(p, "rb") as fh:
            fh.seek(max(0, size - 4))
            tail = fh.read(4)
        if tail != b"7777":  # every GRIB message ends with "7777" (WMO FM 92 GRIB, section 8)
            raise FileFormatError(
                f"GRIB file {str(p)!r} ends in the middle of a message (it does not end with the '7777' end "
                "marker): it is truncated. Re-download or re-export it.")
        return "grib"
    raise FileFormatError(
        f"File {str(p)!r} is not netCDF, GRIB2 or Zarr (it starts with {head[:8]!r}). "
        "PV Workbench reads pressure-level analyses in those formats only.")


def _files_of(path):
    """The file itself, or every file of a folder (a Zarr store) in sorted order."""
    p = Path(path)
    return sorted(q for q in p.rglob("*") if q.is_file()) if p.is_dir() else [p]


def file_checksum(path) -> str:
    """SHA-256 of a file's bytes (of every file, in sorted order, for a Zarr folder)."""
    h = hashlib.sha256()
    p = Path(path)
    for f in _files_of(p):
        if p.is_dir():
            h.update(str(f.relative_to(p)).encode())
        with open(f, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
    return h.hexdigest()


# GRIB keys read besides cfgrib's defaults: the earth's shape, the wind-component flag and the
# projection keys of every grid type the workbench places (workbench.grids)
GRIB_READ_KEYS = ("shapeOfTheEarth", "radius", "uvRelativeToGrid", "resolutionAndComponentFlags",
                  "LaDInDegrees", "LoVInDegrees", "Latin1InDegrees", "Latin2InDegrees",
                  "projectionCentreFlag", "orientationOfTheGridInDegrees", "latitudeOfSouthernPoleInDegrees",
                  "longitudeOfSouthernPoleInDegrees", "angleOfRotationInDegrees")
_GRIB_PRESSURE_LEVELS = ("isobaricInhPa", "isobaricInPa")
# hypercubes at other level types kept as single fields: (typeOfLevel, GRIB shortName) -> target
_GRIB_SURFACE_FIELDS = {("meanSea", "prmsl"): "mslp", ("meanSea", "msl"): "mslp", ("meanSea", "mslet"): "mslp",
                        ("surface", "sp"): "surface_pressure", ("surface", "orog"): "surface_geopotential",
                        ("surface", "z"): "surface_geopotential"}


def _open_grib(path, **kw):
    """Open a GRIB2 file as forecast centres write it: every hypercube (cfgrib.open_datasets
    splits the file by level type), the isobaric ones merged, surface pressure, orography and
    mean-sea-level pressure kept, other level types (tropopause, maximum wind, ...) left out
    and listed in the notes. ``filter_by_keys=`` reads one hypercube only."""
    # pyproj (through cartopy or directly) must be loaded before eccodes: newer eccodes
    # wheels clash with pyproj's bundled PROJ when imported first. Importing pyproj here
    # guarantees the order whatever the caller imported before.
    try:
        import pyproj  # noqa: F401
    except ImportError:  # pragma: no cover - pyproj comes with cartopy
        pass
    try:
        import cfgrib
    except ImportError as exc:
        raise FileFormatError(
            f"{str(path)!r} is GRIB, which needs the optional reader: pip install 'pv-workbench[grib]'.") from exc
    backend_kwargs = {"indexpath": "", "read_keys": list(GRIB_READ_KEYS)}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if "filter_by_keys" in kw:
            backend_kwargs["filter_by_keys"] = kw.pop("filter_by_keys")
            return xr.open_dataset(path, engine="cfgrib", backend_kwargs=backend_kwargs, **kw)
        cubes = cfgrib.open_datasets(str(path), backend_kwargs=backend_kwargs, **kw)
    pressure, aux, skipped = [], {}, []
    for cube in cubes:
        levels = [c for c in _GRIB_PRESSURE_LEVELS if c in cube.coords]
        if levels:
            if cube[levels[0]].ndim == 0:  # a single isobaric level: make it a dimension
                cube = cube.expand_dims(levels[0])
            pressure.append(cube)
            continue
        for name in cube.data_vars:
            lt = cube[name].attrs.get("GRIB_typeOfLevel", "")
            target = _GRIB_SURFACE_FIELDS.get((lt, cube[name].attrs.get("GRIB_shortName", name)))
            if target and target not in aux:
                da = cube[name]
                da = da.drop_vars([c for c in da.coords if c in (lt,) or (c not in da.dims and da[c].ndim == 0
                                                                      and c not in ("time", "step", "valid_time"))])
                aux[target] = da.rename(target)
            else:
                skipped.append(f"{name} ({lt or 'unknown level'})")
    if not pressure:
        found = sorted({str(c[v].attrs.get("GRIB_typeOfLevel", "?")) for c in cubes for v in c.data_vars})
        raise MissingVariableError(
            f"{str(path)!r} holds no fields on isobaric levels (level types found: {', '.join(found) or 'none'}). "
            "PV needs temperature, winds and geopotential on pressure levels.")
    # levels in Pa (centres write the levels under 1 hPa, or all of them, that way) join the
    # hPa ones in hPa
    def in_hpa(cube):
        if "isobaricInPa" in cube.coords:
            vals = np.asarray(cube["isobaricInPa"].values, float) / 100.0
            cube = cube.assign_coords(isobaricInPa=vals).rename(isobaricInPa="isobaricInhPa")
        cube["isobaricInhPa"].attrs = dict(units="hPa", standard_name="air_pressure")
        return cube

    pressure = [in_hpa(p) for p in pressure]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds = xr.merge(pressure, compat="override", join="outer") if len(pressure) > 1 else pressure[0]
        for target, da in aux.items():
            da = da.drop_vars([c for c in da.coords if c not in ds.coords and c not in da.dims])
            ds[target] = da
    if aux:
        ds.attrs["workbench_grib_surface"] = ", ".join(sorted(aux))
    if skipped:
        ds.attrs["workbench_grib_skipped"] = ", ".join(sorted(set(skipped)))
    return ds


def _small_chunk_cache():
    """Keep the netCDF library's per-variable chunk cache small (4 MiB). Its default holds tens of
    MB per variable of chunks the workbench reads once (a region of a big global file touches
    every chunk of a time once), which is memory held for nothing."""
    try:
        import netCDF4

        size, nelems, preemption = netCDF4.get_chunk_cache()
        if size > 4 << 20:
            netCDF4.set_chunk_cache(4 << 20, nelems, preemption)
    except Exception:  # pragma: no cover - an older netCDF4 without the call
        pass


def read_dataset(path, *, chunks=None, **kw) -> xr.Dataset:
    """Open a file with the reader its bytes call for; FileFormatError with the cause if it fails."""
    fmt = detect_format(path)
    try:
        if fmt == "zarr":
            return xr.open_zarr(path, chunks=chunks, **kw)
        if fmt == "grib":
            return _open_grib(path, chunks=chunks, **kw)
        try:
            _small_chunk_cache()
            ds = xr.open_dataset(path, engine="netcdf4", chunks=chunks, **kw)
        except (OSError, ValueError):
            ds = xr.open_dataset(path, engine="h5netcdf", chunks=chunks, **kw)
        if len(ds.data_vars) == 0 and "group" not in kw:
            from .checks import netcdf_groups

            groups = netcdf_groups(path)
            if groups:
                listed = "; ".join(f"{g}: {', '.join(v[:6])}" for g, v in list(groups.items())[:5])
                raise FileFormatError(
                    f"{str(path)!r} keeps its variables in netCDF groups ({listed}); open one with "
                    f"open_case(path, group='{next(iter(groups)).lstrip('/')}').")
        return ds
    except InputError:  # the package's own, already clear
        raise
    except Exception as exc:  # truncated or corrupt files end up here
        raise FileFormatError(
            f"Could not read {str(path)!r} as {fmt}: {type(exc).__name__}: {exc}. "
            "The file may be truncated or corrupt; re-download or re-export it.") from exc


# --- normalisation -------------------------------------------------------------------------

def _lower(s):
    return str(s).lower()


def _find_coord(ds, target, override=None):
    if override:
        if override not in ds.variables and override not in ds.dims:
            raise GridError(f"The coordinate {override!r} given for {target} is not in the data "
                            f"(coordinates: {sorted(map(str, ds.coords))}).")
        return override
    cands = [c for c in list(ds.coords) + list(ds.dims) if c in ds.variables or c in ds.dims]
    for c in cands:
        if c in ds.variables and ds[c].attrs.get("standard_name") in _COORD_STANDARD_NAMES[target]:
            if ds[c].ndim <= 1:
                return c
    names = _COORD_NAMES[target]
    for n in names:
        for c in cands:
            if _lower(c) == n and (c not in ds.variables or ds[c].ndim <= 1):
                return c
    if target == "latitude":
        for c in cands:
            if c in ds.variables and ds[c].attrs.get("units") in ("degrees_north", "degree_north", "degN"):
                return c
    if target == "longitude":
        for c in cands:
            if c in ds.variables and ds[c].attrs.get("units") in ("degrees_east", "degree_east", "degE"):
                return c
    return None


def _parse_units(ustr, name):
    if ustr is None:
        return None
    key = str(ustr).strip()
    key = _UNIT_ALIASES.get(key.lower(), _UNIT_ALIASES.get(key, key))
    try:
        return units.Unit(key) if key != "dimensionless" else units.dimensionless
    except Exception:
        try:
            return units.parse_units(key)
        except Exception as exc:
            raise UnitsError(
                f"Variable {name!r} has units {ustr!r}, which are not recognised. Fix the file's "
                f"units attribute or pass units={{{name!r}: '...'}} to open_case.") from exc


def _convert(da, target_units, name, shown, unit_override=None):
    ustr = unit_override if unit_override is not None else da.attrs.get("units")
    if ustr is None or str(ustr).strip() == "":
        raise UnitsError(
            f"Variable {shown!r} (used as {name}) has no units attribute. Set it in the file "
            f"or pass units={{{shown!r}: '{target_units}'}} to open_case.")
    u = _parse_units(ustr, shown)
    tu = units.parse_units(target_units) if target_units != "percent" else units.percent
    if u.dimensionality != tu.dimensionality:
        raise UnitsError(
            f"Variable {shown!r} (used as {name}) has units {ustr!r}, which cannot be converted to "
            f"{target_units}. Check that the right variable was picked (pass variables={{'{name}': ...}}) "
            "or fix its units attribute.")
    if u == tu:
        return da
    if u == units.degC or str(u) in ("degree_Celsius",):
        return da + 273.15
    factor = (1 * u).to(tu).magnitude
    offset = (0 * u).to(tu).magnitude
    if offset != 0:
        return da * factor + offset
    return da * factor


def _find_var(ds, target, override, taken):
    if override:
        if override not in ds.data_vars:
            raise MissingVariableError(
                f"The variable {override!r} given for {target} is not in the data "
                f"(variables: {sorted(map(str, ds.data_vars))}).")
        return override
    std, shorts, _ = _VARIABLES[target]
    for v in ds.data_vars:
        if v not in taken and ds[v].attrs.get("standard_name") in std:
            return v
    for n in shorts:
        for v in ds.data_vars:
            if v not in taken and _lower(v) == n:
                return v
    for v in ds.data_vars:  # GRIB short names
        if v not in taken and _lower(ds[v].attrs.get("GRIB_shortName", "")) in shorts:
            return v
    return None


def _contiguous_longitudes(lon):
    """Return (order, new_lon): an index order and longitudes that increase without a jump."""
    lon = np.asarray(lon, dtype=float)
    m = np.mod(lon, 360.0)
    order = np.argsort(m, kind="stable")
    ms = m[order]
    if ms.size < 2:
        return order, ms
    gaps = np.diff(np.concatenate([ms, [ms[0] + 360.0]]))
    k = int(np.argmax(gaps))  # the largest gap is outside the domain
    order = np.roll(order, -(k + 1))
    new = m[order].copy()
    jumps = np.diff(new) < 0
    new[1:] += 360.0 * np.cumsum(jumps)
    if new[-1] > 360.0 or (new[0] >= 180.0):
        new -= 360.0
    if new[0] < -180.0 - 1e-9:
        new += 360.0
    return order, new


def _native_crs(ds):
    """(crs, how) of a projected dataset, or (None, None) for a latitude-longitude one."""
    from . import grids

    for v in ds.data_vars:
        gm = ds[v].attrs.get("grid_mapping") or ds[v].encoding.get("grid_mapping")
        if gm:
            gm = str(gm).split(":")[0].strip()
            if gm not in ds.variables:
                raise GridError(f"Variable {v!r} names the grid mapping {gm!r}, which is not in the file; "
                                "the projection cannot be read.")
            if ds[gm].attrs.get("grid_mapping_name") in ("latitude_longitude",):
                return None, None
            return grids.crs_from_cf(ds[gm].attrs), f"CF grid mapping {gm!r}"
    for v in ds.data_vars:
        if "GRIB_gridType" in ds[v].attrs:
            crs = grids.crs_from_grib(ds[v].attrs)
            return (crs, f"GRIB grid {ds[v].attrs['GRIB_gridType']!r}") if crs is not None else (None, None)
    return None, None


def _two_d(ds, target):
    for c in list(ds.coords) + list(ds.data_vars):
        da = ds[c]
        if da.ndim == 2 and (da.attrs.get("standard_name") == target or _lower(c) in _COORD_NAMES[target]):
            return c
    return None


def _to_latlon(ds, *, variables, region, grid_step, winds):
    """Projected data -> the latitude-longitude grid of workbench.grids (winds earth-relative).
    Returns the dataset unchanged for data already on latitude-longitude."""
    from . import grids

    crs, how = _native_crs(ds)
    lat2n, lon2n = _two_d(ds, "latitude"), _two_d(ds, "longitude")
    if crs is None:
        if lat2n and lon2n:
            raise GridError(
                f"The file has 2-D latitude/longitude ({lat2n!r}, {lon2n!r}) but no projection: add a CF "
                "grid_mapping variable (and grid_mapping attributes on the fields), or regrid the data to a "
                "regular latitude-longitude grid first.")
        return ds
    # the horizontal dimensions: those of the 2-D latitude, else the last two of the temperature
    if lat2n and lon2n:
        ydim, xdim = ds[lat2n].dims
        lat2d, lon2d = ds[lat2n].values, ds[lon2n].values
        ya, xa = grids.plane_axes(lat2d, lon2d, crs)
    else:
        t = _find_var(ds, "temperature", (variables or {}).get("temperature"), set())
        if t is None:
            raise MissingVariableError("No temperature variable found on the projected grid.")
        ydim, xdim = ds[t].dims[-2:]
        if xdim not in ds.coords or ydim not in ds.coords:
            raise GridError(f"The projected grid has neither 2-D latitude/longitude nor {xdim!r}/{ydim!r} "
                            "coordinates; the points cannot be placed.")
        scale = {"km": 1000.0, "kilometer": 1000.0, "kilometre": 1000.0}
        xa = np.asarray(ds[xdim].values, float) * scale.get(str(ds[xdim].attrs.get("units", "m")).lower(), 1.0)
        ya = np.asarray(ds[ydim].values, float) * scale.get(str(ds[ydim].attrs.get("units", "m")).lower(), 1.0)
        for name, a in ((xdim, xa), (ydim, ya)):
            d = np.diff(a)
            if a.size < 3 or not np.all(np.isfinite(a)) or np.abs(d - d.mean()).max() > 1e-3 * abs(d.mean()):
                raise GridError(f"The projected grid's {name!r} coordinate is not evenly spaced (or has fewer than "
                                "3 points); a model grid has one spacing. Check the coordinate values.")
        _, to_geo = grids._transformers(crs)
        X, Y = np.meshgrid(xa, ya)
        lon2d, lat2d = (np.asarray(a) for a in to_geo.transform(X, Y))
    name = grids.projection_name(crs)
    notes = []
    drop = [c for c in ds.coords if c not in ds.dims and ds[c].ndim >= 1 and set(ds[c].dims) & {xdim, ydim}]
    ds = ds.drop_vars(drop)
    ds = ds.drop_vars([v for v in ds.data_vars if not (set(ds[v].dims) >= {xdim, ydim})])
    ds = ds.assign_coords({xdim: xa, ydim: ya})
    # winds: earth- or grid-relative?
    u = _find_var(ds, "u", (variables or {}).get("u"), set())
    v = _find_var(ds, "v", (variables or {}).get("v"), {u} if u else set())
    if u and v:
        au, av = ds[u].attrs, ds[v].attrs
        flag = au.get("GRIB_uvRelativeToGrid")
        rflag = au.get("GRIB_resolutionAndComponentFlags")
        if winds in ("grid", "earth"):
            grid_rel, why = winds == "grid", f"as told (winds={winds!r})"
        elif flag is not None:
            grid_rel, why = int(flag) == 1, f"GRIB uvRelativeToGrid={int(flag)}"
        elif rflag is not None:
            grid_rel, why = bool(int(rflag) & 8), f"GRIB resolution-and-component flags={int(rflag)}"
        elif au.get("standard_name") in ("x_wind", "grid_eastward_wind") or av.get("standard_name") == "y_wind":
            grid_rel, why = True, "CF standard names x_wind/y_wind"
        else:
            grid_rel, why = False, "no grid-relative flag or x_wind/y_wind standard name"
        if grid_rel:
            angle = xr.DataArray(grids.grid_angle(crs, xa, ya), dims=(ydim, xdim))
            ue, ve = grids.rotate_to_earth(ds[u], ds[v], angle)
            ds[u] = ue.assign_attrs(au, standard_name="eastward_wind")
            ds[v] = ve.assign_attrs(av, standard_name="northward_wind")
            notes.append(f"Winds were grid-relative ({why}) and were rotated to earth-relative.")
        else:
            notes.append(f"Winds taken as earth-relative ({why}).")
    ds = ds.sortby([xdim, ydim])
    lat, lon, step = grids.latlon_target(lat2d, lon2d, crs, np.sort(xa), np.sort(ya), grid_step=grid_step,
                                         region=region)
    dxkm = float(np.abs(np.diff(xa)).mean()) * grids._axis_scale(crs) / 1000.0
    attrs = dict(ds.attrs)
    keep_attrs = {v: dict(ds[v].attrs) for v in ds.data_vars}
    # the level fields (those with every dimension of the temperature): cubic; the rest: linear
    t = _find_var(ds, "temperature", (variables or {}).get("temperature"), set())
    tdims = set(ds[t].dims) if t is not None else {xdim, ydim}
    level_fields = [v for v in ds.data_vars if set(ds[v].dims) >= tdims and len(tdims) > 2]
    out = grids.regrid_to_latlon(ds, crs, lat, lon, xdim=xdim, ydim=ydim, cubic=level_fields)
    for v, a in keep_attrs.items():
        out[v].attrs = a
    out.attrs = attrs
    out["latitude"].attrs = dict(standard_name="latitude", units="degrees_north")
    out["longitude"].attrs = dict(standard_name="longitude", units="degrees_east")
    notes.insert(0, f"Native grid: {name} ({how}), {len(xa)} x {len(ya)} points at {dxkm:.3g} km; computed on "
                    f"a {step:g} degree latitude-longitude grid ({lat.size} x {lon.size}, "
                    f"{lat_range(lat[0], lat[-1])}, {lon_range(lon[0], lon[-1])}) by interpolation on the "
                    "projection plane (cubic for the level fields, linear for the surface fields).")
    out.attrs.update(native_crs=crs.to_wkt(), native_projection=name,
                     native_grid=f"{len(xa)} x {len(ya)}, {dxkm:.3g} km", latlon_step=step)
    _add_notes(out, notes)
    return out


def _add_notes(ds, notes):
    old = ds.attrs.get("workbench_notes", "")
    lines = [n for n in (old.split("\n") if isinstance(old, str) else list(old)) if n]
    lines += [n for n in notes if n and n not in lines]
    ds.attrs["workbench_notes"] = "\n".join(lines)


def normalise(ds: xr.Dataset, *, variables=None, coords=None, units_override=None,
              keep_attrs=True, region=None, grid_step=None, winds=None) -> xr.Dataset:
    """Normalise a Dataset to the project's conventions (see the module docstring).

    Parameters
    ----------
    variables : dict, optional
        Target name -> name in the data, e.g. ``{"temperature": "TMP_P0"}``.
    coords : dict, optional
        Target coordinate -> name in the data, e.g. ``{"pressure": "lv_ISBL0"}``.
    units_override : dict, optional
        Name in the data -> units string, for files with missing or wrong units.
    region : (W, E, S, N), optional
        For projected grids: the latitude-longitude box to compute on (default: the largest box
        inside the native domain). Regular grids are cut by :func:`open_case`.
    grid_step : float, optional
        Latitude-longitude step (degrees) for projected grids (default: workbench.grids' rule).
    winds : "grid" | "earth", optional
        Override of what a projected file says about its wind components.
    """
    variables = dict(variables or {})
    coords = dict(coords or {})
    units_override = dict(units_override or {})
    if not isinstance(ds, xr.Dataset):
        raise FileFormatError(f"Expected an xarray.Dataset, got {type(ds).__name__}.")
    if len(ds.data_vars) == 0:
        raise MissingVariableError(
            "The data hold no variables at all. Open a pressure-level analysis with temperature, "
            "u, v and geopotential (or geopotential height).")

    # cfgrib: time is the reference time, valid_time the one that matters
    if "valid_time" in ds.coords and "time" in ds.coords and ds["time"].ndim == 0 and "time" not in coords:
        ds = ds.drop_vars("time")
    if "step" in ds.coords and ds["step"].ndim == 0:
        ds = ds.drop_vars("step")
    # forecast steps of one run: the valid time is the time axis
    if "step" in ds.dims and "valid_time" in ds.coords and ds["valid_time"].dims == ("step",):
        ds = ds.swap_dims(step="valid_time").drop_vars(["step"] + (["time"] if "time" in ds.coords
                                                                   and ds["time"].ndim == 0 else []))
    elif "time" in ds.dims and "valid_time" in ds.coords and ds["valid_time"].dims == ("time",):
        ds = ds.assign_coords(time=ds["valid_time"].values).drop_vars("valid_time")
    notes = []
    if ds.attrs.get("workbench_grib_skipped"):
        notes.append(f"GRIB fields on other level types left out: {ds.attrs['workbench_grib_skipped']}.")
    ds = _to_latlon(ds, variables=variables, region=region, grid_step=grid_step, winds=winds)

    found = {}
    for target in ("latitude", "longitude", "pressure", "time", "member"):
        c = _find_coord(ds, target, coords.get(target))
        if c is not None:
            found[target] = c
    for target in ("latitude", "longitude", "pressure"):
        if target not in found:
            raise GridError(
                f"No {target} coordinate found (coordinates: {sorted(map(str, ds.coords))}, "
                f"dimensions: {sorted(map(str, ds.dims))}). Pass coords={{'{target}': '<name>'}} to open_case.")

    # variables
    taken, picked = set(), {}
    for target in _VARIABLES:
        v = _find_var(ds, target, variables.get(target), taken)
        if v is not None:
            picked[target] = v
            taken.add(v)
    missing = [t for t in REQUIRED if t not in picked]
    if missing:
        raise MissingVariableError(
            f"Required variable(s) {', '.join(missing)} not found (variables in the data: "
            f"{sorted(map(str, ds.data_vars))}). PV needs temperature, u, v and geopotential or "
            "geopotential height on pressure levels; pass variables={'temperature': '<name>', ...} "
            "if they are there under other names.")

    out = {}
    for target, v in picked.items():
        da = ds[v]
        if target in ("geopotential", "surface_geopotential"):
            ustr = units_override.get(v, da.attrs.get("units"))
            if ustr is None or str(ustr).strip() == "":
                raise UnitsError(
                    f"Variable {v!r} (used as {target}) has no units attribute, so geopotential "
                    f"(m2 s-2) and geopotential height (m) cannot be told apart. Pass "
                    f"units={{{v!r}: 'm2 s-2'}} or units={{{v!r}: 'm'}} to open_case.")
            u = _parse_units(ustr, v)
            if u.dimensionality == units.parse_units("m").dimensionality:
                da = _convert(da, "m", target, v, ustr) * G
            elif u.dimensionality == units.parse_units("m**2/s**2").dimensionality:
                da = _convert(da, "m**2/s**2", target, v, ustr)
            else:
                raise UnitsError(
                    f"Variable {v!r} (used as geopotential) has units {ustr!r}: expected m2 s-2 "
                    "(geopotential) or m / gpm (geopotential height). Fix the units attribute.")
        elif target == "relative_humidity":
            ustr = units_override.get(v, da.attrs.get("units"))
            u = _parse_units(ustr, v) if ustr else None
            if u is None or u == units.dimensionless:
                # a fraction (0-1) or unitless: decide by range, say so
                vmax = float(da.max())
                da = da * 100.0 if vmax <= 1.5 else da
            else:
                da = _convert(da, "percent", target, v, ustr)
        else:
            da = _convert(da, _VARIABLES[target][2], target, v, units_override.get(v))
        da = da.copy(deep=False)
        da.attrs = dict(_ATTRS[target], source_name=str(v))
        da.encoding = {}
        out[target] = da

    new = xr.Dataset(out, attrs=dict(ds.attrs) if keep_attrs else {})
    rename = {found[k]: k for k in found if found[k] != k}
    # a 2-D variable may carry a different vertical coordinate name: drop extra coords
    new = new.rename({k: v for k, v in rename.items() if k in new.variables or k in new.dims})

    # time and member
    if "time" not in new.dims:
        if "time" in new.coords:
            new = new.expand_dims("time")
        else:
            new = new.expand_dims(time=[np.datetime64("NaT", "ns")])
    if "member" in new.coords and "member" not in new.dims:
        new = new.drop_vars("member")
    from .checks import standard_calendar

    new = standard_calendar(new, "time")  # 360-day, noleap ... -> standard datetimes (or a clear refusal)
    tvals = new["time"].values
    if tvals.size != np.unique(tvals).size:
        vals, counts = np.unique(tvals, return_counts=True)
        dup = [str(x) for x in vals[counts > 1]][:5]
        raise GridError(
            f"Duplicate times in the data: {dup}. Remove them (e.g. ds.drop_duplicates('time')) "
            "before opening the case.")
    if tvals.size > 1 and np.any(np.diff(tvals.astype("datetime64[ns]").astype("int64")) < 0):
        new = new.sortby("time")

    # pressure: Pa, decreasing
    pc = new["pressure"]
    if pc.ndim != 1:
        raise GridError("The pressure coordinate must be one-dimensional (isobaric levels).")
    pu = _parse_units(units_override.get("pressure", pc.attrs.get("units")), "pressure") if pc.attrs.get(
        "units") or "pressure" in units_override else None
    pv = np.asarray(pc.values, dtype=float)
    if pu is None:
        # no units: decide by magnitude, which is unambiguous for isobaric levels
        pv = pv * 100.0 if np.nanmax(pv) <= 1100.0 else pv
    else:
        if pu.dimensionality != units.Pa.dimensionality:
            raise UnitsError(
                f"The vertical coordinate {found['pressure']!r} has units {pc.attrs.get('units')!r}; "
                "PV Workbench needs isobaric (pressure) levels in Pa or hPa.")
        pv = pv * (1 * pu).to(units.Pa).magnitude
    if pv.size != np.unique(pv).size:
        raise GridError(f"Duplicate pressure levels in {found['pressure']!r}: {sorted(pv / 100)} hPa. "
                        "Remove the duplicates.")
    if pv.size < 3:
        raise GridError(
            f"Only {pv.size} pressure level(s) found; vertical derivatives (PV, static stability) need "
            "at least 3 isobaric levels. Open a file with the full column of pressure levels.")
    if not np.all(np.isfinite(pv)):
        raise GridError(f"The pressure coordinate {found['pressure']!r} holds missing values; give every level a pressure.")
    if np.any(pv <= 0) or np.any(pv > 110000):
        hint = (" They look like Pa labelled hPa (100 times too large)." if np.nanmax(pv) > 1e6 else "")
        raise UnitsError(f"Pressure levels {', '.join(f'{x:g}' for x in pv[:3])}... Pa (from {found['pressure']!r}, "
                         f"units {pc.attrs.get('units')!r}) are not plausible isobaric levels (0 < p <= 1100 hPa)."
                         f"{hint} Check the units attribute.")
    new = new.assign_coords(pressure=pv).sortby("pressure", ascending=False)
    new["pressure"].attrs = dict(standard_name="air_pressure", long_name="pressure", units="Pa", positive="down")

    # latitude ascending
    lat = np.asarray(new["latitude"].values, dtype=float)
    for c in ("latitude", "longitude"):
        if not np.all(np.isfinite(np.asarray(new[c].values, dtype=float))):
            raise GridError(f"The {c} coordinate {found[c]!r} holds missing (NaN) values; every grid column "
                            "needs a position. Fix or drop those points.")
    if lat.size != np.unique(lat).size:
        raise GridError("Duplicate latitudes in the data; remove them before opening the case.")
    if lat.size < 3:
        raise GridError(f"Only {lat.size} latitude(s): a map needs at least 3 in each direction.")
    if np.any(np.abs(lat) > 90.0 + 1e-6):
        raise GridError(f"Latitudes outside -90..90 ({lat.min()}..{lat.max()}); check the latitude coordinate.")
    new = new.assign_coords(latitude=lat).sortby("latitude")
    new["latitude"].attrs = dict(standard_name="latitude", long_name="latitude", units="degrees_north")

    # longitude contiguous
    lon = np.asarray(new["longitude"].values, dtype=float)
    if lon.size < 3:
        raise GridError(f"Only {lon.size} longitude(s): a map needs at least 3 in each direction.")
    m = np.round(np.mod(lon, 360.0), 9)
    if m.size != np.unique(m).size:
        # a global grid carrying both 0 and 360: drop the repeated column
        _, first = np.unique(m, return_index=True)
        keep = np.sort(first)
        new = new.isel(longitude=keep)
        lon = lon[keep]
    order, newlon = _contiguous_longitudes(lon)
    new = new.isel(longitude=order).assign_coords(longitude=newlon)
    new["longitude"].attrs = dict(standard_name="longitude", long_name="longitude", units="degrees_east")

    dims = ["time"] + (["member"] if "member" in new.dims else []) + ["pressure", "latitude", "longitude"]
    for name in list(new.data_vars):
        da = new[name]
        extra = [d for d in da.dims if d not in dims]
        if extra:
            # singleton leftovers (e.g. a 'step' of one) are squeezed; others are an error
            for d in extra:
                if da.sizes[d] == 1:
                    da = da.isel({d: 0}, drop=True)
                else:
                    raise GridError(
                        f"Variable {name!r} has an extra dimension {d!r} of size {da.sizes[d]}; "
                        f"select one {d} before opening the case.")
        want = [d for d in dims if d in da.dims]
        new[name] = da.transpose(*want)
    for name in REQUIRED:
        if "pressure" not in new[name].dims:
            raise GridError(f"Variable {name!r} is not on pressure levels (dims {new[name].dims}).")
    drop = [c for c in new.coords if c not in dims]
    new = new.drop_vars(drop)
    new.attrs.setdefault("title", "")
    _add_notes(new, notes)
    if region is not None and not new.attrs.get("native_crs"):
        new = _select(new, region=region)  # cut before the checks, so their notes describe the region
    from .checks import check_plausible; new = check_plausible(new)  # noqa: E702 (plausibility, workbench.checks)
    return new


# --- entry point ---------------------------------------------------------------------------

def _resolve_sources(source):
    """A path, a glob pattern, a folder of files or a list of them -> (paths, label).
    A Zarr folder is one source."""
    import glob as _glob

    if isinstance(source, (list, tuple)):
        paths = [Path(os.fspath(p)).expanduser() for p in source]
        if not paths:
            raise FileFormatError("An empty list of files was given; give at least one case file.")
        return paths, f"{len(paths)} files: {paths[0].name} .. {paths[-1].name}" if len(paths) > 1 else str(paths[0])
    text = os.fspath(source)
    p = Path(text).expanduser()
    if not p.exists() and any(ch in str(text) for ch in "*?["):
        paths = sorted(Path(x) for x in _glob.glob(os.path.expanduser(str(text))))
        if not paths:
            raise FileFormatError(f"No files match {str(text)!r}. Check the pattern.")
        return paths, str(text)
    if p.is_dir() and detect_format_safe(p) != "zarr":
        paths = sorted(q for q in p.iterdir() if q.is_file() and not q.name.startswith(".")
                       and detect_format_safe(q) in ("netcdf", "grib"))
        if not paths:
            raise FileFormatError(f"The folder {str(p)!r} holds no netCDF or GRIB2 files (and is not a Zarr store).")
        return paths, str(p)
    return [p], str(p)


def detect_format_safe(path):
    try:
        return detect_format(path)
    except FileFormatError:
        return None


def _combine(parts, labels):
    """Several normalised datasets (one per file) -> one along time; same grid required."""
    first = parts[0]
    for d, lab in zip(parts[1:], labels[1:]):
        for c in ("pressure", "latitude", "longitude"):
            if d.sizes[c] != first.sizes[c] or not np.allclose(d[c].values, first[c].values, atol=1e-6):
                raise GridError(f"{lab} is on another grid than {labels[0]} (its {c} differs); a case's files "
                                "must share one grid.")
        missing = [v for v in ("temperature", "u", "v", "geopotential") if v not in d]
        if missing:
            raise MissingVariableError(f"{lab} lacks {', '.join(missing)}.")
    common = [v for v in first.data_vars if all(v in d for d in parts)]
    timeless = [v for v in common if "time" not in first[v].dims]
    timed = [v for v in common if v not in timeless]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = xr.concat([d[timed] for d in parts], dim="time", coords="minimal", compat="override",
                        join="override", combine_attrs="override")
    for v in timeless:
        out[v] = first[v]
    t = out["time"].values
    if t.size != np.unique(t).size:
        vals, counts = np.unique(t, return_counts=True)
        raise GridError(f"The files repeat the times {[str(x)[:16] for x in vals[counts > 1]][:5]}; give each time once.")
    out = out.sortby("time")
    _add_notes(out, [f"Opened {len(parts)} files as one case ({out.sizes['time']} times)."])
    return out


def _select(data, region=None, times=None):
    """Cut a normalised dataset to a (W, E, S, N) box and a time selection, lazily."""
    if times is not None:
        t = data["time"].values
        if isinstance(times, slice):
            if isinstance(times.start, (str, np.datetime64)) or isinstance(times.stop, (str, np.datetime64)):
                data = data.sel(time=times)
            else:
                data = data.isel(time=times)
        else:
            items = list(times) if isinstance(times, (list, tuple, np.ndarray)) else [times]
            idx = []
            for it in items:
                if isinstance(it, (int, np.integer)):
                    if not -t.size <= int(it) < t.size:
                        raise InputError(f"Time index {it} is out of range: the data have {t.size} times.")
                    idx.append(int(it) % t.size)
                else:
                    try:
                        hit = np.nonzero(t.astype("datetime64[ns]") == np.datetime64(str(it), "ns"))[0]
                    except ValueError:
                        raise InputError(f"Cannot read {it!r} as a time; give an index or an ISO time.") from None
                    if hit.size == 0:
                        raise InputError(f"Time {it} is not in the data (times {str(t[0])[:16]} .. {str(t[-1])[:16]}).")
                    idx.append(int(hit[0]))
            data = data.isel(time=sorted(set(idx)))
        if data.sizes["time"] == 0:
            raise InputError("The time selection holds no time of the data.")
    if region is not None:
        w, e, s_, n_ = _check_region(region)
        lat = data["latitude"].values
        lon = data["longitude"].values
        jj = np.nonzero((lat >= s_ - 1e-9) & (lat <= n_ + 1e-9))[0]
        width = np.mod(e - w, 360.0) or 360.0
        ii = np.nonzero(np.mod(lon - w + 1e-9, 360.0) <= width + 2e-9)[0]
        if jj.size < 3 or ii.size < 3:
            d = dict(lat_min=float(lat.min()), lat_max=float(lat.max()), lon_min=float(lon.min()),
                     lon_max=float(lon.max()))
            raise InputError(f"The region {w:g},{e:g},{s_:g},{n_:g} (W,E,S,N) holds fewer than 3 x 3 grid points of "
                             f"the data (domain {domain_label(d)}).")
        # start at the region's western edge: a global grid is rolled so that the region is contiguous
        ii = ii[np.argsort(np.mod(lon[ii] - w + 1e-9, 360.0), kind="stable")]
        newlon = lon[ii[0]] + np.mod(lon[ii] - lon[ii[0]], 360.0)
        if newlon[0] >= 180.0:
            newlon = newlon - 360.0
        data = data.isel(latitude=slice(int(jj[0]), int(jj[-1]) + 1), longitude=ii)
        data = data.assign_coords(longitude=("longitude", newlon, dict(data["longitude"].attrs)))
        _add_notes(data, [f"Cut to the region {lon_range(w, e)}, {lat_range(s_, n_)}."])
    return data


def _precut(raw, region, coords=None):
    """Cut a raw (not yet normalised) regular latitude-longitude dataset to a region with index
    ranges, lazily. Returns (dataset, notes); (raw, None) when the data are not a plain
    latitude-longitude grid (projected grids are cut on their way to latitude-longitude).
    Times are selected after normalising (lazily: one Dask chunk per time)."""
    coords = dict(coords or {})
    lat_n = _find_coord(raw, "latitude", coords.get("latitude"))
    lon_n = _find_coord(raw, "longitude", coords.get("longitude"))
    if lat_n is None or lon_n is None or raw[lat_n].ndim != 1 or raw[lon_n].ndim != 1 or _native_crs(raw)[0]:
        return raw, None
    sel, notes = {}, []
    if region is not None:
        w, e, s_, n_ = _check_region(region)
        lat = np.asarray(raw[lat_n].values, float)
        lon = np.asarray(raw[lon_n].values, float)
        if not (np.isfinite(lat).all() and np.isfinite(lon).all()):
            return raw, None
        jj = np.nonzero((lat >= s_ - 1e-9) & (lat <= n_ + 1e-9))[0]
        width = np.mod(e - w, 360.0) or 360.0
        ii = np.nonzero(np.mod(lon - w + 1e-9, 360.0) <= width + 2e-9)[0]
        if jj.size < 3 or ii.size < 3:
            raise InputError(f"The region {w:g},{e:g},{s_:g},{n_:g} (W,E,S,N) holds fewer than 3 x 3 grid points of "
                             f"the data (domain {lat_range(lat.min(), lat.max())}, {lon_range(lon.min(), lon.max())}).")
        sel[lat_n] = slice(int(jj.min()), int(jj.max()) + 1)
        # contiguous index ranges (a region across the seam of a global grid is two), each read
        # from the file in one piece; they are joined as Dask arrays (lazily)
        ii = np.sort(ii)
        breaks = np.nonzero(np.diff(ii) != 1)[0]
        runs = np.split(ii, breaks + 1)
        notes.append(f"Cut to the region {lon_range(w, e)}, {lat_range(s_, n_)}.")
        if len(runs) > 1:
            pieces = [raw.isel({**sel, lon_n: slice(int(r[0]), int(r[-1]) + 1)}).chunk() for r in runs]
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                out = xr.concat(pieces, dim=lon_n, data_vars="minimal", coords="minimal", compat="override",
                                join="override", combine_attrs="override")
            sel = {}
            raw = out
        else:
            sel[lon_n] = slice(int(ii[0]), int(ii[-1]) + 1)
    out = raw.isel(sel) if sel else raw
    return out, notes


def _check_region(region):
    if isinstance(region, str):
        region = region.split(",")
    try:
        w, e, s_, n_ = (float(x) for x in region)
    except (TypeError, ValueError):
        raise InputError(f"A region is four numbers W,E,S,N in degrees (e.g. -40,10,35,70), got {region!r}.") from None
    if not all(np.isfinite([w, e, s_, n_])):
        raise InputError(f"Region values must be finite, got {region!r}.")
    if not (-90.0 <= s_ < n_ <= 90.0):
        raise InputError(f"Region south {s_:g} and north {n_:g} must satisfy -90 <= S < N <= 90.")
    if not (-360.0 <= w <= 360.0 and -360.0 <= e <= 360.0):
        raise InputError(f"Region longitudes {w:g}, {e:g} must lie within -360..360 degrees.")
    return w, e, s_, n_


#: a single netCDF file whose variables hold at most this many bytes (uncompressed) is opened
#: without Dask chunks (``open_case``'s default ``chunks``); larger files get one Dask chunk per time
SMALL_FILE_BYTES = 64 * 2**20


def open_case(source, **options):
    """Open a case from a path (netCDF, GRIB2, Zarr), several files, or an ``xarray.Dataset``.

    ``source``: a file, a Zarr store, a folder of netCDF/GRIB2 files, a glob pattern such as
    ``"run/*.grib2"`` or a list of files (one time or step each, opened as one case along time);
    or an in-memory Dataset.

    Options: ``name``, ``chunks`` (Dask chunks, default one time per chunk for files; a single
    netCDF file of at most :data:`SMALL_FILE_BYTES` uncompressed is read without Dask),
    ``region=(W, E, S, N)`` and ``times=`` (index, list, ISO time or slice) chosen before
    anything is computed, ``grid_step`` (degrees, for projected grids), ``winds="grid"|"earth"``
    (override for projected files), ``variables``, ``coords`` and ``units`` (overrides for
    unusual files, see :func:`normalise`), ``f0`` (Coriolis parameter for QG, default the domain
    centre's), and reader keywords (``filter_by_keys`` for GRIB, to read one hypercube only).
    ``known``: :meth:`Case.open_state` of the same files opened in another process; when the
    files' sizes and modification times still match, its checksum and missing-value census are
    used instead of reading every time again (a batch's workers).
    Returns a :class:`workbench.case.Case`.
    """
    from .case import Case

    name = options.pop("name", None)
    f0 = options.pop("f0", None)
    known = options.pop("known", None)
    variables = options.pop("variables", None)
    coords = options.pop("coords", None)
    units_override = options.pop("units", None)
    chunks = options.pop("chunks", "auto-time")
    region = options.pop("region", None)
    times = options.pop("times", None)
    grid_step = options.pop("grid_step", None)
    winds = options.pop("winds", None)
    if winds not in (None, "grid", "earth"):
        raise InputError(f"winds must be 'grid' or 'earth', got {winds!r}.")
    if region is not None:
        region = _check_region(region)
    norm = dict(variables=variables, coords=coords, units_override=units_override, region=region,
                grid_step=grid_step, winds=winds)
    if isinstance(source, xr.Dataset):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", category=RuntimeWarning)
            data = normalise(source, **norm)
        path_label, checksum, lazy = "<in-memory>", None, False
        stat, known = None, None
    else:
        paths, path_label = _resolve_sources(source)
        auto = chunks == "auto-time"
        if auto:
            chunks = {}
        parts = []
        small = False
        for p in paths:
            cut = None
            if auto and region is None and len(paths) == 1 and detect_format(p) == "netcdf":
                # a small file is read without Dask (SMALL_FILE_BYTES): the lazy backend arrays
                # load what is indexed, and the Dask imports (about 0.35 s) are not paid
                raw = read_dataset(p, chunks=None, **options)
                small = raw.nbytes <= SMALL_FILE_BYTES
                if not small:
                    raw.close()
                    raw = read_dataset(p, chunks=chunks, **options)
            elif region is not None and detect_format(p) != "grib":
                # cut a big regular file before anything is read: the lazy backend arrays take the
                # region's index ranges straight to the file, and only then become Dask arrays
                raw = read_dataset(p, chunks=None, **options)
                raw, cut = _precut(raw, region, coords)
                if chunks is not None:
                    t_n = _find_coord(raw, "time", (coords or {}).get("time"))
                    raw = raw.chunk(chunks or ({t_n: 1} if t_n in raw.dims else {}))
            else:
                raw = read_dataset(p, chunks=chunks, **options)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", category=RuntimeWarning)
                try:
                    parts.append(normalise(raw, **dict(norm, region=None) if cut else norm))
                    if cut:
                        _add_notes(parts[-1], cut)
                except InputError as exc:
                    if len(paths) > 1:
                        raise type(exc)(f"{p.name}: {exc}") from None
                    raise
        data = parts[0] if len(parts) == 1 else _combine(parts, [p.name for p in paths])
        stat = _stat_of(paths)
        if known is not None and (known.get("stat") != stat or not known.get("checksum")):
            known = None  # the files changed since (or were never checksummed): examine them again
        if known is not None:
            checksum = known["checksum"]
        elif len(paths) == 1:
            checksum = file_checksum(paths[0])
        else:
            h = hashlib.sha256()
            for p in sorted(paths):  # the same files in any order are the same case
                h.update(file_checksum(p).encode())
            checksum = h.hexdigest()
        lazy = chunks == {} and not small
    data = _select(data, times=times)  # the region was cut in normalise
    if lazy:
        data = data.chunk({"time": 1})
    return Case(data, source=path_label, name=name, checksum=checksum, f0=f0, known=known,
                source_stat=stat)


def _stat_of(paths):
    """(name, size, modification time in ns) of every file of a case, to tell that the files are
    the ones another process opened (for ``known``)."""
    out = []
    for p in sorted(Path(q) for q in paths):
        for f in _files_of(p):
            st = f.stat()
            out.append((str(f), st.st_size, st.st_mtime_ns))
    return out
