"""Plausibility checks on a normalised Dataset, run once when a case is opened.

:func:`check_plausible` is called at the end of :func:`workbench.io.normalise`; it takes and
returns the normalised Dataset (DEVELOPERS.md conventions: SI units, pressure in Pa). It
refuses data that cannot be right with a one-line :class:`~workbench.errors.InputError`
(``UnitsError`` for a units mix-up, ``GridError`` for a bad coordinate) naming the variable,
what was found and the likely cause, and records what it changed as sentences in
``ds.attrs["workbench_notes"]`` (newline separated; the Case shows them as ``case.notes``).

What is checked (computation only, no plotting):

* coordinates: no NaN/inf in latitude or longitude; at least :data:`MIN_POINTS` points in each
  horizontal direction; pole rows (|latitude| = 90) are noted (Ertel PV is set missing there by
  :func:`workbench.physics.ertel_pv`); a domain reaching the equator is noted (QG refuses it);
* calendar: non-standard calendars are converted to standard datetimes (rule in
  :func:`standard_calendar`);
* pressure levels: the deepest level must lie below 100 hPa (hPa values labelled Pa otherwise);
* values, on a bounded sample (below): infinite values and fill values written
  without ``_FillValue`` are set missing with a note (rule in :func:`check_plausible`); values
  outside the ranges in :data:`RANGES` are refused, with the likely cause.

The sample: the first time (and first member), every level, and at most :data:`SAMPLE_MAX`
points along latitude and along longitude (evenly strided), i.e. at most
``levels x 64 x 64`` values per variable. For lazy (Dask) files this reads one time. Values at
other times or between the strided points are not checked; fill values found in the sample are
masked in the whole array (lazily).
"""
from __future__ import annotations

import math

import numpy as np
import xarray as xr

from .errors import FileFormatError, GridError, InputError, UnitsError
from .places import lat_label, lon_label
from .units import G

__all__ = ["check_plausible", "standard_calendar", "standard_height", "add_note", "netcdf_groups",
           "RANGES", "MIN_POINTS", "SAMPLE_MAX", "FILL_MAGNITUDE"]

#: minimum number of latitudes and of longitudes: PV needs 3 points for a centred derivative,
#: the QG inversion a Dirichlet row on each side, and the storm-centre search skips two rows
#: at each edge.
MIN_POINTS = 5
#: at most this many strided points along latitude and along longitude are checked
SAMPLE_MAX = 64
#: values of at least this magnitude are fill values whatever the variable (1e20, 9.999e20,
#: 1e30, 9.96921e36 are common fill values written without ``_FillValue``)
FILL_MAGNITUDE = 1.0e15
#: at most this many distinct out-of-range values are taken as fill values (-999, -9999, ...);
#: more than that is a range or units problem, not a flag
MAX_FILL_VALUES = 3

# Plausible ranges in the normalised units (generous: any observed value lies well inside).
# temperature: the U.S. Standard Atmosphere 1976 stays within 187-288 K below 86 km; observed
#   extremes (from memory) are about 180 K in the winter polar stratosphere and at the
#   tropical tropopause, 184 K at the surface in Antarctica and 330 K near the ground in hot
#   deserts; extrapolated values below ground stay near the column's.
# winds: the strongest observed jet-stream winds are about 100-110 m s-1 (from memory); the
#   stratospheric polar-night jet reaches well under 200 m s-1.
# mslp: observed extremes about 870 and 1084 hPa (from memory).
# relative humidity: 0-100 %, ice supersaturation and interpolation overshoot allowed.
# specific humidity: under 0.04 kg kg-1 in the most humid tropical air (from memory).
RANGES = {
    "temperature": (150.0, 350.0, "K"),
    "u": (-200.0, 200.0, "m s-1"),
    "v": (-200.0, 200.0, "m s-1"),
    "mslp": (85000.0, 110000.0, "Pa"),
    "relative_humidity": (-5.0, 200.0, "%"),
    "specific_humidity": (-1.0e-3, 0.06, "kg kg-1"),
}
# geopotential height: within HEIGHT_BAND_M + HEIGHT_BAND_FRACTION x the standard height of
# each level (500 hPa: 5574 +- 2036 m, observed about 4600-6000 m; 1000 hPa: 111 +- 1217 m).
HEIGHT_BAND_M = 1200.0
HEIGHT_BAND_FRACTION = 0.15

# U.S. Standard Atmosphere 1976 (NOAA/NASA/USAF 1976), geopotential layers to 71 km:
# base geopotential height (m), base temperature (K), lapse rate (K/m), base pressure (Pa).
_USSA_LAYERS = (
    (0.0, 288.15, -0.0065, 101325.0),
    (11000.0, 216.65, 0.0, 22632.06),
    (20000.0, 216.65, 0.001, 5474.889),
    (32000.0, 228.65, 0.0028, 868.0187),
    (47000.0, 270.65, 0.0, 110.9063),
    (51000.0, 270.65, -0.0028, 66.93887),
    (71000.0, 214.65, -0.002, 3.956420),
)
_USSA_R = 287.05287  # the 1976 standard's air gas constant (J kg-1 K-1), with g0 = 9.80665


def standard_height(pressure_pa):
    """Geopotential height (m) of pressure levels in the U.S. Standard Atmosphere 1976.

    Layered formula of the standard (lapse-rate layers and isothermal layers); above 1013.25 hPa
    the lowest layer is extended downwards.
    """
    p = np.atleast_1d(np.asarray(pressure_pa, dtype=float))
    out = np.empty_like(p)
    g0 = 9.80665
    for i, pk in enumerate(p):
        layer = _USSA_LAYERS[0]
        for lay in _USSA_LAYERS:
            if pk <= lay[3]:
                layer = lay
        h0, t0, lapse, p0 = layer
        if lapse == 0.0:
            out[i] = h0 + _USSA_R * t0 / g0 * math.log(p0 / pk)
        else:
            out[i] = h0 + t0 / lapse * ((pk / p0) ** (-_USSA_R * lapse / g0) - 1.0)
    return out


# --- notes ---------------------------------------------------------------------------------

def add_note(ds: xr.Dataset, text: str) -> None:
    """Append one sentence to ``ds.attrs["workbench_notes"]`` (newline separated, in place)."""
    old = ds.attrs.get("workbench_notes", "")
    lines = [n for n in (old.split("\n") if isinstance(old, str) else list(old)) if n]
    if text not in lines:
        lines.append(text)
    ds.attrs["workbench_notes"] = "\n".join(lines)


# --- calendar ------------------------------------------------------------------------------

def standard_calendar(ds: xr.Dataset, time="time") -> xr.Dataset:
    """Convert a non-standard calendar (cftime dates) on ``time`` to standard datetime64.

    Rule: when every date exists in the standard calendar (any ``noleap``/``365_day`` file;
    ``360_day``, ``all_leap``, ``julian`` files without their special dates), the dates are kept
    as they are. Otherwise a ``360_day`` time axis is converted by position in the year
    (``convert_calendar(align_on="year")``: every time is kept, dates move by up to three days);
    any other calendar is refused. A note says what was done.
    """
    if time not in ds.coords:
        return ds
    vals = np.asarray(ds[time].values).ravel()
    if vals.dtype != object or vals.size == 0:
        return ds
    cals = {getattr(v, "calendar", None) for v in vals if v is not None}
    if None in cals or len(cals) != 1:
        raise InputError(f"Time coordinate {time!r}: the values are not dates of one calendar "
                         f"({sorted(map(str, cals))}); fix the file's time units/calendar attributes.")
    cal = cals.pop()
    try:
        import cftime
    except ImportError:  # pragma: no cover - xarray decodes with cftime, so it is there
        raise InputError(f"Time coordinate {time!r} uses the {cal!r} calendar, which needs cftime.") from None
    missing = []
    for v in vals:
        try:
            cftime.datetime(v.year, v.month, v.day, v.hour, v.minute, v.second, calendar="proleptic_gregorian")
        except ValueError:
            missing.append(v)
    first, last = str(vals[0])[:16], str(vals[-1])[:16]
    if not missing:
        try:
            out = ds.convert_calendar("standard", dim=time, align_on="date", use_cftime=False)
        except Exception as exc:  # e.g. years outside datetime64[ns]
            raise InputError(f"Time coordinate {time!r} ({cal} calendar, {first} .. {last}) cannot be "
                             f"converted to standard dates: {exc}.") from None
        add_note(out, f"The {cal} calendar of the times was converted to the standard calendar; "
                      "every date exists in both, so the dates are kept as they are.")
        return out
    if cal == "360_day":
        out = ds.convert_calendar("standard", dim=time, align_on="year", use_cftime=False)
        if out.sizes[time] != vals.size:
            raise InputError(f"Time coordinate {time!r}: the 360_day dates {first} .. {last} could not "
                             "be mapped one-to-one to standard dates; select fewer times.")
        new0 = str(out[time].values[vals.tolist().index(missing[0])])[:16]
        add_note(out, f"The 360_day calendar of the times was converted to the standard calendar by "
                      f"position in the year (every time kept, dates shifted by up to 3 days; "
                      f"{str(missing[0])[:16]} became {new0}).")
        return out
    raise InputError(f"Time coordinate {time!r} uses the {cal} calendar and has dates that do not exist in "
                     f"the standard calendar (e.g. {str(missing[0])[:16]}); drop those times or convert "
                     "them yourself (ds.convert_calendar('standard', align_on='date' or 'year')).")


# --- sampling ------------------------------------------------------------------------------

def _sample(ds, name):
    """The bounded sample of one variable as float64 numpy (pressure?, latitude, longitude)."""
    da = ds[name]
    sel = {"time": 0} if "time" in da.dims else {}
    if "member" in da.dims:
        sel["member"] = 0
    for d in ("latitude", "longitude"):
        n = da.sizes[d]
        sel[d] = slice(None, None, max(1, math.ceil(n / SAMPLE_MAX)))
    try:
        return np.asarray(da.isel(sel).values, dtype=float)
    except Exception as exc:  # a truncated chunk or unreadable block of a lazy file
        src = da.attrs.get("source_name", name)
        raise FileFormatError(
            f"Variable {src!r} ({name}) cannot be read at the first time: {type(exc).__name__}: "
            f"{str(exc).splitlines()[0] if str(exc) else ''}. The file may be truncated or corrupt; "
            "re-download or re-export it.") from exc


def _who(ds, name):
    src = ds[name].attrs.get("source_name", name)
    return f"Variable {src!r}" + (f" (used as {name})" if src != name else "")


def _where(ds, name, index):
    """Human location of a sample point: 'at 500 hPa, 45°N, 10°W' (approximate, first time)."""
    da = ds[name]
    dims = [d for d in da.dims if d not in ("time", "member")]
    parts = []
    for d, i in zip(dims, index):
        c = da[d].values[::max(1, math.ceil(da.sizes[d] / SAMPLE_MAX))] if d in ("latitude", "longitude") \
            else da[d].values
        v = float(c[i])
        parts.append(f"{v / 100:g} hPa" if d == "pressure" else
                     (lat_label(v, None) if d == "latitude" else lon_label(v, None)))
    return "at " + ", ".join(parts)


# --- the checks ------------------------------------------------------------------------------

def _check_coords(ds):
    for d in ("latitude", "longitude"):
        c = np.asarray(ds[d].values, dtype=float)
        bad = ~np.isfinite(c)
        if bad.any():
            raise GridError(f"The {d} coordinate has {int(bad.sum())} missing (NaN) or infinite value(s) "
                            f"among {c.size}; the grid cannot be placed. Fix or drop those {d}s in the file.")
    ny, nx = ds.sizes["latitude"], ds.sizes["longitude"]
    if ny < MIN_POINTS or nx < MIN_POINTS:
        raise GridError(
            f"The domain has only {ny} latitude(s) x {nx} longitude(s): too small for PV, the storm-centre "
            f"search and the QG inversion, which need at least {MIN_POINTS} x {MIN_POINTS} points "
            "(a storm needs far more, e.g. 30 x 40 degrees at 1 degree). Open a larger domain.")
    lat = np.asarray(ds["latitude"].values, dtype=float)
    poles = lat[np.abs(lat) >= 90.0 - 1e-6]
    if poles.size:
        rows = " and ".join(f"{abs(p):g}{'N' if p > 0 else 'S'}" for p in poles)
        add_note(ds, f"The pole row at {rows} is kept for maps of the other fields, but Ertel PV is set "
                     "missing there (the latitude-longitude grid is singular at the pole).")
    if lat.min() <= 0.0 <= lat.max():
        add_note(ds, f"The domain ({lat.min():g} to {lat.max():g} degrees latitude) reaches the equator: "
                     "PV maps work, the QG inversion needs a domain cropped to one hemisphere.")


def _check_pressure(ds):
    p = np.asarray(ds["pressure"].values, dtype=float)
    if p.max() < 10000.0:
        raise UnitsError(
            f"Pressure levels {p.max():g} .. {p.min():g} Pa are all above 100 hPa, with no troposphere; "
            "the values look like hPa labelled Pa. Fix the units attribute of the vertical coordinate "
            "(or pass units={'<name>': 'hPa'} to open_case).")


def _file_value(v):
    """The whole number a value was in the file's likely units (as fill values are): itself,
    or undone from a degC->K, m->m2 s-2 or hPa->Pa conversion; None if none is whole."""
    for c in (v, v - 273.15, v / G, v / 100.0):
        if abs(c - round(c)) <= 1e-6 * abs(c) + 1e-4:
            return float(round(c))
    return None


def _is_round(v):
    return _file_value(v) is not None


def _show(v):
    fv = _file_value(v) if abs(v) < FILL_MAGNITUDE else None
    return f"{v:.6g}" if fv is None or fv == v else f"{v:.6g} ({fv:g} in the file's units)"


def _fills(ds, name, x, lo, hi, unit):
    """Find fill values in the sample ``x`` (``lo``/``hi`` broadcast against it); mask them in
    ``ds`` in place and return the sample with them set NaN."""
    finite = np.isfinite(x)
    with np.errstate(invalid="ignore"):
        huge = finite & (np.abs(x) >= FILL_MAGNITUDE)
        out = finite & ~huge & ((x < lo) | (x > hi))
    fills = set(np.unique(x[huge]).tolist())
    vals, counts = np.unique(x[out], return_counts=True)
    cands = [float(v) for v, c in zip(vals, counts) if c >= 2 or _is_round(float(v))]
    if 0 < len(cands) <= MAX_FILL_VALUES:
        fills.update(cands)
    if not fills:
        return x
    fills = sorted(fills)
    isfill = np.isin(x, fills)
    n, total = int(isfill.sum()), int(finite.sum())
    shown = ", ".join(_show(v) for v in fills)
    if n > 0.5 * total:
        raise InputError(
            f"{_who(ds, name)} holds {shown} {unit} at {n} of {total} checked points: the variable is "
            "mostly fill values (written without _FillValue) or empty. Check the file's contents.")
    da = ds[name]
    ds[name] = da.where(~da.isin(fills)).assign_attrs(da.attrs)
    add_note(ds, f"{name}: the value(s) {shown} {unit} at {n} of {total} checked points were taken as fill "
                 "values (the file has no _FillValue for them) and set missing.")
    return np.where(isfill, np.nan, x)


def _refuse_range(ds, name, x, lo, hi, unit):
    xmin, xmax = float(np.nanmin(x)), float(np.nanmax(x))
    found = f"values {xmin:.4g} .. {xmax:.4g} {unit}, outside the plausible {lo:g} .. {hi:g} {unit}"
    cause = "check the variable and its units attribute"
    exc = InputError
    if name == "temperature":
        exc = UnitsError
        if -100.0 <= xmin and xmax <= 100.0:
            cause = "they look like degrees Celsius labelled K (set units to 'degC')"
        elif xmin >= 373.0 and xmax <= 650.0:
            cause = "they look like kelvin labelled degrees Celsius (set units to 'K')"
        elif xmax <= 1.0:
            cause = "the field is zero (empty or a fill)"
        else:
            cause = "the variable may not be air temperature, or its units are wrong"
    elif name in ("u", "v"):
        cause = "wrong units (km/h or cm/s labelled m s-1?) or fill values"
        exc = UnitsError
    elif name == "mslp":
        exc = UnitsError
        if 850.0 <= xmin and xmax <= 1100.0:
            cause = "they look like hPa labelled Pa (set units to 'hPa')"
    elif name == "specific_humidity":
        exc = UnitsError
        if xmax <= 60.0:
            cause = "they look like g kg-1 labelled kg kg-1 (set units to 'g/kg')"
    elif name == "relative_humidity":
        cause = "the variable may not be relative humidity in %, or its units are wrong"
    raise exc(f"{_who(ds, name)}: {found}; {cause}.")


def _check_geopotential(ds, x):
    p = np.asarray(ds["pressure"].values, dtype=float)
    zstd = standard_height(p)
    z = x / G
    band = HEIGHT_BAND_M + HEIGHT_BAND_FRACTION * np.abs(zstd)
    with np.errstate(invalid="ignore"):
        out = np.abs(z - zstd[:, None, None]) > band[:, None, None]
    if not out.any():
        return
    k = int(np.argmax(out.any(axis=(1, 2))))
    with np.errstate(invalid="ignore"), np.errstate(all="ignore"):
        med = np.nanmedian(z.reshape(z.shape[0], -1), axis=1)
    use = (zstd > 2000.0) & np.isfinite(med)
    ratio = float(np.median(med[use] / zstd[use])) if use.any() else float("nan")
    if 0.07 <= ratio <= 0.14:
        cause = ("about 10 times too small: heights in dam labelled m, or geopotential height (m) "
                 "labelled m2 s-2 (x1/9.8)")
    elif 7.0 <= ratio <= 14.0:
        cause = "about 9.8 times too large: geopotential (m2 s-2) labelled as height (m or gpm)"
    elif 0.0007 <= ratio <= 0.0014:
        cause = "about 1000 times too small: heights in km labelled m"
    else:
        cause = "the variable may not be geopotential, or its units are wrong"
    lev = p[k]
    zk = z[k][np.isfinite(z[k])]
    shown = f"{float(np.median(zk)):.0f} m" if zk.size else "missing"
    raise UnitsError(
        f"{_who(ds, 'geopotential')}: at {lev / 100:g} hPa the height is {shown} (median) where the U.S. "
        f"Standard Atmosphere 1976 has {zstd[k]:.0f} m (allowed +-{band[k]:.0f} m); {cause}.")


def _infinite(ds, name, x):
    """Mask infinite values (whole array, lazily) with a note; refuse a mostly infinite variable."""
    inf = np.isinf(x)
    if not inf.any():
        return x
    n, total = int(inf.sum()), int((~np.isnan(x)).sum())
    idx = np.unravel_index(int(np.argmax(inf)), x.shape)
    if n > 0.5 * total:
        raise InputError(
            f"{_who(ds, name)} is infinite at {n} of {total} checked points (first {_where(ds, name, idx)}); "
            "the file is corrupt or was written from an overflowing computation. Check the file.")
    da = ds[name]
    ds[name] = da.where(~np.isinf(da)).assign_attrs(da.attrs)
    add_note(ds, f"{name}: {n} of {total} checked points were infinite (first {_where(ds, name, idx)}) "
                 "and were set missing.")
    return np.where(inf, np.nan, x)


def check_plausible(ds: xr.Dataset) -> xr.Dataset:
    """Check a normalised Dataset; return it (fill values masked, calendar converted, notes added).

    Raises GridError / UnitsError / InputError / FileFormatError with one line naming the
    variable, what was found and the likely cause. Rules (see the module docstring):

    * a fill value is a value of magnitude >= 1e15, or one of at most three distinct values
      outside the variable's plausible range (e.g. -999, -9999, 0 K) -- masked (set NaN) in the
      whole array with a note; more than half of the checked points being fill values is refused;
    * infinite values are set missing in the whole array with a note (a variable infinite at more
      than half of the checked points is refused);
    * any other value outside the plausible range is refused with the likely cause;
    * NaN is left alone (below ground it is legitimate; missing values are handled downstream).
    """
    ds = ds.copy()
    ds.attrs = dict(ds.attrs)
    _check_coords(ds)
    ds = standard_calendar(ds)
    _check_pressure(ds)
    for name in ("temperature", "u", "v", "geopotential", "relative_humidity", "specific_humidity", "mslp"):
        if name not in ds:
            continue
        x = _sample(ds, name)
        x = _infinite(ds, name, x)
        if name == "geopotential":
            zstd = standard_height(ds["pressure"].values)
            band = HEIGHT_BAND_M + HEIGHT_BAND_FRACTION * np.abs(zstd)
            lo, hi = ((zstd - band) * G)[:, None, None], ((zstd + band) * G)[:, None, None]
            x = _fills(ds, name, x, lo, hi, "m2 s-2")
            if np.isfinite(x).any():
                _check_geopotential(ds, x)
            continue
        lo, hi, unit = RANGES[name]
        x = _fills(ds, name, x, lo, hi, unit)
        if not np.isfinite(x).any():
            continue
        with np.errstate(invalid="ignore"):
            if np.nanmin(x) < lo or np.nanmax(x) > hi:
                _refuse_range(ds, name, x, lo, hi, unit)
    return ds


# --- netCDF groups -------------------------------------------------------------------------

def netcdf_groups(path) -> dict:
    """Groups of a netCDF-4 file that hold variables: {'/group/path': [variable names]}.

    For the message when the root group holds no variables (the readers open the root group
    only); empty for a file without groups or one that cannot be read this way.
    """
    out = {}
    try:
        import netCDF4
    except ImportError:  # pragma: no cover - netCDF4 is a core dependency
        return out
    try:
        with netCDF4.Dataset(str(path)) as nc:
            stack = list(nc.groups.values())
            while stack:
                g = stack.pop(0)
                if g.variables:
                    out[g.path] = sorted(g.variables)
                stack.extend(g.groups.values())
    except (OSError, RuntimeError):
        return {}
    return out


# --- loading -------------------------------------------------------------------------------

def load_fields(sel, source="the case file"):
    """``sel.astype("float64").load()`` (a Dataset or DataArray) with read errors of lazy files
    (a truncated or corrupt chunk, a file removed since it was opened) turned into one-line
    FileFormatErrors."""
    try:
        return sel.astype("float64").load()
    except MemoryError:
        raise
    except Exception as exc:
        first = str(exc).splitlines()[0] if str(exc) else ""
        when = ""
        if "time" in sel.coords and sel["time"].ndim == 0:
            when = f" at {str(sel['time'].values)[:16]}"
        raise FileFormatError(
            f"Could not read the data{when} from {source}: {type(exc).__name__}: {first[:200]}. "
            "A chunk of the file may be truncated or corrupt; re-download or re-export it.") from exc
