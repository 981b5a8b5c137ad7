"""Physics on the normalised pressure-level data: theta, Ertel PV, isentropic fields,
the dynamic tropopause, the reference static stability and QG PV.

Every function takes and returns xarray objects that follow DEVELOPERS.md (dimensions
``(..., pressure, latitude, longitude)``, pressure in Pa decreasing) with units and CF-style
attributes. Constants come from :mod:`workbench.units` (MetPy's constants).

Sources: Ertel PV on pressure levels in the hydrostatic form of Bluestein (1992,
*Synoptic-Dynamic Meteorology in Midlatitudes* vol. I); QG PV and sigma(p) after Holton &
Hakim (*An Introduction to Dynamic Meteorology*, 5th ed., ch. 6); the dynamic tropopause as the
+-2 PVU surface searched downward from the top (common practice).
"""
from __future__ import annotations

import warnings

import numpy as np
import xarray as xr

from .errors import DomainError, GridError
from .units import EARTH_RADIUS, G, KAPPA, P0, PVU, RD, coriolis

__all__ = [
    "potential_temperature", "exner", "ertel_pv", "isentropic_interpolation", "dynamic_tropopause",
    "static_stability", "area_mean", "qg_pv", "relative_humidity", "geopotential_height",
    "wind_speed", "horizontal_gradient", "below_ground", "complete_fields", "standard_lapse_extrapolation",
    "LAPSE_RATE", "MAX_GAP_POINTS",
]


def exner(pressure):
    """Pi = (p/p0)^kappa (dimensionless) for pressure in Pa."""
    return (pressure / P0) ** KAPPA


def potential_temperature(temperature: xr.DataArray) -> xr.DataArray:
    """theta = T (p0/p)^kappa, with p the ``pressure`` coordinate (Pa)."""
    th = temperature / exner(temperature["pressure"])
    th.attrs = dict(standard_name="air_potential_temperature", long_name="potential temperature", units="K")
    return th.rename("potential_temperature")


def geopotential_height(geopotential: xr.DataArray) -> xr.DataArray:
    """Z = Phi / g (m)."""
    z = geopotential / G
    z.attrs = dict(standard_name="geopotential_height", long_name="geopotential height", units="m")
    return z.rename("geopotential_height")


def wind_speed(u, v):
    s = np.hypot(u, v)
    s.attrs = dict(standard_name="wind_speed", long_name="wind speed", units="m s-1")
    return s.rename("wind_speed")


def _deriv(da: xr.DataArray, dim: str, coord_values) -> xr.DataArray:
    """Second-order centred derivative along ``dim`` (non-uniform spacing, second-order edges)."""
    axis = da.get_axis_num(dim)
    x = np.asarray(coord_values, dtype=float)

    def f(a):
        return np.gradient(a, x, axis=axis, edge_order=2)

    data = da.data
    if hasattr(data, "map_blocks"):  # dask: keep the derivative axis in one chunk
        import dask.array as dsa

        data = data.rechunk({axis: -1})
        out = dsa.map_blocks(f, data, dtype=float)
    else:
        out = f(np.asarray(data, dtype=float))
    return da.copy(data=out)


def horizontal_gradient(da: xr.DataArray):
    """(d/dx, d/dy) on the sphere: dx = a cos(phi) dlambda, dy = a dphi."""
    lat = np.deg2rad(da["latitude"].values)
    lon = np.deg2rad(da["longitude"].values)
    ddlam = _deriv(da, "longitude", lon)
    ddphi = _deriv(da, "latitude", lat)
    coslat = xr.DataArray(np.cos(lat), dims="latitude", coords={"latitude": da["latitude"]})
    return ddlam / (EARTH_RADIUS * coslat), ddphi / EARTH_RADIUS


def ertel_pv(theta: xr.DataArray, u: xr.DataArray, v: xr.DataArray) -> xr.DataArray:
    """Ertel PV on pressure levels (PVU), hydrostatic form (Bluestein 1992):

    P = -g [ (f + zeta_p) dtheta/dp - (dv/dp)(dtheta/dx) + (du/dp)(dtheta/dy) ],

    with zeta_p = dv/dx - du/dy + u tan(phi)/a on the sphere and f from the latitude.
    Vertical derivatives are taken in ln p, horizontal ones on the sphere, all centred
    (second-order, second-order one-sided at the edges). Works on numpy- or dask-backed arrays
    with any leading dimensions. PV is missing (NaN) on a pole row (|latitude| = 90).
    """
    # vertical derivatives in ln p (d/dp = (1/p) d/dlnp): second-order accurate and far less
    # sensitive to coarse level spacing aloft, where theta ~ p^-kappa
    pc = theta["pressure"]
    lnp = np.log(pc.values)
    dth_dp = _deriv(theta, "pressure", lnp) / pc
    du_dp = _deriv(u, "pressure", lnp) / pc
    dv_dp = _deriv(v, "pressure", lnp) / pc
    dth_dx, dth_dy = horizontal_gradient(theta)
    dv_dx, _ = horizontal_gradient(v)
    _, du_dy = horizontal_gradient(u)
    lat = theta["latitude"]
    tanlat = np.tan(np.deg2rad(lat))
    zeta = (dv_dx - du_dy + u * tanlat / EARTH_RADIUS).transpose(*u.dims)
    f = xr.DataArray(coriolis(lat.values), dims="latitude", coords={"latitude": lat})
    pv = (-G * ((zeta + f) * dth_dp - dv_dp * dth_dx + du_dp * dth_dy) / PVU).transpose(*theta.dims)
    # the latitude-longitude grid is singular at the pole (tan and 1/cos blow up): PV is set
    # missing on a pole row rather than reported as ~1e12 PVU
    pv = pv.where(np.abs(lat) < 90.0 - 1e-6)
    pv.attrs = dict(standard_name="ertel_potential_vorticity", long_name="Ertel potential vorticity",
                    units="PVU", pole_rule="missing on |latitude| = 90")
    return pv.rename("ertel_pv")


def relative_humidity(temperature: xr.DataArray, specific_humidity: xr.DataArray) -> xr.DataArray:
    """Relative humidity (%) from T and specific humidity, with MetPy (over liquid water)."""
    import metpy.calc as mpcalc
    from .units import units

    t = np.asarray(temperature.values, dtype=float)
    q = np.asarray(specific_humidity.values, dtype=float)
    p = temperature["pressure"].values.reshape((-1, 1, 1))
    rh = mpcalc.relative_humidity_from_specific_humidity(
        units.Quantity(np.broadcast_to(p, t.shape), "Pa"), units.Quantity(t, "K"),
        units.Quantity(q, "kg/kg")).m_as("percent")
    out = temperature.copy(data=rh)
    out.attrs = dict(standard_name="relative_humidity", long_name="relative humidity", units="%")
    return out.rename("relative_humidity")


def isentropic_interpolation(ds: xr.Dataset, theta_levels, fields=("ertel_pv", "u", "v",
                                                                    "geopotential_height")) -> xr.Dataset:
    """Interpolate fields to isentropic surfaces with MetPy's ``isentropic_interpolation``.

    ``ds`` holds ``temperature`` and the fields on pressure levels for one time (dims pressure,
    latitude, longitude). Returns dims (potential_temperature, latitude, longitude) with
    ``pressure`` (Pa) and the fields; points where the surface lies outside the column are NaN.
    MetPy assumes temperature linear in ln p and solves for the pressure of each surface.
    """
    import metpy.calc as mpcalc
    from .units import units

    levels = np.atleast_1d(np.asarray(theta_levels, dtype=float))
    p = ds["pressure"].values
    t = np.asarray(ds["temperature"].values, dtype=float)
    if t.ndim != 3:
        raise GridError("isentropic_interpolation takes one time: dims (pressure, latitude, longitude).")
    args = []
    units_of = []
    for name in fields:
        da = ds[name]
        args.append(units.Quantity(np.asarray(da.values, dtype=float), _unit(da)))
        units_of.append(da.attrs.get("units", ""))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = mpcalc.isentropic_interpolation(
            units.Quantity(levels, "K"), units.Quantity(p, "Pa"), units.Quantity(t, "K"), *args,
            vertical_dim=0, bottom_up_search=True)
    coords = {"potential_temperature": ("potential_temperature", levels,
                                        dict(standard_name="air_potential_temperature", units="K")),
              "latitude": ds["latitude"], "longitude": ds["longitude"]}
    dims = ("potential_temperature", "latitude", "longitude")
    out = xr.Dataset(coords=coords)
    out["pressure"] = xr.DataArray(res[0].m_as("Pa"), dims=dims,
                                   attrs=dict(standard_name="air_pressure", long_name="pressure", units="Pa"))
    for name, q, uo in zip(fields, res[1:], units_of):
        attrs = dict(ds[name].attrs)
        out[name] = xr.DataArray(np.asarray(q.m_as(_unit(ds[name]))), dims=dims, attrs=attrs)
    # MetPy extrapolates surfaces below the lowest level; mark them missing (below ground / out of column)
    theta = potential_temperature(ds["temperature"])
    thmin = theta.min("pressure").values
    thmax = theta.max("pressure").values
    outside = (levels[:, None, None] < thmin[None]) | (levels[:, None, None] > thmax[None])
    out = out.where(~xr.DataArray(outside, dims=dims))
    return out


def _unit(da):
    u = da.attrs.get("units", "")
    return {"m s-1": "m/s", "m2 s-2": "m**2/s**2", "%": "percent", "kg kg-1": "kg/kg", "": "dimensionless",
            "s-1": "1/s"}.get(u, u)


def dynamic_tropopause(ds: xr.Dataset, pv: xr.DataArray, threshold: float = 2.0) -> xr.Dataset:
    """The dynamic tropopause: the |PV| = threshold surface (PVU), searched downward from the top.

    In each column, starting at the model top, the first level pair where sign(f)*PV drops from
    >= threshold (above) to < threshold (below) brackets the tropopause; theta, pressure,
    geopotential height, u and v are interpolated linearly in PV between the pair (pressure in
    ln p). Searching from the top keeps low-level diabatic PV from being taken for the
    tropopause; the sign of f makes it -threshold in the southern hemisphere. Columns with no
    crossing are NaN. ``ds`` holds one time on pressure levels; ``pv`` is its Ertel PV (PVU).
    """
    if threshold <= 0:
        raise DomainError(f"Tropopause threshold must be a positive PV value in PVU, got {threshold}.")
    lat = ds["latitude"].values
    sgn = np.sign(lat)[None, :, None]
    q = np.asarray(pv.values, dtype=float) * sgn  # (nz, ny, nx), index 0 = bottom
    s = q - threshold
    below = s < 0
    above = s >= 0
    cross = above[1:] & below[:-1]  # level k below, k+1 above: (nz-1, ny, nx)
    nz = q.shape[0]
    kidx = np.arange(nz - 1)[:, None, None]
    kk = np.where(cross, kidx, -1).max(axis=0)  # highest crossing
    ok = kk >= 0
    k0 = np.where(ok, kk, 0)
    k1 = k0 + 1

    def take(a, k):
        return np.take_along_axis(a, k[None], axis=0)[0]

    q0, q1 = take(q, k0), take(q, k1)
    with np.errstate(invalid="ignore", divide="ignore"):
        w = np.clip((threshold - q0) / (q1 - q0), 0.0, 1.0)
    p = ds["pressure"].values
    lnp = np.log(p)
    pres = np.exp(lnp[k0] * (1 - w) + lnp[k1] * w)
    theta = potential_temperature(ds["temperature"])
    out = xr.Dataset(coords={"latitude": ds["latitude"], "longitude": ds["longitude"]})
    dims = ("latitude", "longitude")

    def interp(a):
        a = np.asarray(a, dtype=float)
        return np.where(ok, take(a, k0) * (1 - w) + take(a, k1) * w, np.nan)

    out["potential_temperature"] = xr.DataArray(interp(theta.values), dims=dims, attrs=dict(
        standard_name="air_potential_temperature", long_name="potential temperature on the dynamic tropopause",
        units="K"))
    out["pressure"] = xr.DataArray(np.where(ok, pres, np.nan), dims=dims, attrs=dict(
        standard_name="tropopause_air_pressure", long_name="pressure on the dynamic tropopause", units="Pa"))
    out["geopotential_height"] = xr.DataArray(interp(ds["geopotential"].values / G), dims=dims, attrs=dict(
        standard_name="geopotential_height", long_name="height of the dynamic tropopause", units="m"))
    out["u"] = xr.DataArray(interp(ds["u"].values), dims=dims, attrs=dict(ds["u"].attrs))
    out["v"] = xr.DataArray(interp(ds["v"].values), dims=dims, attrs=dict(ds["v"].attrs))
    out.attrs.update(threshold_pvu=float(threshold), definition=(
        f"|PV| = {threshold} PVU (sign of f), first crossing searched downward from the top level"))
    return out


def area_mean(da: xr.DataArray) -> xr.DataArray:
    """Area-weighted (cos latitude) horizontal mean, NaN skipped."""
    w = np.cos(np.deg2rad(da["latitude"]))
    return da.weighted(w).mean(("latitude", "longitude"), skipna=True)


def static_stability(temperature: xr.DataArray) -> xr.DataArray:
    """Reference static stability sigma(p) = -(R_d Tbar / (p thetabar)) dthetabar/dp (m2 s-2 Pa-2).

    Tbar and thetabar are the area means of ``temperature`` (dims ..., pressure, latitude,
    longitude; any leading dimensions are averaged too). Holton & Hakim (5th ed., ch. 6).
    Raises DomainError where sigma <= 0 (a statically unstable or neutral reference), naming
    the levels.
    """
    t = temperature
    for d in [d for d in t.dims if d not in ("pressure", "latitude", "longitude")]:
        t = t.mean(d)
    tbar = area_mean(t)
    p = tbar["pressure"]
    thbar = tbar / exner(p)
    pv_ = p.values.astype(float)
    dth = np.gradient(thbar.values.astype(float), np.log(pv_), edge_order=2) / pv_  # in ln p
    sigma = -(RD * tbar.values / (p.values * thbar.values)) * dth
    bad = ~(sigma > 0)
    if np.any(bad):
        lev = ", ".join(f"{x / 100:g}" for x in p.values[bad])
        raise DomainError(
            f"The reference static stability sigma(p) is not positive at {lev} hPa: the area-mean "
            "reference state is not stably stratified there, so QG inversion is undefined. Choose "
            "another reference (e.g. the time mean or a climatology) or drop those levels.")
    out = xr.DataArray(sigma, dims="pressure", coords={"pressure": p}, name="static_stability",
                       attrs=dict(long_name="reference static stability sigma", units="m2 s-2 Pa-2"))
    return out


def check_qg_domain(latitude) -> None:
    """QG with constant f0 needs a domain off the equator (one hemisphere)."""
    lat = np.asarray(latitude, dtype=float)
    if lat.min() <= 0.0 <= lat.max():
        raise DomainError(
            f"The domain spans {lat.min():g}..{lat.max():g} degrees latitude and reaches the equator; "
            "QG inversion with a constant f0 needs a domain in one hemisphere away from the equator. "
            "Crop the case (e.g. ds.sel(latitude=slice(15, 80))).")


def qg_pv(geopotential: xr.DataArray, temperature: xr.DataArray, sigma: xr.DataArray, f0: float,
          *, include_f: bool = True, bottom_theta=None) -> xr.DataArray:
    """QG PV q = f + (1/f0) lap(Phi) + d/dp[(f0/sigma) dPhi/dp] (s-1), Holton & Hakim ch. 6.

    Discretised with the inversion's own operator (DEVELOPERS.md, "QG discretisation"): the
    bottom and top half cells take their outer flux from the hydrostatic relation
    dPhi/dp = -(R_d/p) Pi theta with theta from ``temperature`` at those levels. With anomalies
    (Phi', T') and ``include_f=False`` this is exactly the right-hand side whose inversion returns
    Phi'. Lateral boundary nodes are NaN. ``bottom_theta`` (K, dims latitude, longitude and any
    leading dims) replaces the lowest level's theta in the bottom flux (the Case passes the
    theta of the lowest level above the ground, see "Terrain and missing values").
    """
    from .inversion.operator import QGGrid, apply_qg_operator

    check_qg_domain(geopotential["latitude"].values)
    grid = QGGrid(geopotential["latitude"].values, geopotential["longitude"].values,
                  geopotential["pressure"].values, np.asarray(sigma.values, dtype=float), float(f0))
    theta = potential_temperature(temperature)
    th = np.asarray(theta.values, dtype=float)
    phi = np.asarray(geopotential.values, dtype=float)
    bt = th[..., 0, :, :] if bottom_theta is None else np.asarray(bottom_theta, dtype=float)
    q = apply_qg_operator(grid, phi, bottom_theta=bt, top_theta=th[..., -1, :, :])
    if include_f:
        q = q + coriolis(geopotential["latitude"].values)[:, None]
    out = geopotential.copy(data=q)
    out.attrs = dict(long_name="quasi-geostrophic potential vorticity" + ("" if include_f else " anomaly"),
                     units="s-1", f0=float(f0))
    return out.rename("qgpv" if include_f else "qgpv_anomaly")


# --- terrain and missing values ----------------------------------------------------------
#
# One rule, used by the Case for every time it loads (DEVELOPERS.md, "Terrain and missing
# values"):
#
# * below ground: a point whose core value (temperature, geopotential, u or v) is missing
#   there and at every level beneath it in its column (GRIB bitmaps, CF _FillValue), or whose
#   pressure exceeds the surface pressure when ``surface_pressure`` is present. A column with
#   no valid level at all is a gap, not terrain.
# * scattered gaps: missing points above the ground that form clusters of at most
#   MAX_GAP_POINTS points on one level (4-connected: points sharing an edge) are filled from valid neighbours on the
#   same level: the mean of the linear interpolants along longitude and along latitude
#   (xarray ``interpolate_na``, runs of at most MAX_GAP_RUN points), where neither exists the
#   nearest valid value (``scipy.ndimage.distance_transform_edt``). Larger gaps stay missing.
# * below-ground values are extrapolated from the lowest level above ground: temperature with
#   the standard-atmosphere lapse rate, geopotential by the hypsometric equation with that
#   temperature profile (closed form for a constant lapse rate), every other variable
#   (winds, humidity) held at its lowest above-ground value.

#: Standard-atmosphere lapse rate (K m-1): ICAO Standard Atmosphere / U.S. Standard Atmosphere 1976.
LAPSE_RATE = 0.0065
#: Largest cluster of scattered missing points (on one level, 4-connected) that is filled.
MAX_GAP_POINTS = 9
#: Longest run along longitude or latitude bridged by linear interpolation when filling.
MAX_GAP_RUN = 3
#: Variables whose missing values define the ground.
CORE_VARIABLES = ("temperature", "geopotential", "u", "v")


def _pressure_axis(da):
    return da.get_axis_num("pressure")


def below_ground(ds: xr.Dataset) -> xr.DataArray:
    """Boolean mask of points below the ground (dims of ``temperature``), by the terrain rule.

    True where a core variable (temperature, geopotential, u, v) is missing at that level and
    at every level beneath it, or where the level's pressure exceeds ``surface_pressure``
    (Pa) when the dataset has it. Columns with no valid level are not counted as terrain.
    """
    ref = ds["temperature"]
    ax = _pressure_axis(ref)
    missing = np.zeros(ref.shape, dtype=bool)
    for name in CORE_VARIABLES:
        if name in ds:
            missing |= ~np.isfinite(np.asarray(ds[name].transpose(*ref.dims).values, dtype=float))
    from_bottom = np.cumprod(missing, axis=ax).astype(bool)
    column_empty = missing.all(axis=ax, keepdims=True)
    mask = from_bottom & ~column_empty
    if "surface_pressure" in ds:
        ps = ds["surface_pressure"]
        if "time" in ps.dims and "time" not in ref.dims:
            raise GridError("surface_pressure has a time dimension but the fields do not; select one time.")
        p = ref["pressure"]
        mask |= np.asarray((p > ps).broadcast_like(ref).transpose(*ref.dims).values, dtype=bool)
    return xr.DataArray(mask, dims=ref.dims, coords={d: ref[d] for d in ref.dims if d in ref.coords},
                        name="below_ground", attrs=dict(long_name="below the ground (terrain rule)"))


def standard_lapse_extrapolation(t0, phi0, p0, p):
    """Temperature (K) and geopotential (m2 s-2) at pressure ``p`` below a level (p0, t0, phi0).

    Constant lapse rate LAPSE_RATE (ICAO / U.S. Standard Atmosphere 1976) with the hypsometric
    equation in closed form: T = T0 (p/p0)^(R_d G/g), Phi = Phi0 + (g T0/G)(1 - (p/p0)^(R_d G/g)).
    """
    ratio = (np.asarray(p, dtype=float) / np.asarray(p0, dtype=float)) ** (RD * LAPSE_RATE / G)
    t = np.asarray(t0, dtype=float) * ratio
    phi = np.asarray(phi0, dtype=float) + G * np.asarray(t0, dtype=float) / LAPSE_RATE * (1.0 - ratio)
    return t, phi


def _fill_small_gaps(da: xr.DataArray, hole: np.ndarray, valid: np.ndarray):
    """Fill ``hole`` points of ``da`` (small gaps) from ``valid`` neighbours on the same level.

    Returns the filled numpy array. Mean of the linear interpolants along longitude and
    latitude (runs up to MAX_GAP_RUN points), else the nearest valid point on the level."""
    from scipy import ndimage

    vals = np.asarray(da.values, dtype=float)
    work = da.copy(data=np.where(valid, vals, np.nan))
    ests = []
    for dim in ("longitude", "latitude"):
        est = work.interpolate_na(dim, method="linear", use_coordinate=False).values
        # runs of missing points along ``dim`` longer than MAX_GAP_RUN are not bridged
        line = np.zeros((3,) * vals.ndim, dtype=bool)
        centre = [1] * vals.ndim
        centre[da.get_axis_num(dim)] = slice(None)
        line[tuple(centre)] = True
        runs, _ = ndimage.label(~valid, structure=line)
        run_len = np.bincount(runs.ravel())
        run_len[0] = 0
        short = run_len[runs] <= MAX_GAP_RUN
        ests.append(np.where(hole & short, est, np.nan))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", category=RuntimeWarning)
        est = np.nanmean(np.stack(ests), axis=0)
    out = np.where(hole, est, vals)
    left = hole & ~np.isfinite(out)
    if left.any():
        flat_v = np.where(valid, vals, np.nan).reshape((-1,) + vals.shape[-2:])
        flat_o = out.reshape(flat_v.shape)
        flat_l = left.reshape(flat_v.shape)
        for n in np.nonzero(flat_l.any(axis=(1, 2)))[0]:
            good = np.isfinite(flat_v[n])
            if not good.any():
                continue
            _, (jj, ii) = ndimage.distance_transform_edt(~good, return_indices=True)
            flat_o[n][flat_l[n]] = flat_v[n][jj[flat_l[n]], ii[flat_l[n]]]
        out = flat_o.reshape(vals.shape)
    return out


def complete_fields(ds: xr.Dataset):
    """Apply the terrain and missing-value rule to one time (dims (..., pressure, lat, lon)).

    Returns ``(complete, info)``: the Dataset with scattered gaps filled and below-ground values
    extrapolated (float64), and a dict with ``below_ground`` and ``filled`` (boolean DataArrays
    like ``temperature``; ``filled`` is True where any variable was filled horizontally),
    ``gaps`` (boolean: still missing, in gaps larger than MAX_GAP_POINTS), and the counts
    ``n_below_ground``, ``n_filled``, ``n_gap_points``, ``largest_gap``.
    """
    from scipy import ndimage

    ref = ds["temperature"]
    dims = ref.dims
    ax = _pressure_axis(ref)
    mask = below_ground(ds)
    bg = mask.values
    out = ds.copy()
    filled_any = np.zeros(ref.shape, dtype=bool)
    gaps_any = np.zeros(ref.shape, dtype=bool)
    largest = 0
    # 4-connected (edge neighbours) on each level only (no connection across levels or leading dims)
    structure = np.zeros((3,) * ref.ndim, dtype=bool)
    structure[(1,) * (ref.ndim - 2)] = ndimage.generate_binary_structure(2, 1)
    fields3d = [n for n in ds.data_vars if "pressure" in ds[n].dims and ds[n].ndim == ref.ndim]
    for name in fields3d:
        da = ds[name].transpose(*dims).astype("float64")
        vals = np.asarray(da.values)
        nan = ~np.isfinite(vals) & ~bg
        if not nan.any():
            out[name] = da
            continue
        labels, n = ndimage.label(nan, structure=structure)
        sizes = np.bincount(labels.ravel())
        sizes[0] = 0
        small = (sizes <= MAX_GAP_POINTS)[labels] & nan
        big = nan & ~small
        if big.any():
            largest = max(largest, int(sizes.max()))
        valid = np.isfinite(vals) & ~bg
        if small.any():
            vals = _fill_small_gaps(da, small, valid)
        filled_any |= small
        gaps_any |= big
        out[name] = da.copy(data=vals)
    # below ground: extrapolate from the lowest level above ground (index k0 in each column)
    if bg.any():
        nz = ref.shape[ax]
        k0 = bg.sum(axis=ax, keepdims=True)
        has_anchor = k0 < nz
        k0c = np.minimum(k0, nz - 1)
        shape = [1] * ref.ndim
        shape[ax] = nz
        p = ref["pressure"].values.astype(float).reshape(shape)
        p_anchor = np.take_along_axis(np.broadcast_to(p, ref.shape), k0c, axis=ax)
        replace = bg & np.broadcast_to(has_anchor, ref.shape)
        t = np.asarray(out["temperature"].values, dtype=float)
        t_anchor = np.take_along_axis(t, k0c, axis=ax)
        if "geopotential" in out:
            phi = np.asarray(out["geopotential"].values, dtype=float)
            phi_anchor = np.take_along_axis(phi, k0c, axis=ax)
        else:
            phi_anchor = np.zeros_like(t_anchor)
        t_ext, phi_ext = standard_lapse_extrapolation(t_anchor, phi_anchor, p_anchor, p)
        for name in fields3d:
            vals = np.asarray(out[name].transpose(*dims).values, dtype=float)
            if name == "temperature":
                new = t_ext
            elif name == "geopotential":
                new = phi_ext
            else:
                new = np.take_along_axis(vals, k0c, axis=ax)
            vals = np.where(replace, np.broadcast_to(new, vals.shape), np.where(bg & ~replace, np.nan, vals))
            out[name] = out[name].transpose(*dims).copy(data=vals)
    filled = xr.DataArray(filled_any, dims=dims, coords=mask.coords, name="filled",
                          attrs=dict(long_name="scattered missing value filled horizontally"))
    gaps = xr.DataArray(gaps_any, dims=dims, coords=mask.coords, name="gap",
                        attrs=dict(long_name="missing (gap larger than the fill limit)"))
    info = dict(below_ground=mask, filled=filled, gaps=gaps, n_below_ground=int(bg.sum()),
                n_filled=int(filled_any.sum()), n_gap_points=int(gaps_any.sum()), largest_gap=largest)
    return out, info
