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

from .errors import FileFormatError, GridError, MissingVariableError, UnitsError
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
        return "grib"
    raise FileFormatError(
        f"File {str(p)!r} is not netCDF, GRIB2 or Zarr (it starts with {head[:8]!r}). "
        "PV Workbench reads pressure-level analyses in those formats only.")


def file_checksum(path) -> str:
    """SHA-256 of a file's bytes (of every file, in sorted order, for a Zarr folder)."""
    h = hashlib.sha256()
    p = Path(path)
    files = sorted(q for q in p.rglob("*") if q.is_file()) if p.is_dir() else [p]
    for f in files:
        if p.is_dir():
            h.update(str(f.relative_to(p)).encode())
        with open(f, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
    return h.hexdigest()


def _open_grib(path, **kw):
    # pyproj (through cartopy or directly) must be loaded before eccodes: newer eccodes
    # wheels clash with pyproj's bundled PROJ when imported first. Importing pyproj here
    # guarantees the order whatever the caller imported before.
    try:
        import pyproj  # noqa: F401
    except ImportError:  # pragma: no cover - pyproj comes with cartopy
        pass
    try:
        import cfgrib  # noqa: F401
    except ImportError as exc:
        raise FileFormatError(
            f"{str(path)!r} is GRIB, which needs the optional reader: pip install 'pv-workbench[grib]'.") from exc
    filter_by_keys = kw.pop("filter_by_keys", {"typeOfLevel": "isobaricInhPa"})
    backend_kwargs = {"filter_by_keys": filter_by_keys, "indexpath": ""}
    ds = xr.open_dataset(path, engine="cfgrib", backend_kwargs=backend_kwargs, **kw)
    if "mslp" not in ds and filter_by_keys.get("typeOfLevel") == "isobaricInhPa":
        try:
            sfc = xr.open_dataset(path, engine="cfgrib", backend_kwargs={
                "filter_by_keys": {"typeOfLevel": "meanSea"}, "indexpath": ""})
            if len(sfc.data_vars):
                sfc = sfc.drop_vars([c for c in ("meanSea",) if c in sfc.coords])
                ds = xr.merge([ds, sfc], compat="override", join="override")
        except Exception:  # no mean-sea-level messages: fine
            pass
    return ds


def read_dataset(path, *, chunks=None, **kw) -> xr.Dataset:
    """Open a file with the reader its bytes call for; FileFormatError with the cause if it fails."""
    fmt = detect_format(path)
    try:
        if fmt == "zarr":
            return xr.open_zarr(path, chunks=chunks, **kw)
        if fmt == "grib":
            return _open_grib(path, chunks=chunks, **kw)
        try:
            return xr.open_dataset(path, engine="netcdf4", chunks=chunks, **kw)
        except (OSError, ValueError):
            return xr.open_dataset(path, engine="h5netcdf", chunks=chunks, **kw)
    except FileFormatError:
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


def normalise(ds: xr.Dataset, *, variables=None, coords=None, units_override=None,
              keep_attrs=True) -> xr.Dataset:
    """Normalise a Dataset to the project's conventions (see the module docstring).

    Parameters
    ----------
    variables : dict, optional
        Target name -> name in the data, e.g. ``{"temperature": "TMP_P0"}``.
    coords : dict, optional
        Target coordinate -> name in the data, e.g. ``{"pressure": "lv_ISBL0"}``.
    units_override : dict, optional
        Name in the data -> units string, for files with missing or wrong units.
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
        if target == "geopotential":
            ustr = units_override.get(v, da.attrs.get("units"))
            if ustr is None or str(ustr).strip() == "":
                raise UnitsError(
                    f"Variable {v!r} (used as geopotential) has no units attribute, so geopotential "
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
    if np.any(pv <= 0) or np.any(pv > 110000):
        raise UnitsError(f"Pressure levels {pv[:3]}... Pa are not plausible isobaric levels; check the units.")
    new = new.assign_coords(pressure=pv).sortby("pressure", ascending=False)
    new["pressure"].attrs = dict(standard_name="air_pressure", long_name="pressure", units="Pa", positive="down")

    # latitude ascending
    lat = np.asarray(new["latitude"].values, dtype=float)
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
    from .checks import check_plausible; new = check_plausible(new)  # noqa: E702 (plausibility, workbench.checks)
    return new


# --- entry point ---------------------------------------------------------------------------

def open_case(source, **options):
    """Open a case from a path (netCDF, GRIB2, Zarr) or an in-memory ``xarray.Dataset``.

    Options: ``name``, ``chunks`` (Dask chunks, default one time per chunk for files),
    ``variables``, ``coords`` and ``units`` (overrides for unusual files, see
    :func:`normalise`), ``f0`` (Coriolis parameter for QG, default the domain centre's),
    and reader keywords (``filter_by_keys`` for GRIB).
    Returns a :class:`workbench.case.Case`.
    """
    from .case import Case

    name = options.pop("name", None)
    f0 = options.pop("f0", None)
    variables = options.pop("variables", None)
    coords = options.pop("coords", None)
    units_override = options.pop("units", None)
    chunks = options.pop("chunks", "auto-time")
    if isinstance(source, xr.Dataset):
        raw, path, checksum = source, None, None
    else:
        path = Path(os.fspath(source)).expanduser()
        if chunks == "auto-time":
            chunks = {}
        raw = read_dataset(path, chunks=chunks, **options)
        checksum = file_checksum(path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", category=RuntimeWarning)
        data = normalise(raw, variables=variables, coords=coords, units_override=units_override)
    if path is not None and chunks == {}:
        data = data.chunk({"time": 1})
    return Case(data, source=str(path) if path else "<in-memory>", name=name, checksum=checksum, f0=f0)
