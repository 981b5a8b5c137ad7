"""The Case: one storm's normalised data, its metadata and its derived fields (cached).

The Case is the data half of the shared model (the other half is
:class:`workbench.state.State`, which holds what the user picked). It has no plotting and
no widgets. Expensive derived fields (isentropic interpolation, tropopause, QG PV, the
anomaly dataset, inversions) are computed once per (time, member, setting) and cached.
"""
from __future__ import annotations

import html
import json
import threading
from collections import OrderedDict

import numpy as np
import xarray as xr

from . import physics
from .checks import load_fields
from .errors import GridError, InputError
from .places import lat_range, lon_range, point_label

__all__ = ["Case", "MAP_FIELDS", "REFERENCE_KINDS"]

MAP_FIELDS = ("ertel_pv", "ertel_pv_anomaly", "potential_temperature", "pressure", "wind_speed",
              "geopotential_height", "u", "v")
REFERENCE_KINDS = ("time_mean", "area_mean", "zonal_mean")
#: A one-time case's default reference is the zonal mean when the domain is at least this wide
#: (km along the central latitude: about one synoptic wavelength), else the area mean.
ZONAL_MEAN_MIN_WIDTH_KM = 4000.0
#: Eager missing-value census at open time only below this many bytes of 3-D fields.
CENSUS_MAX_BYTES = 256e6


def _default_cache_bytes():
    """The derived-field cache budget of a new Case: ``PVWB_CACHE_MB`` (MB) if set, else 1024 MB."""
    import os

    text = os.environ.get("PVWB_CACHE_MB", "").strip()
    if text:
        try:
            value = float(text)
        except ValueError:
            raise InputError(f"PVWB_CACHE_MB={text!r} is not a number; give the cache size in MB "
                             "(e.g. 1024).") from None
        if value < 0:
            raise InputError(f"PVWB_CACHE_MB={text!r} must be 0 or more (MB).")
        return int(value * 1e6)
    return int(1024e6)


#: Cache entries that belong to the case as a whole (reference state, its PV and sigma, the
#: reference on an isentrope), kept whatever the budget: recomputing them means reading every time.
_PINNED = ("ref", "refpv", "refisen", "sigma")


def _nbytes(obj, seen=None) -> int:
    """Bytes held in memory by a cached value: numpy data of arrays, xarray objects (variables
    computed on demand count nothing) and containers of them; each buffer counted once."""
    seen = set() if seen is None else seen
    if isinstance(obj, np.ndarray):
        base = obj
        while isinstance(base.base, np.ndarray):
            base = base.base
        if id(base) in seen:
            return 0
        seen.add(id(base))
        return int(base.nbytes)
    if isinstance(obj, xr.DataArray):
        obj = obj.to_dataset(name="_") if obj.name is None else obj._to_temp_dataset()
    if isinstance(obj, xr.Dataset):
        total = 0
        for var in obj.variables.values():
            data = var._data  # numpy when in memory; a lazy wrapper otherwise (not counted)
            if isinstance(data, np.ndarray):
                total += _nbytes(data, seen)
            elif hasattr(data, "array") and isinstance(getattr(data, "array"), np.ndarray):
                total += _nbytes(data.array, seen)  # index coordinates
        return total
    if isinstance(obj, dict):
        return sum(_nbytes(v, seen) for v in obj.values())
    if isinstance(obj, (list, tuple)):
        return sum(_nbytes(v, seen) for v in obj)
    return 0


class _Cache:
    """A thread-safe LRU cache of derived fields, bounded by bytes.

    ``max_bytes`` (default :func:`_default_cache_bytes`: ``PVWB_CACHE_MB`` or 1024 MB) bounds
    the memory of the per-time entries (fields, anomalies, inversions): when a new entry takes
    the total over it, the least recently used entries are dropped (the newest is always kept,
    so one time's work is never refused). Case-level entries (:data:`_PINNED`) are kept and not
    counted. ``maxsize`` also bounds the number of entries.
    """

    def __init__(self, maxsize=256, max_bytes=None):
        self._d = OrderedDict()
        self._size = {}
        self._lock = threading.RLock()
        self.maxsize = maxsize
        self.max_bytes = _default_cache_bytes() if max_bytes is None else int(max_bytes)

    @staticmethod
    def _pinned(key):
        return isinstance(key, tuple) and bool(key) and key[0] in _PINNED

    @property
    def nbytes(self) -> int:
        """Bytes counted against ``max_bytes`` (the per-time entries)."""
        with self._lock:
            return sum(self._size.values())

    def get(self, key, make, store=True):
        with self._lock:
            if key in self._d:
                self._d.move_to_end(key)
                return self._d[key]
        value = make()
        if not store:
            return value
        with self._lock:
            self._d[key] = value
            self._d.move_to_end(key)
            if not self._pinned(key):
                self._size[key] = _nbytes(value)
            self._evict(keep=key)
        return value

    def _evict(self, keep=None):
        total = sum(self._size.values())
        for k in list(self._d):
            if total <= self.max_bytes and len(self._d) <= self.maxsize:
                break
            if k == keep or (self._pinned(k) and len(self._d) <= self.maxsize):
                continue
            del self._d[k]
            total -= self._size.pop(k, 0)

    def clear(self):
        with self._lock:
            self._d.clear()
            self._size.clear()

    def __len__(self):
        return len(self._d)


class Case:
    """A storm case on pressure levels.

    Create with :func:`workbench.open_case`. ``case.data`` is the normalised Dataset
    (DEVELOPERS.md conventions, possibly Dask-backed); the methods return derived fields
    for one time (and member), computed on first use and cached.
    """

    MAP_FIELDS = MAP_FIELDS
    REFERENCE_KINDS = REFERENCE_KINDS

    def __init__(self, data: xr.Dataset, *, source="<in-memory>", name=None, checksum=None, f0=None,
                 known=None, source_stat=None):
        """``known``: :meth:`open_state` of the same file opened elsewhere (a batch's client):
        its missing-value census and notes are taken instead of examining every time again.
        ``source_stat``: the files' (name, size, modification time), kept for :meth:`open_state`."""
        self.data = data
        self.source = source
        self._source_stat = source_stat
        self.name = name or data.attrs.get("case_name") or data.attrs.get("title") or (
            source.rsplit("/", 1)[-1] if source != "<in-memory>" else "in-memory case")
        self.checksum = checksum
        self._f0 = None if f0 is None else float(f0)
        self._cache = _Cache()
        # what was done to the data on the way in (regridding, wind rotation, filled points,
        # default reference ...): one plain sentence each, shown in every summary
        raw_notes = data.attrs.get("workbench_notes", "")
        self.notes = [n for n in (raw_notes.split("\n") if isinstance(raw_notes, str) else list(raw_notes)) if n]
        self._note_slots = {}
        self._census = {}
        self._census_complete = False
        if known is not None:
            self.notes = list(known["notes"])
            self._note_slots = dict(known["note_slots"])
            self._census = dict(known["census"])
            self._census_complete = bool(known["census_complete"])
            return
        if self.times.size == 1:
            self.add_note(f"One time in the file: the default reference state is the "
                          f"{self.default_reference.replace('_', ' ')} of that time "
                          f"(domain {self.width_km:.0f} km wide); 'time_mean' needs several times.")
        self._missing_census()

    def open_state(self) -> dict:
        """What opening the file established (checksum, missing-value census, notes) for
        ``open_case(path, known=...)`` in another process: a batch's workers then skip the
        census, which reads every time of the file, and the checksum."""
        return dict(checksum=self.checksum, notes=list(self.notes), note_slots=dict(self._note_slots),
                    census=dict(self._census), census_complete=self._census_complete,
                    stat=self._source_stat)

    def add_note(self, text: str) -> None:
        """Record one sentence about how the data were handled (shown in the case summary)."""
        if text and text not in self.notes:
            self.notes.append(str(text))

    def _set_note(self, slot, text):
        """Replace this case's own note for ``slot`` (e.g. the running missing-value count)."""
        old = self._note_slots.get(slot)
        if old in self.notes:
            self.notes[self.notes.index(old)] = text
        else:
            self.notes.append(text)
        self._note_slots[slot] = text

    # --- terrain and missing values -----------------------------------------------------
    def _missing_census(self):
        """Count below-ground, filled and unfilled points (notes). Every time is examined at
        open when the 3-D fields are small (CENSUS_MAX_BYTES); otherwise times are counted as
        they are loaded and the note says so."""
        names = [n for n in self.data.data_vars if "pressure" in self.data[n].dims]
        if not names:
            return
        check = self.data[names].isnull().any(("pressure", "latitude", "longitude"))
        has_nan = check.to_array().any()
        if "surface_pressure" in self.data:
            under = (self.data["pressure"] > self.data["surface_pressure"]).any()
            has_nan = has_nan | under
        nbytes = sum(self.data[n].size * 8 for n in names)
        if nbytes > CENSUS_MAX_BYTES:
            self._set_note("missing", "Missing values and terrain are handled by the terrain rule as "
                           "times are loaded (counts appear here as they are).")
            return
        if not bool(load_fields(has_nan, self.source)):
            self._census_complete = True
            return
        members = [None] if self.members is None else range(len(self.members))
        for ti in range(self.times.size):
            for mi in members:
                self._complete(ti, mi, store=False)
        self._census_complete = True
        self._update_missing_notes()

    def _record(self, ti, mi, info):
        self._census[(ti, mi)] = {k: info[k] for k in ("n_below_ground", "n_filled", "n_gap_points",
                                                       "largest_gap")}
        self._update_missing_notes()

    def _update_missing_notes(self):
        c = self._census
        if not c:
            return
        nsel = self.times.size * (1 if self.members is None else len(self.members))
        scope = (f"{{k}} of {nsel} fields" if self.members is not None else f"{{k}} of {nsel} times")
        so_far = "" if len(c) >= nsel else f" (counted over the {len(c)} loaded so far)"
        below = {k: v["n_below_ground"] for k, v in c.items() if v["n_below_ground"]}
        filled = {k: v["n_filled"] for k, v in c.items() if v["n_filled"]}
        gaps = {k: v["n_gap_points"] for k, v in c.items() if v["n_gap_points"]}
        if below:
            self._set_note("terrain", (
                f"Terrain: {sum(below.values())} grid values lie below the ground at "
                f"{scope.format(k=len(below))}{so_far} (missing from the lowest level up"
                + (", or under the surface pressure" if "surface_pressure" in self.data else "")
                + "); the physics uses them extrapolated (temperature with the standard lapse rate "
                "6.5 K/km, geopotential by the hypsometric equation, winds and humidity held at the "
                "lowest level above the ground) and maps and sections mask them."))
        if filled:
            self._set_note("filled", (
                f"Missing values: {sum(filled.values())} scattered points (gaps of at most "
                f"{physics.MAX_GAP_POINTS} points on a level) at {scope.format(k=len(filled))}{so_far} "
                "were filled from their neighbours on the same level; Case.filled_points flags them."))
        if gaps:
            big = max(v["largest_gap"] for v in c.values())
            self._set_note("gaps", (
                f"Missing values: {sum(gaps.values())} points in gaps larger than "
                f"{physics.MAX_GAP_POINTS} points (largest {big}) at {scope.format(k=len(gaps))}{so_far} "
                "stay missing; the inversion refuses those times."))

    def _complete(self, ti, mi, store=True):
        """(fields, info) of one time and member after the terrain and missing-value rule."""
        def make():
            sel = self.data.isel(time=ti)
            if mi is not None:
                sel = sel.isel(member=mi)
            out, info = physics.complete_fields(load_fields(sel, self.source))
            self._record(ti, mi, info)
            return out, info

        return self._cache.get(("at", ti, mi), make, store)

    def raw(self, time=None, member=None) -> xr.Dataset:
        """The file's own values at one time (and member), float64, NaN where missing."""
        ti, mi = self._key(time, member)
        sel = self.data.isel(time=ti)
        if mi is not None:
            sel = sel.isel(member=mi)
        return load_fields(sel, self.source)

    def below_ground(self, time=None, member=None) -> xr.DataArray:
        """Boolean mask (pressure, latitude, longitude): True below the ground (the terrain rule,
        :func:`workbench.physics.below_ground`). Views mask these points."""
        return self._complete(*self._key(time, member))[1]["below_ground"]

    def filled_points(self, time=None, member=None) -> xr.DataArray:
        """Boolean mask (pressure, latitude, longitude): True where a scattered missing value
        was filled from its neighbours (any variable)."""
        return self._complete(*self._key(time, member))[1]["filled"]

    def missing_info(self, time=None, member=None) -> dict:
        """Masks and counts of the terrain and missing-value rule for one time (see
        :func:`workbench.physics.complete_fields`)."""
        return dict(self._complete(*self._key(time, member))[1])

    # --- metadata ----------------------------------------------------------------------
    @property
    def times(self):
        return self.data["time"].values

    @property
    def members(self):
        return self.data["member"].values if "member" in self.data.dims else None

    @property
    def levels_hpa(self):
        return self.data["pressure"].values / 100.0

    @property
    def domain(self):
        lat, lon = self.data["latitude"].values, self.data["longitude"].values
        return dict(lat_min=float(lat.min()), lat_max=float(lat.max()),
                    lon_min=float(lon.min()), lon_max=float(lon.max()))

    @property
    def central_latitude(self):
        d = self.domain
        return 0.5 * (d["lat_min"] + d["lat_max"])

    @property
    def width_km(self):
        """East-west extent of the domain along its central latitude (km)."""
        from .units import EARTH_RADIUS

        d = self.domain
        return float(EARTH_RADIUS * np.cos(np.deg2rad(self.central_latitude))
                     * np.deg2rad(d["lon_max"] - d["lon_min"]) / 1000.0)

    @property
    def default_reference(self) -> str:
        """The reference used when none is given: "time_mean" for several times; for one time
        "zonal_mean" when the domain is at least ZONAL_MEAN_MIN_WIDTH_KM wide, else "area_mean"."""
        if self.times.size > 1:
            return "time_mean"
        return "zonal_mean" if self.width_km >= ZONAL_MEAN_MIN_WIDTH_KM else "area_mean"

    def resolve_reference(self, reference=None):
        """``reference`` as used: None -> :attr:`default_reference`; "time_mean" on a one-time
        case is refused (every anomaly would be zero)."""
        if reference is None:
            return self.default_reference
        if isinstance(reference, str) and reference == "time_mean" and self.times.size < 2:
            raise InputError(
                "This case has one time, so reference 'time_mean' would make every anomaly zero: "
                "use 'zonal_mean' or 'area_mean' (of this time) or the path of a climatology file.")
        return reference

    @property
    def f0(self):
        """Constant Coriolis parameter for QG (s-1): the domain centre's unless overridden."""
        from .inversion.fields import central_f0

        return self._f0 if self._f0 is not None else central_f0(self.data["latitude"].values)

    @property
    def invented(self):
        """True when the file says it is an invented (demonstration) case."""
        text = " ".join(str(v) for v in self.data.attrs.values()).lower()
        return "invented" in text

    @property
    def variables(self):
        return list(self.data.data_vars)

    def summary(self) -> dict:
        d = self.domain
        t = self.times
        return dict(name=self.name, source=self.source, checksum=self.checksum,
                    times=[str(x)[:16] for x in t], n_times=int(t.size),
                    members=None if self.members is None else [str(m) for m in self.members],
                    levels_hpa=[float(x) for x in self.levels_hpa], domain=d,
                    grid=dict(nz=self.data.sizes["pressure"], ny=self.data.sizes["latitude"],
                              nx=self.data.sizes["longitude"]),
                    variables=self.variables, invented=self.invented,
                    default_reference=self.default_reference, notes=list(self.notes))

    def __repr__(self):
        s = self.summary()
        d = s["domain"]
        t = s["times"]
        trange = t[0] if len(t) == 1 else f"{t[0]} .. {t[-1]} ({len(t)} times)"
        mem = "" if s["members"] is None else f"\n  members:   {len(s['members'])}"
        lev = self.levels_hpa
        from .views.styles import lat_range
        return (f"<workbench.Case {self.name!r}>\n"
                f"  source:    {self.source}\n"
                f"  times:     {trange}{mem}\n"
                f"  levels:    {len(lev)} from {lev.max():g} to {lev.min():g} hPa\n"
                f"  domain:    {lat_range(d['lat_min'], d['lat_max'])}, {self._lon_range()} "
                f"({s['grid']['ny']} x {s['grid']['nx']} points)\n"
                f"  variables: {', '.join(self.variables)}"
                + "".join(f"\n  note:      {n}" for n in self.notes)
                + ("\n  note:      invented demonstration case, not real weather" if self.invented else ""))

    def _lon_range(self) -> str:
        """"80°W..20°E" (``views.styles.lon_range``, as the page and the briefing write it); a
        zonally periodic grid (uniform, n * step = 360 degrees) is given in 0..360 as the grid
        points lie (e.g. "0°E..359.75°E, periodic"), whatever the order or the convention the
        longitudes are held in."""
        from .views.styles import lon_range

        lon = np.asarray(self.data["longitude"].values, dtype=float)
        if lon.size > 2:
            step = np.diff(lon)
            if np.allclose(step, step[0], rtol=1e-6, atol=1e-9) and abs(lon.size * step[0] - 360.0) < 1e-6 * 360:
                wrapped = np.mod(np.round(lon, 9), 360.0)
                return f"{wrapped.min():g}°E..{wrapped.max():g}°E, periodic"
        return lon_range(lon.min(), lon.max())

    def _repr_html_(self):
        rows = "".join(f"<tr><th style='text-align:left'>{html.escape(k)}</th><td style='text-align:left'>"
                       f"{html.escape(v)}</td></tr>" for k, v in self._repr_rows())
        return f"<div><b>PV Workbench case</b><table>{rows}</table></div>"

    def _repr_rows(self):
        text = repr(self).splitlines()[1:]
        for line in text:
            k, _, v = line.strip().partition(":")
            yield k, v.strip()

    # --- selection ---------------------------------------------------------------------
    def time_index(self, time=None) -> int:
        t = self.times
        if time is None:
            return 0
        if isinstance(time, (int, np.integer)):
            if not -t.size <= int(time) < t.size:
                raise InputError(f"Time index {time} is out of range: the case has {t.size} times.")
            return int(time) % t.size
        try:
            tv = np.datetime64(time, "ns")
        except Exception as exc:
            raise InputError(f"Cannot read {time!r} as a time; give an index or an ISO time.") from exc
        hits = np.nonzero(t.astype("datetime64[ns]") == tv)[0]
        if hits.size == 0:
            raise InputError(f"Time {time} is not in the case (times {str(t[0])[:16]} .. {str(t[-1])[:16]}).")
        return int(hits[0])

    def member_index(self, member=None):
        if self.members is None:
            if member not in (None, 0):
                raise InputError("This case has no ensemble members.")
            return None
        if member is None:
            return 0
        if isinstance(member, (int, np.integer)) and 0 <= member < len(self.members):
            return int(member)
        hits = np.nonzero(self.members.astype(str) == str(member))[0]
        if hits.size == 0:
            raise InputError(f"Member {member!r} is not in the case.")
        return int(hits[0])

    def _key(self, time, member):
        return self.time_index(time), self.member_index(member)

    def at(self, time=None, member=None) -> xr.Dataset:
        """The case's fields at one time (and member), loaded, float64, complete: scattered
        gaps filled and below-ground values extrapolated by the terrain rule (DEVELOPERS.md,
        "Terrain and missing values"); :meth:`below_ground` gives the mask, :meth:`raw` the
        file's values. Gaps larger than the fill limit stay NaN."""
        return self._complete(*self._key(time, member))[0]

    # --- derived fields ----------------------------------------------------------------
    def theta(self, time=None, member=None) -> xr.DataArray:
        ti, mi = self._key(time, member)
        return self._cache.get(("theta", ti, mi),
                               lambda: physics.potential_temperature(self.at(ti, mi)["temperature"]))

    def pv(self, time=None, member=None) -> xr.DataArray:
        """Ertel PV on the pressure levels (PVU)."""
        ti, mi = self._key(time, member)

        def make():
            ds = self.at(ti, mi)
            return physics.ertel_pv(self.theta(ti, mi), ds["u"], ds["v"])

        return self._cache.get(("pv", ti, mi), make)

    def _pressure_fields(self, ti, mi, masked=False):
        if masked:
            bg = self.below_ground(ti, mi)
            return self._pressure_fields(ti, mi).where(~bg)
        ds = self.at(ti, mi)
        out = xr.Dataset(dict(temperature=ds["temperature"], u=ds["u"], v=ds["v"],
                              geopotential=ds["geopotential"],
                              geopotential_height=physics.geopotential_height(ds["geopotential"]),
                              ertel_pv=self.pv(ti, mi)))
        if "relative_humidity" in ds:
            out["relative_humidity"] = ds["relative_humidity"]
        elif "specific_humidity" in ds:
            out["relative_humidity"] = physics.relative_humidity(ds["temperature"], ds["specific_humidity"])
        return out

    def relative_humidity(self, time=None, member=None):
        """Relative humidity (%), from the file or from specific humidity; None if neither."""
        ti, mi = self._key(time, member)
        f = self._pressure_fields(ti, mi)
        return f["relative_humidity"] if "relative_humidity" in f else None

    def isentropic(self, theta_levels, time=None, member=None) -> xr.Dataset:
        """PV, pressure, winds and height on isentropic surfaces (K); NaN where the surface
        lies below the ground (the inputs are masked by :meth:`below_ground`)."""
        ti, mi = self._key(time, member)
        levels = tuple(float(x) for x in np.atleast_1d(theta_levels))

        def make():
            return physics.isentropic_interpolation(self._pressure_fields(ti, mi, masked=True), levels)

        return self._cache.get(("isen", ti, mi, levels), make)

    def tropopause(self, time=None, member=None, threshold=2.0) -> xr.Dataset:
        """The dynamic tropopause (|PV| = threshold PVU, searched downward from the top); only
        level pairs above the ground count (PV masked by :meth:`below_ground`)."""
        ti, mi = self._key(time, member)
        thr = float(threshold)
        return self._cache.get(("trop", ti, mi, thr), lambda: physics.dynamic_tropopause(
            self.at(ti, mi), self.pv(ti, mi).where(~self.below_ground(ti, mi)), thr))

    def map_field(self, field, surface, time=None, member=None, *, reference=None,
                  threshold=2.0) -> xr.DataArray:
        """One 2-D field (latitude, longitude) for a map; NaN below the ground.

        ``field`` is one of :data:`MAP_FIELDS`; ``surface`` a theta value in K, ``"tropopause"``
        or a pressure level such as ``"500hPa"``; ``reference`` (for anomalies) None means
        :attr:`default_reference`.
        """
        if field not in MAP_FIELDS:
            raise InputError(f"Unknown map field {field!r}; choose one of {', '.join(MAP_FIELDS)}.")
        ti, mi = self._key(time, member)
        kind, value = _parse_surface(surface)
        if kind == "theta":
            ds = self.isentropic([value], ti, mi).isel(potential_temperature=0)
            if field == "potential_temperature":
                out = xr.full_like(ds["pressure"], value).where(np.isfinite(ds["pressure"]))
                out.attrs = dict(standard_name="air_potential_temperature", units="K")
            elif field == "wind_speed":
                out = physics.wind_speed(ds["u"], ds["v"])
            elif field == "ertel_pv_anomaly":
                ref = self._reference_isentropic(value, reference, ti, mi)
                out = ds["ertel_pv"] - ref
                out.attrs = dict(long_name="Ertel PV anomaly", units="PVU")
            else:
                out = ds[field]
            label = f"{value:g} K"
        elif kind == "tropopause":
            ds = self.tropopause(ti, mi, threshold)
            if field == "wind_speed":
                out = physics.wind_speed(ds["u"], ds["v"])
            elif field in ("ertel_pv", "ertel_pv_anomaly"):
                raise InputError("PV is constant on the dynamic tropopause by definition; map theta, "
                                 "pressure, height or wind there instead.")
            else:
                out = ds[field]
            label = f"dynamic tropopause ({threshold:g} PVU)"
        else:
            p = value * 100.0
            levels = self.data["pressure"].values
            k = int(np.argmin(np.abs(levels - p)))
            if abs(levels[k] - p) > 1.0:
                raise InputError(f"{value:g} hPa is not a level of this case (levels: "
                                 f"{', '.join(f'{x:g}' for x in self.levels_hpa)} hPa).")
            f = self._pressure_fields(ti, mi).isel(pressure=k)
            if field == "potential_temperature":
                out = self.theta(ti, mi).isel(pressure=k)
            elif field == "pressure":
                out = xr.full_like(f["temperature"], p)
                out.attrs = dict(standard_name="air_pressure", units="Pa")
            elif field == "wind_speed":
                out = physics.wind_speed(f["u"], f["v"])
            elif field == "ertel_pv_anomaly":
                out = f["ertel_pv"] - self._reference_pv(reference).isel(pressure=k)
                out.attrs = dict(long_name="Ertel PV anomaly", units="PVU")
            else:
                out = f[field]
            out = out.where(~self.below_ground(ti, mi).isel(pressure=k))
            label = f"{value:g} hPa"
        out = out.drop_vars([c for c in out.coords if c not in ("latitude", "longitude")])
        out.attrs = dict(out.attrs, surface=label, field=field)
        return out.rename(field)

    # --- reference state and QG ---------------------------------------------------------
    def reference(self, kind=None) -> xr.Dataset:
        """Reference state for anomalies: temperature, geopotential, u, v on (pressure, lat, lon).

        ``kind``: None (the case's :attr:`default_reference`), "time_mean" (mean over the
        case's times and members; refused for a one-time case), "area_mean" (the area mean of
        the time mean at each level, horizontally uniform), "zonal_mean" (the zonal mean of the
        time mean), or a climatology as a Dataset, Case or path (normalised, its time mean
        interpolated to the case grid: linear in latitude/longitude, linear in ln p; longitudes
        are matched across conventions such as 0..360 and -180..180). The means are taken over
        the complete fields (terrain rule).
        """
        kind = self.resolve_reference(kind)
        key = ("ref", _ref_key(kind))

        def make():
            vars_ = ["temperature", "geopotential", "u", "v"]
            if isinstance(kind, str) and kind in REFERENCE_KINDS:
                members = [None] if self.members is None else range(len(self.members))
                total, n = None, None  # NaN-skipping mean (gaps too large to fill)
                for ti in range(self.times.size):
                    for mi in members:
                        ds = self._complete(ti, mi, store=False)[0][vars_]
                        ok = ds.notnull().astype("float64")
                        total = ds.fillna(0.0) if total is None else total + ds.fillna(0.0)
                        n = ok if n is None else n + ok
                mean = total / n.where(n > 0)
                mean = mean.drop_vars([c for c in mean.coords if c not in ("pressure", "latitude", "longitude")])
                for v in vars_:
                    mean[v].attrs = dict(self.data[v].attrs)
                if kind == "area_mean":
                    mean = xr.Dataset({v: physics.area_mean(mean[v]).broadcast_like(mean[v]).assign_attrs(
                        mean[v].attrs) for v in vars_})
                elif kind == "zonal_mean":
                    mean = xr.Dataset({v: mean[v].mean("longitude").broadcast_like(mean[v]).assign_attrs(
                        mean[v].attrs) for v in vars_})
                return mean.transpose("pressure", "latitude", "longitude")
            if isinstance(kind, str):
                import os

                if not os.path.exists(kind):
                    raise InputError(f"Unknown reference {kind!r}: use one of {', '.join(REFERENCE_KINDS)} "
                                     "or the path of a climatology file.")
            return self._climatology(kind, vars_)

        return self._cache.get(key, make)

    def _climatology(self, kind, vars_):
        from .io import open_case

        label = kind if isinstance(kind, str) else "the climatology"
        clim = open_case(kind).data if not isinstance(kind, Case) else kind.data
        missing = [v for v in vars_ if v not in clim]
        if missing:
            raise InputError(f"The climatology {label} lacks {', '.join(missing)}; it needs temperature, "
                             "geopotential, u and v on pressure levels.")
        dims = [d for d in ("time", "member") if d in clim.dims]
        clim = clim[vars_].mean(dims, keep_attrs=True).astype("float64").load()
        clim = _match_longitudes(clim, self.data["longitude"].values)
        lat, lon, p = (self.data[c].values for c in ("latitude", "longitude", "pressure"))
        clat, clon, cp = (clim[c].values for c in ("latitude", "longitude", "pressure"))
        tol = 1e-6
        if (lat.min() < clat.min() - tol or lat.max() > clat.max() + tol or lon.min() < clon.min() - tol
                or lon.max() > clon.max() + tol or p.max() > cp.max() + tol or p.min() < cp.min() - tol):
            raise GridError(
                f"The climatology {label} covers {lat_range(clat.min(), clat.max())}, "
                f"{lon_range(clon.min(), clon.max())}, {cp.max() / 100:g}..{cp.min() / 100:g} hPa but the case needs "
                f"{lat_range(lat.min(), lat.max())}, {lon_range(lon.min(), lon.max())}, {p.max() / 100:g}.."
                f"{p.min() / 100:g} hPa; make a climatology that covers the case's domain and levels.")
        try:
            # linear in ln p vertically, linear in latitude/longitude
            clim = clim.assign_coords(pressure=np.log(clim["pressure"].values)).interp(
                pressure=np.log(p), latitude=lat, longitude=lon).assign_coords(pressure=p)
        except Exception as exc:
            raise GridError(f"The climatology {label} cannot be interpolated to the case grid: {exc}") from exc
        clim["pressure"].attrs = dict(self.data["pressure"].attrs)
        clim = clim.transpose("pressure", "latitude", "longitude")
        clim = clim.drop_vars([c for c in clim.coords if c not in ("pressure", "latitude", "longitude")])
        clim, info = physics.complete_fields(clim)
        if info["n_gap_points"]:
            raise GridError(f"The climatology {label} has {info['n_gap_points']} missing values over the "
                            "case's domain that are neither below the ground nor small gaps; fill them.")
        return clim

    def _reference_pv(self, reference):
        reference = self.resolve_reference(reference)

        def make():
            ref = self.reference(reference)
            return physics.ertel_pv(physics.potential_temperature(ref["temperature"]), ref["u"], ref["v"])

        return self._cache.get(("refpv", _ref_key(reference)), make)

    def _reference_isentropic(self, theta, reference, ti, mi):
        reference = self.resolve_reference(reference)

        def make():
            ref = self.reference(reference)
            fields = xr.Dataset(dict(temperature=ref["temperature"], ertel_pv=self._reference_pv(reference)))
            return physics.isentropic_interpolation(fields, [theta], fields=("ertel_pv",))["ertel_pv"].isel(
                potential_temperature=0)

        return self._cache.get(("refisen", _ref_key(reference), float(theta)), make)

    def sigma(self, reference=None) -> xr.DataArray:
        """Reference static stability sigma(p) from the area mean of the reference temperature."""
        reference = self.resolve_reference(reference)
        return self._cache.get(("sigma", _ref_key(reference)),
                               lambda: physics.static_stability(self.reference(reference)["temperature"]))

    def qg_grid(self, reference=None):
        """The inversion grid (latitude, longitude, pressure, sigma, f0) for this case."""
        from .inversion.operator import QGGrid

        physics.check_qg_domain(self.data["latitude"].values)
        sig = self.sigma(reference)
        return QGGrid(self.data["latitude"].values, self.data["longitude"].values,
                      self.data["pressure"].values, np.asarray(sig.values, dtype=float), self.f0)

    def qgpv(self, time=None, member=None, reference=None) -> xr.DataArray:
        """Full QG PV q = f + (1/f0) lap(Phi) + d/dp[(f0/sigma) dPhi/dp] (s-1) of the complete
        fields (terrain rule); the bottom flux takes theta of the lowest level above the ground."""
        ti, mi = self._key(time, member)
        reference = self.resolve_reference(reference)

        def make():
            ds = self.at(ti, mi)
            self._refuse_gaps(ti, mi, "QG PV")
            theta = physics.potential_temperature(ds["temperature"])
            return physics.qg_pv(ds["geopotential"], ds["temperature"], self.sigma(reference), self.f0,
                                 bottom_theta=_ground_value(theta, self.below_ground(ti, mi)))

        return self._cache.get(("qgpv", ti, mi, _ref_key(reference)), make)

    def anomaly(self, time=None, member=None, reference=None) -> xr.Dataset:
        """The anomaly dataset that piecewise inversion takes (see DEVELOPERS.md).

        Variables: ``qgpv_anomaly`` (s-1, NaN on the lateral boundary), ``bottom_theta_anomaly``
        and ``top_theta_anomaly`` (K), ``geopotential_anomaly`` (m2 s-2, data minus reference),
        ``temperature_anomaly`` (K), ``ertel_pv_anomaly`` (PVU), ``potential_temperature`` (K),
        ``relative_humidity`` (% if available), ``static_stability`` and ``below_ground``;
        attrs ``f0``, ``reference``, ``below_ground_points``, ``filled_points``.

        The anomalies are those of the complete fields (terrain rule: below-ground values
        extrapolated, scattered gaps filled). The lower-boundary theta' of each column is the
        theta' of its lowest level above the ground (the ground's theta' carried down to the
        flat lower boundary); q' is computed with that same boundary value, so inverting the
        full forcing returns the data's Phi'. Gaps too large to fill are refused (InputError).
        """
        ti, mi = self._key(time, member)
        reference = self.resolve_reference(reference)

        def make():
            physics.check_qg_domain(self.data["latitude"].values)
            ds = self.at(ti, mi)
            self._refuse_gaps(ti, mi, "The inversion")
            ref = self.reference(reference)
            sig = self.sigma(reference)
            info = self.missing_info(ti, mi)
            bg = info["below_ground"]
            dphi = ds["geopotential"] - ref["geopotential"]
            dt = ds["temperature"] - ref["temperature"]
            pi = physics.exner(ds["pressure"])
            dth = dt / pi
            bottom = _ground_value(dth, bg)
            q = physics.qg_pv(dphi, dt, sig, self.f0, include_f=False, bottom_theta=bottom)
            out = xr.Dataset(dict(
                qgpv_anomaly=q,
                bottom_theta_anomaly=bottom.assign_attrs(
                    long_name="potential temperature anomaly on the lower boundary (lowest level "
                              "above the ground)", units="K"),
                top_theta_anomaly=dth.isel(pressure=-1, drop=True).assign_attrs(
                    long_name="potential temperature anomaly on the upper boundary", units="K"),
                geopotential_anomaly=dphi.assign_attrs(long_name="geopotential anomaly", units="m2 s-2"),
                temperature_anomaly=dt.assign_attrs(long_name="temperature anomaly", units="K"),
                ertel_pv_anomaly=(self.pv(ti, mi) - self._reference_pv(reference)).assign_attrs(
                    long_name="Ertel PV anomaly", units="PVU"),
                potential_temperature=self.theta(ti, mi),
                static_stability=sig,
                below_ground=bg,
            ))
            rh = self.relative_humidity(ti, mi)
            if rh is not None:
                out["relative_humidity"] = rh
            out.attrs.update(f0=self.f0, reference=str(_ref_key(reference)), time=str(self.times[ti])[:19],
                             below_ground_points=info["n_below_ground"], filled_points=info["n_filled"])
            return out

        return self._cache.get(("anom", ti, mi, _ref_key(reference)), make)

    def inversion(self, pieces, time=None, member=None, reference=None, balance="qg", floor=False) -> dict:
        """Piecewise inversion: dict piece name -> balanced Dataset (and "total").

        ``balance="qg"`` (constant f0, linear) or ``"nonlinear"`` (nonlinear balance with
        f(lat), :mod:`workbench.inversion.nonlinear`; adds the ``"nonlinear remainder"`` entry;
        ``floor=True`` accepts the floor remedy where the system is not elliptic)."""
        from .inversion.pieces import Piece, invert_pieces

        if balance not in ("qg", "nonlinear"):
            raise InputError(f"balance {balance!r} is unknown; use 'qg' or 'nonlinear'.")
        ti, mi = self._key(time, member)
        reference = self.resolve_reference(reference)
        plist = [p if isinstance(p, Piece) else Piece.from_dict(p) for p in pieces]
        key = ("inv", ti, mi, _ref_key(reference),
               json.dumps([p.to_dict() for p in plist], sort_keys=True, default=str))
        if balance == "nonlinear":
            from .inversion.nonlinear import invert_nonlinear_pieces

            return self._cache.get(key + ("nonlinear", bool(floor)), lambda: invert_nonlinear_pieces(
                self, plist, ti, mi, reference, floor=floor))
        return self._cache.get(key, lambda: invert_pieces(self.anomaly(ti, mi, reference), plist))

    def balanced_state(self, time=None, member=None, balance="nonlinear", reference=None, floor=False):
        """The full balanced state (not only the anomaly): Dataset with ``geopotential``, ``u``,
        ``v``, ``relative_vorticity`` and ``temperature`` on the case grid, to compare with the
        analysed fields. ``"qg"``: reference plus the QG full inversion, geostrophic wind with
        the constant f0; ``"nonlinear"``: the nonlinear-balance inversion of the Ertel PV."""
        if balance == "nonlinear":
            from .inversion.nonlinear import case_balanced_state

            ti, mi = self._key(time, member)
            return self._cache.get(("balstate", ti, mi, bool(floor)),
                                   lambda: case_balanced_state(self, ti, mi, floor=floor))
        if balance != "qg":
            raise InputError(f"balance {balance!r} is unknown; use 'qg' or 'nonlinear'.")
        from .inversion.fields import balanced_fields

        total = self.inversion([], time, member, reference)["total"]
        phi = self.reference(reference)["geopotential"] + total["geopotential_anomaly"]
        f = balanced_fields(phi.transpose("pressure", "latitude", "longitude"), self.f0)
        ds = xr.Dataset(dict(geopotential=f["geopotential_anomaly"].assign_attrs(
            standard_name="geopotential", long_name="balanced geopotential", units="m2 s-2"),
            u=f["u"], v=f["v"], relative_vorticity=f["relative_vorticity"],
            temperature=f["temperature_anomaly"].assign_attrs(
                standard_name="air_temperature", long_name="balanced temperature", units="K")))
        ds.attrs.update(balance="qg", f0=self.f0)
        return ds

    def _refuse_gaps(self, ti, mi, what):
        info = self.missing_info(ti, mi)
        if info["n_gap_points"]:
            gaps = info["gaps"]
            k = int(np.argmax(gaps.sum(("latitude", "longitude")).values))
            j, i = np.argwhere(gaps.isel(pressure=k).values)[0]
            raise InputError(
                f"{what} needs complete fields, but {str(self.times[ti])[:16]} has "
                f"{info['n_gap_points']} missing values in gaps larger than {physics.MAX_GAP_POINTS} points "
                f"(largest {info['largest_gap']}, e.g. at "
                f"{point_label(float(gaps['longitude'][i]), float(gaps['latitude'][j]), None)}, {float(gaps['pressure'][k]) / 100:g} hPa); "
                "choose a region without them or fill the data.")

    def clear_cache(self):
        self._cache.clear()

    @property
    def cache_max_bytes(self) -> int:
        """Memory budget (bytes) of the per-time derived fields kept by this case (fields,
        anomalies, inversions; least recently used dropped first). Default ``PVWB_CACHE_MB``
        (MB) or 1024 MB; 0 keeps only the latest entry."""
        return self._cache.max_bytes

    @cache_max_bytes.setter
    def cache_max_bytes(self, value):
        if value is None or float(value) < 0:
            raise InputError(f"cache_max_bytes must be 0 or more bytes, got {value!r}.")
        with self._cache._lock:
            self._cache.max_bytes = int(value)
            self._cache._evict()


def _ground_value(da, below):
    """``da`` (pressure, latitude, longitude) at each column's lowest level above the ground."""
    k0 = np.minimum(below.sum("pressure").values, da.sizes["pressure"] - 1)
    vals = np.asarray(da.transpose("pressure", "latitude", "longitude").values, dtype=float)
    out = np.take_along_axis(vals, k0[None], axis=0)[0]
    return xr.DataArray(out, dims=("latitude", "longitude"),
                        coords={"latitude": da["latitude"], "longitude": da["longitude"]})


def _match_longitudes(clim, lon):
    """Put the climatology's longitudes in the case's convention (0..360 vs -180..180): a global
    (periodic) climatology is rolled and padded one column on each side; a regional one is
    shifted by the multiple of 360 degrees that brings it nearest the case."""
    clon = np.asarray(clim["longitude"].values, dtype=float)
    if clon.size > 1:
        dlon = float(np.median(np.diff(clon)))
        if clon[-1] - clon[0] + dlon >= 360.0 - 1e-6:
            lo = float(np.min(lon))
            new = lo + np.mod(clon - lo, 360.0)
            order = np.argsort(new)
            clim = clim.isel(longitude=order).assign_coords(longitude=new[order])
            first, last = clim.isel(longitude=[0]), clim.isel(longitude=[-1])
            return xr.concat([last.assign_coords(longitude=last["longitude"] - 360.0), clim,
                              first.assign_coords(longitude=first["longitude"] + 360.0)], "longitude")
    shift = 360.0 * np.round((0.5 * (np.min(lon) + np.max(lon)) - 0.5 * (clon.min() + clon.max())) / 360.0)
    return clim.assign_coords(longitude=clon + shift)


def _ref_key(kind):
    if isinstance(kind, str):
        return kind
    if isinstance(kind, Case):
        return f"case:{kind.checksum or id(kind)}"
    return f"dataset:{id(kind)}"


def _parse_surface(surface):
    """-> ("theta", K) | ("tropopause", None) | ("pressure", hPa)."""
    if isinstance(surface, (int, float, np.integer, np.floating)):
        return "theta", float(surface)
    s = str(surface).strip().lower().replace(" ", "")
    if s in ("tropopause", "dynamic_tropopause", "dt", "pv2"):
        return "tropopause", None
    if s.endswith("hpa"):
        try:
            return "pressure", float(s[:-3])
        except ValueError:
            pass
    if s.endswith("k"):
        try:
            return "theta", float(s[:-1])
        except ValueError:
            pass
    try:
        return "theta", float(s)
    except ValueError:
        raise InputError(f"Unknown surface {surface!r}: give theta in K (e.g. 320), 'tropopause' or "
                         "a pressure level such as '500hPa'.") from None

