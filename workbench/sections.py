"""Vertical cross-sections through a case (computation only, no plotting).

A section runs along the great circle between two points given as
``(longitude, latitude)`` in degrees. The path is built with :class:`pyproj.Geod`
on a sphere of the package's Earth radius (so the geodesic is a great circle) and
fields are interpolated linearly onto it with :meth:`xarray.Dataset.interp`, the
same construction as MetPy's ``cross_section`` (which the tests compare against).

Points below the ground (the case's terrain rule, :meth:`workbench.Case.below_ground`) are
NaN in every section variable: the below-ground mask is interpolated like the fields and a
section point counts as below the ground where that interpolated fraction exceeds one half
(the mask is returned as ``below_ground``).

The section-normal wind is positive to the LEFT of the start -> end direction
(looking along the section from its start): for a section drawn from west to
east the normal wind is the northward wind.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping

import numpy as np
import xarray as xr

from .errors import InputError
from .units import EARTH_RADIUS

#: Key of the full flow's omega in the ``omega`` dict of :func:`cross_section`.
FULL_FLOW = "full flow"

__all__ = ["FULL_FLOW", "Section", "great_circle_path", "cross_section", "normal_and_tangent"]


@dataclass(frozen=True)
class Section:
    """A section line: ``start`` and ``end`` as (longitude, latitude) in degrees."""

    start: tuple
    end: tuple
    name: str = ""
    npoints: int = 100

    def to_dict(self) -> dict:
        return {"start": [float(self.start[0]), float(self.start[1])],
                "end": [float(self.end[0]), float(self.end[1])],
                "name": str(self.name), "npoints": int(self.npoints)}

    @classmethod
    def from_dict(cls, d: Mapping) -> "Section":
        try:
            start = (float(d["start"][0]), float(d["start"][1]))
            end = (float(d["end"][0]), float(d["end"][1]))
        except (KeyError, TypeError, IndexError, ValueError) as exc:
            raise InputError(
                f"section entry {d!r} needs 'start' and 'end' as [longitude, latitude] "
                "pairs of numbers; fix the session file entry") from exc
        return cls(start, end, str(d.get("name", "")), int(d.get("npoints", 100)))


def _geod():
    from pyproj import Geod

    return Geod(a=EARTH_RADIUS, b=EARTH_RADIUS)


def _check_point(name, pt):
    try:
        lon, lat = float(pt[0]), float(pt[1])
    except (TypeError, IndexError, ValueError) as exc:
        raise InputError(f"section {name} {pt!r} must be a (longitude, latitude) pair of "
                         "numbers in degrees") from exc
    if not (np.isfinite(lon) and np.isfinite(lat)) or abs(lat) > 90:
        raise InputError(f"section {name} ({lon}, {lat}) is not a valid (longitude, latitude) "
                         "point; latitude must lie in [-90, 90]")
    return lon, lat


def great_circle_path(start, end, npoints=100):
    """Points along the great circle from ``start`` to ``end`` (both (lon, lat) degrees).

    Returns ``(lon, lat, distance_km, azimuth_deg)`` numpy arrays of length
    ``npoints`` including both end points. ``azimuth_deg`` is the local forward
    direction of the path (degrees clockwise from north) at each point.
    Longitudes are continuous along the path (no jump at the dateline).
    """
    lon0, lat0 = _check_point("start", start)
    lon1, lat1 = _check_point("end", end)
    npoints = int(npoints)
    if npoints < 2:
        raise InputError(f"section npoints={npoints} must be at least 2")
    g = _geod()
    total_az, _, total = g.inv(lon0, lat0, lon1, lat1)
    if total < 1.0:
        raise InputError(f"section start {start} and end {end} coincide; draw a longer line")
    mid = np.array(g.npts(lon0, lat0, lon1, lat1, npoints - 2)).reshape(-1, 2)
    lon = np.concatenate([[lon0], mid[:, 0], [lon1]])
    lat = np.concatenate([[lat0], mid[:, 1], [lat1]])
    # keep longitudes continuous and close to the start longitude
    lon = lon0 + np.rad2deg(np.unwrap(np.deg2rad(lon - lon0)))
    az, _, seg = g.inv(lon[:-1], lat[:-1], lon[1:], lat[1:])
    dist = np.concatenate([[0.0], np.cumsum(seg)]) / 1000.0
    back_az, _, _ = g.inv(lon[1:], lat[1:], lon[:-1], lat[:-1])
    fwd_end = (np.asarray(back_az)[-1] + 180.0) % 360.0
    azimuth = np.concatenate([np.asarray(az, float), [fwd_end]])
    return lon, lat, dist, azimuth


def normal_and_tangent(u, v, azimuth_deg):
    """Section-normal (positive to the left) and tangential wind components.

    ``azimuth_deg`` is the path direction in degrees clockwise from north. With
    the unit tangent t = (sin az, cos az) in (east, north), the left normal is
    n = (-cos az, sin az).
    """
    az = np.deg2rad(np.asarray(azimuth_deg, float))
    te, tn = np.sin(az), np.cos(az)
    normal = -tn * u + te * v
    tangent = te * u + tn * v
    return normal, tangent


def _domain_lon(lon, lon_coord):
    """Shift path longitudes by multiples of 360 into the case's longitude range."""
    lo = float(lon_coord.min())
    return lo + np.mod(lon - lo, 360.0)


def _path_indexers(ds, lon, lat):
    lons = _domain_lon(lon, ds["longitude"])
    return {"longitude": xr.DataArray(lons, dims="distance"),
            "latitude": xr.DataArray(lat, dims="distance")}


def _inside(ds, lon, lat):
    lons = _domain_lon(lon, ds["longitude"])
    la, lo = ds["latitude"].values, ds["longitude"].values
    return ((lat >= la.min() - 1e-9) & (lat <= la.max() + 1e-9)
            & (lons >= lo.min() - 1e-9) & (lons <= lo.max() + 1e-9))


def _interp(da, idx):
    out = da.interp(idx, method="linear")
    return out.drop_vars([c for c in ("longitude", "latitude") if c in out.coords])


def cross_section(case, start, end, time=None, member=None, npoints=100, results=None,
                  omega=None, threshold=2.0):
    """A vertical section through ``case`` from ``start`` to ``end``.

    Parameters
    ----------
    case : workbench.Case
    start, end : (longitude, latitude) in degrees; both must lie inside the case domain.
    time, member : as for :meth:`Case.at`.
    npoints : number of points along the path (including the ends).
    results : optional dict ``name -> balanced Dataset`` (as from ``Case.inversion``)
        with ``u``, ``v`` and ``temperature_anomaly`` on (pressure, latitude, longitude).
    omega : optional QG vertical motion (Pa s-1) on (pressure, latitude, longitude):
        one DataArray (the full flow's omega, stored as ``qg_omega``) or a dict
        ``name -> DataArray`` whose entry ``"full flow"`` becomes ``qg_omega`` and whose
        other entries (pieces) become ``piece_qg_omega``.
    threshold : PV threshold (PVU) of the dynamic tropopause drawn on the section.

    Returns
    -------
    xarray.Dataset with dims (pressure, distance); coords ``distance`` (km along the
    great circle), ``longitude`` and ``latitude`` (distance); variables ``ertel_pv``
    (PVU), ``potential_temperature`` (K), ``normal_wind`` and ``tangential_wind``
    (m s-1; normal positive to the left of start -> end), ``tropopause_pressure``
    (distance, Pa). With ``results``: ``balanced_normal_wind`` and
    ``balanced_temperature_anomaly`` (piece, pressure, distance); with ``omega``:
    ``qg_omega`` (pressure, distance) and/or ``piece_qg_omega`` (piece, pressure, distance).
    Every (pressure, distance) variable is NaN below the ground; ``below_ground`` (pressure,
    distance) is the mask.
    """
    lon, lat, dist, az = great_circle_path(start, end, npoints)
    ds = case.at(time=time, member=member)
    inside = _inside(ds, lon, lat)
    dom = (f"longitude {float(ds.longitude.min()):g}..{float(ds.longitude.max()):g}, "
           f"latitude {float(ds.latitude.min()):g}..{float(ds.latitude.max()):g}")
    for label, ok in (("start", inside[0]), ("end", inside[-1])):
        if not ok:
            pt = start if label == "start" else end
            raise InputError(f"section {label} point {tuple(pt)} lies outside the case domain "
                             f"({dom}); draw the line inside the map")
    idx = _path_indexers(ds, lon, lat)

    pv = case.pv(time=time, member=member)
    theta = case.theta(time=time, member=member)
    u = _interp(ds["u"], idx)
    v = _interp(ds["v"], idx)
    normal, tangent = normal_and_tangent(u, v, xr.DataArray(az, dims="distance"))
    out = xr.Dataset(
        {
            "ertel_pv": _interp(pv, idx),
            "potential_temperature": _interp(theta, idx),
            "normal_wind": normal.assign_attrs(
                units="m s-1", long_name="section-normal wind",
                positive="to the left of the start->end direction"),
            "tangential_wind": tangent.assign_attrs(
                units="m s-1", long_name="along-section wind",
                positive="along the start->end direction"),
        },
        coords={"distance": ("distance", dist, {"units": "km", "long_name": "distance along section"}),
                "longitude": ("distance", lon, {"units": "degrees_east"}),
                "latitude": ("distance", lat, {"units": "degrees_north"}),
                "azimuth": ("distance", az, {"units": "degree",
                                             "long_name": "path direction clockwise from north"})},
    )
    below = _interp(case.below_ground(time=time, member=member).astype(float), idx) > 0.5
    out["ertel_pv"].attrs.update(units="PVU", long_name="Ertel potential vorticity")
    out["potential_temperature"].attrs.update(units="K", long_name="potential temperature")
    trop = case.tropopause(time=time, member=member, threshold=threshold)
    out["tropopause_pressure"] = _interp(trop["pressure"], idx).assign_attrs(
        units="Pa", long_name=f"dynamic tropopause ({threshold:g} PVU) pressure")

    if results:
        names = list(results)
        bn, bt = [], []
        for name in names:
            r = results[name]
            ri = _interp(r[["u", "v", "temperature_anomaly"]], idx)
            n, _ = normal_and_tangent(ri["u"], ri["v"], xr.DataArray(az, dims="distance"))
            bn.append(n)
            bt.append(ri["temperature_anomaly"])
        piece = xr.DataArray(names, dims="piece", name="piece")
        out["balanced_normal_wind"] = xr.concat(bn, dim=piece).assign_attrs(
            units="m s-1", long_name="balanced section-normal wind of each piece",
            positive="to the left of the start->end direction")
        out["balanced_temperature_anomaly"] = xr.concat(bt, dim=piece).assign_attrs(
            units="K", long_name="balanced temperature anomaly of each piece")
    if omega is not None:
        om = dict(omega) if isinstance(omega, Mapping) else {FULL_FLOW: omega}
        full = om.pop(FULL_FLOW, None)
        if full is not None:
            out["qg_omega"] = _interp(full, idx).assign_attrs(
                units="Pa s-1", long_name="quasi-geostrophic vertical motion (omega) of the full flow",
                positive="omega > 0 is descent")
        if om:
            names = list(om)
            vals = [_interp(om[n], idx) for n in names]
            out["piece_qg_omega"] = xr.concat(
                vals, dim=xr.DataArray(names, dims="piece", name="piece"), coords="minimal",
                compat="override").assign_attrs(
                units="Pa s-1", long_name="quasi-geostrophic omega attributable to each piece",
                positive="omega > 0 is descent")
    for name in list(out.data_vars):
        if "pressure" in out[name].dims:
            out[name] = out[name].where(~below)
    out["below_ground"] = below.assign_attrs(long_name="below the ground (terrain rule)")
    out = out.transpose(*[d for d in ("piece", "pressure", "distance") if d in out.dims])
    out.attrs.update(
        path="great circle (pyproj.Geod on a sphere of the mean Earth radius)",
        start_lon=float(lon[0]), start_lat=float(lat[0]),
        end_lon=float(lon[-1]), end_lat=float(lat[-1]),
        normal_wind_sign="positive to the left of the start->end direction",
        points_outside_domain=int((~inside).sum()),
    )
    return out
