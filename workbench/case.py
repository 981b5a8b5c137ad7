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
from .errors import GridError, InputError

__all__ = ["Case", "MAP_FIELDS", "REFERENCE_KINDS"]

MAP_FIELDS = ("ertel_pv", "ertel_pv_anomaly", "potential_temperature", "pressure", "wind_speed",
              "geopotential_height", "u", "v")
REFERENCE_KINDS = ("time_mean", "area_mean", "zonal_mean")


class _Cache:
    """A small thread-safe LRU cache of derived fields."""

    def __init__(self, maxsize=256):
        self._d = OrderedDict()
        self._lock = threading.RLock()
        self.maxsize = maxsize

    def get(self, key, make):
        with self._lock:
            if key in self._d:
                self._d.move_to_end(key)
                return self._d[key]
        value = make()
        with self._lock:
            self._d[key] = value
            while len(self._d) > self.maxsize:
                self._d.popitem(last=False)
        return value

    def clear(self):
        with self._lock:
            self._d.clear()

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

    def __init__(self, data: xr.Dataset, *, source="<in-memory>", name=None, checksum=None, f0=None):
        self.data = data
        self.source = source
        self.name = name or data.attrs.get("case_name") or data.attrs.get("title") or (
            source.rsplit("/", 1)[-1] if source != "<in-memory>" else "in-memory case")
        self.checksum = checksum
        self._f0 = None if f0 is None else float(f0)
        self._cache = _Cache()
        # what was done to the data on the way in (regridding, wind rotation, filled points,
        # default reference ...): one plain sentence each, shown in every summary
        raw_notes = data.attrs.get("workbench_notes", "")
        self.notes = [n for n in (raw_notes.split("\n") if isinstance(raw_notes, str) else list(raw_notes)) if n]

    def add_note(self, text: str) -> None:
        """Record one sentence about how the data were handled (shown in the case summary)."""
        if text and text not in self.notes:
            self.notes.append(str(text))

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
                    variables=self.variables, invented=self.invented, notes=list(self.notes))

    def __repr__(self):
        s = self.summary()
        d = s["domain"]
        t = s["times"]
        trange = t[0] if len(t) == 1 else f"{t[0]} .. {t[-1]} ({len(t)} times)"
        mem = "" if s["members"] is None else f"\n  members:   {len(s['members'])}"
        lev = self.levels_hpa
        return (f"<workbench.Case {self.name!r}>\n"
                f"  source:    {self.source}\n"
                f"  times:     {trange}{mem}\n"
                f"  levels:    {len(lev)} from {lev.max():g} to {lev.min():g} hPa\n"
                f"  domain:    {d['lat_min']:g}..{d['lat_max']:g} N, {d['lon_min']:g}..{d['lon_max']:g} E "
                f"({s['grid']['ny']} x {s['grid']['nx']} points)\n"
                f"  variables: {', '.join(self.variables)}"
                + "".join(f"\n  note:      {n}" for n in self.notes)
                + ("\n  note:      invented demonstration case, not real weather" if self.invented else ""))

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
        """The case's fields at one time (and member), loaded, float64."""
        ti, mi = self._key(time, member)

        def make():
            sel = self.data.isel(time=ti)
            if mi is not None:
                sel = sel.isel(member=mi)
            return sel.astype("float64").load()

        return self._cache.get(("at", ti, mi), make)

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

    def _pressure_fields(self, ti, mi):
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
        """PV, pressure, winds and height on isentropic surfaces (K)."""
        ti, mi = self._key(time, member)
        levels = tuple(float(x) for x in np.atleast_1d(theta_levels))

        def make():
            return physics.isentropic_interpolation(self._pressure_fields(ti, mi), levels)

        return self._cache.get(("isen", ti, mi, levels), make)

    def tropopause(self, time=None, member=None, threshold=2.0) -> xr.Dataset:
        """The dynamic tropopause (|PV| = threshold PVU, searched downward from the top)."""
        ti, mi = self._key(time, member)
        thr = float(threshold)
        return self._cache.get(("trop", ti, mi, thr),
                               lambda: physics.dynamic_tropopause(self.at(ti, mi), self.pv(ti, mi), thr))

    def map_field(self, field, surface, time=None, member=None, *, reference="time_mean",
                  threshold=2.0) -> xr.DataArray:
        """One 2-D field (latitude, longitude) for a map.

        ``field`` is one of :data:`MAP_FIELDS`; ``surface`` a theta value in K, ``"tropopause"``
        or a pressure level such as ``"500hPa"``.
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
            label = f"{value:g} hPa"
        out = out.drop_vars([c for c in out.coords if c not in ("latitude", "longitude")])
        out.attrs = dict(out.attrs, surface=label, field=field)
        return out.rename(field)

    # --- reference state and QG ---------------------------------------------------------
    def reference(self, kind="time_mean") -> xr.Dataset:
        """Reference state for anomalies: temperature, geopotential, u, v on (pressure, lat, lon).

        ``kind``: "time_mean" (mean over the case's times and members), "area_mean" (the
        area mean of the time mean at each level, horizontally uniform), "zonal_mean" (the zonal
        mean of the time mean), or a climatology as a Dataset or a path (normalised and
        interpolated to the case grid; its time mean is used).
        """
        key = ("ref", _ref_key(kind))

        def make():
            vars_ = ["temperature", "geopotential", "u", "v"]
            if isinstance(kind, str) and kind in REFERENCE_KINDS:
                base = self.data[vars_]
                dims = [d for d in ("time", "member") if d in base.dims]
                mean = base.mean(dims, keep_attrs=True).astype("float64").load()
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
            from .io import open_case

            clim = open_case(kind).data if not isinstance(kind, Case) else kind.data
            dims = [d for d in ("time", "member") if d in clim.dims]
            clim = clim[vars_].mean(dims, keep_attrs=True)
            try:
                clim = clim.interp(pressure=self.data["pressure"], latitude=self.data["latitude"],
                                   longitude=self.data["longitude"])
            except Exception as exc:
                raise GridError(f"The climatology cannot be interpolated to the case grid: {exc}") from exc
            if bool(clim["temperature"].isnull().all()):
                raise GridError("The climatology does not cover the case's domain and levels.")
            return clim.astype("float64").load().transpose("pressure", "latitude", "longitude").drop_vars(
                [c for c in clim.coords if c not in ("pressure", "latitude", "longitude")])

        return self._cache.get(key, make)

    def _reference_pv(self, reference):
        def make():
            ref = self.reference(reference)
            return physics.ertel_pv(physics.potential_temperature(ref["temperature"]), ref["u"], ref["v"])

        return self._cache.get(("refpv", _ref_key(reference)), make)

    def _reference_isentropic(self, theta, reference, ti, mi):
        def make():
            ref = self.reference(reference)
            fields = xr.Dataset(dict(temperature=ref["temperature"], ertel_pv=self._reference_pv(reference)))
            return physics.isentropic_interpolation(fields, [theta], fields=("ertel_pv",))["ertel_pv"].isel(
                potential_temperature=0)

        return self._cache.get(("refisen", _ref_key(reference), float(theta)), make)

    def sigma(self, reference="time_mean") -> xr.DataArray:
        """Reference static stability sigma(p) from the area mean of the reference temperature."""
        return self._cache.get(("sigma", _ref_key(reference)),
                               lambda: physics.static_stability(self.reference(reference)["temperature"]))

    def qg_grid(self, reference="time_mean"):
        """The inversion grid (latitude, longitude, pressure, sigma, f0) for this case."""
        from .inversion.operator import QGGrid

        physics.check_qg_domain(self.data["latitude"].values)
        sig = self.sigma(reference)
        return QGGrid(self.data["latitude"].values, self.data["longitude"].values,
                      self.data["pressure"].values, np.asarray(sig.values, dtype=float), self.f0)

    def qgpv(self, time=None, member=None, reference="time_mean") -> xr.DataArray:
        """Full QG PV q = f + (1/f0) lap(Phi) + d/dp[(f0/sigma) dPhi/dp] (s-1)."""
        ti, mi = self._key(time, member)

        def make():
            ds = self.at(ti, mi)
            return physics.qg_pv(ds["geopotential"].fillna(0.0), ds["temperature"].fillna(0.0),
                                 self.sigma(reference), self.f0)

        return self._cache.get(("qgpv", ti, mi, _ref_key(reference)), make)

    def anomaly(self, time=None, member=None, reference="time_mean") -> xr.Dataset:
        """The anomaly dataset that piecewise inversion takes (see DEVELOPERS.md).

        Variables: ``qgpv_anomaly`` (s-1, NaN on the lateral boundary), ``bottom_theta_anomaly``
        and ``top_theta_anomaly`` (K), ``geopotential_anomaly`` (m2 s-2, data minus reference),
        ``temperature_anomaly`` (K), ``ertel_pv_anomaly`` (PVU), ``potential_temperature`` (K),
        ``relative_humidity`` (% if available) and ``static_stability``; attrs ``f0``.
        Missing values (below ground) in the anomalies are set to zero, and counted in the
        attribute ``filled_points``.
        """
        ti, mi = self._key(time, member)

        def make():
            physics.check_qg_domain(self.data["latitude"].values)
            ds = self.at(ti, mi)
            ref = self.reference(reference)
            sig = self.sigma(reference)
            dphi = ds["geopotential"] - ref["geopotential"]
            dt = ds["temperature"] - ref["temperature"]
            nfill = int(dphi.isnull().sum() + dt.isnull().sum())
            dphi, dt = dphi.fillna(0.0), dt.fillna(0.0)
            q = physics.qg_pv(dphi, dt, sig, self.f0, include_f=False)
            pi = physics.exner(ds["pressure"])
            dth = dt / pi
            out = xr.Dataset(dict(
                qgpv_anomaly=q,
                bottom_theta_anomaly=dth.isel(pressure=0, drop=True).assign_attrs(
                    long_name="potential temperature anomaly on the lower boundary", units="K"),
                top_theta_anomaly=dth.isel(pressure=-1, drop=True).assign_attrs(
                    long_name="potential temperature anomaly on the upper boundary", units="K"),
                geopotential_anomaly=dphi.assign_attrs(long_name="geopotential anomaly", units="m2 s-2"),
                temperature_anomaly=dt.assign_attrs(long_name="temperature anomaly", units="K"),
                ertel_pv_anomaly=(self.pv(ti, mi) - self._reference_pv(reference)).assign_attrs(
                    long_name="Ertel PV anomaly", units="PVU"),
                potential_temperature=self.theta(ti, mi),
                static_stability=sig,
            ))
            rh = self.relative_humidity(ti, mi)
            if rh is not None:
                out["relative_humidity"] = rh
            out.attrs.update(f0=self.f0, reference=str(_ref_key(reference)), time=str(self.times[ti])[:19],
                             filled_points=nfill)
            return out

        return self._cache.get(("anom", ti, mi, _ref_key(reference)), make)

    def inversion(self, pieces, time=None, member=None, reference="time_mean") -> dict:
        """Piecewise QG inversion: dict piece name -> balanced Dataset (and "total")."""
        from .inversion.pieces import Piece, invert_pieces

        ti, mi = self._key(time, member)
        plist = [p if isinstance(p, Piece) else Piece.from_dict(p) for p in pieces]
        key = ("inv", ti, mi, _ref_key(reference),
               json.dumps([p.to_dict() for p in plist], sort_keys=True, default=str))
        return self._cache.get(key, lambda: invert_pieces(self.anomaly(ti, mi, reference), plist))

    def clear_cache(self):
        self._cache.clear()


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

