"""Balanced fields from a geopotential anomaly, and the xarray entry point of the inversion.

* :func:`balanced_fields` -- geopotential and height anomaly, balanced wind
  (u, v), relative vorticity, temperature and theta anomaly from phi' with the
  spherical metric and a constant f0;
* :func:`invert_qgpv` -- invert a QG PV anomaly (xarray) with the fast solver
  and return :func:`balanced_fields` of the result;
* :func:`grid_for` -- the :class:`~workbench.inversion.operator.QGGrid` of a
  DataArray on the normalised grid (shared with pieces and omega).

Relations (Holton & Hakim, *An Introduction to Dynamic Meteorology*, ch. 6):
``u = -(1/f0) a^-1 dphi/dlat``, ``v = (1/f0) (a cos lat)^-1 dphi/dlon``,
``zeta = lap(phi)/f0`` (the operator's own discrete Laplacian),
``T' = -(p/R_d) dphi/dp`` (hydrostatic), ``theta' = T'/Pi``, ``Z' = phi/g``.
Horizontal derivatives are second-order centred differences (``numpy.gradient``
with ``edge_order=2`` on the coordinate values; wrap-around in longitude on a
periodic grid); the vertical derivative is taken in ln p the same way.
"""
from __future__ import annotations

import numpy as np
import xarray as xr

from workbench.errors import GridError, UnitsError
from workbench.inversion.operator import QGGrid, horizontal_laplacian
from workbench.inversion.solver import get_solver
from workbench.units import EARTH_RADIUS, G, KAPPA, P0, RD, coriolis

__all__ = ["balanced_fields", "invert_qgpv", "grid_for", "spatial_dims", "central_f0", "hydrostatic_temperature"]

DIMS = ("pressure", "latitude", "longitude")

_ATTRS = {
    "geopotential_anomaly": dict(long_name="balanced geopotential anomaly", units="m2 s-2"),
    "height_anomaly": dict(
        standard_name="geopotential_height_anomaly", long_name="balanced geopotential height anomaly", units="m"
    ),
    "u": dict(standard_name="geostrophic_eastward_wind", long_name="balanced eastward wind", units="m s-1"),
    "v": dict(standard_name="geostrophic_northward_wind", long_name="balanced northward wind", units="m s-1"),
    "relative_vorticity": dict(
        standard_name="atmosphere_relative_vorticity", long_name="balanced relative vorticity", units="s-1"
    ),
    "temperature_anomaly": dict(
        standard_name="air_temperature_anomaly", long_name="balanced temperature anomaly", units="K"
    ),
    "theta_anomaly": dict(long_name="balanced potential temperature anomaly", units="K"),
}


def central_f0(latitude) -> float:
    """Coriolis parameter (s-1) at the domain's central latitude (mid-point of its extremes)."""
    lat = np.asarray(latitude, dtype=float)
    return float(coriolis(0.5 * (lat.min() + lat.max())))


def spatial_dims(da, name="field"):
    """Check that ``da`` has dims pressure, latitude, longitude (last, in that order after transpose)."""
    missing = [d for d in DIMS if d not in da.dims]
    if missing:
        raise GridError(
            f"{name}: missing dimension(s) {', '.join(missing)} (has {', '.join(map(str, da.dims))}); "
            "the inversion needs dims (..., pressure, latitude, longitude) as read by workbench.io."
        )
    p = np.asarray(da["pressure"].values, dtype=float)
    units = str(da["pressure"].attrs.get("units", "Pa")).strip()
    if units.lower() in ("hpa", "mbar", "mb", "millibar") or (units == "Pa" and p.max() < 2000.0):
        raise UnitsError(
            f"{name}: the pressure coordinate looks like hPa (units {units!r}, maximum {p.max():g}); "
            "the inversion expects Pa: multiply by 100 and set units='Pa'."
        )
    lead = [d for d in da.dims if d not in DIMS]
    return da.transpose(*lead, *DIMS)


def _sigma_values(sigma, pressure):
    if isinstance(sigma, xr.DataArray):
        if "pressure" not in sigma.dims or sigma.ndim != 1:
            raise GridError(
                "sigma: give the static stability as a 1-D DataArray over 'pressure' "
                "(e.g. case.sigma() or workbench.physics.static_stability)."
            )
        sp_ = np.asarray(sigma["pressure"].values, dtype=float)
        if sp_.shape != pressure.shape or not np.allclose(sp_, pressure, rtol=1e-9, atol=1e-6):
            try:
                sigma = sigma.sel(pressure=pressure, method="nearest", tolerance=1e-3)
            except KeyError:
                raise GridError(
                    "sigma: its pressure levels do not include all levels of the field; "
                    "compute sigma on the same levels."
                ) from None
        return np.asarray(sigma.values, dtype=float)
    arr = np.asarray(sigma, dtype=float).ravel()
    if arr.shape != pressure.shape:
        raise GridError(f"sigma: has {arr.size} values for {pressure.size} pressure levels; give one per level.")
    return arr


def grid_for(da, sigma, f0=None) -> QGGrid:
    """QGGrid of a DataArray with dims (..., pressure, latitude, longitude); f0 default: central latitude."""
    p = np.asarray(da["pressure"].values, dtype=float)
    lat = np.asarray(da["latitude"].values, dtype=float)
    if f0 is None:
        f0 = central_f0(lat)
    return QGGrid(lat, np.asarray(da["longitude"].values, dtype=float), p, _sigma_values(sigma, p), float(f0))


def _deriv(a, x, axis, periodic=False):
    """Second-order derivative along ``axis``; on a periodic axis a wrap-around centred difference."""
    if periodic:
        dx = x[1] - x[0]
        return (np.roll(a, -1, axis=axis) - np.roll(a, 1, axis=axis)) / (2.0 * dx)
    return np.gradient(a, x, axis=axis, edge_order=2)


def hydrostatic_temperature(phi, pressure):
    """T = -(p/R_d) dphi/dp = -(1/R_d) dphi/d(ln p) along axis -3.

    Differentiated in ln p (second-order, non-uniform, second-order edges), which is exact
    for an isothermal layer (phi linear in ln p) and accurate for real profiles.
    """
    return -np.gradient(np.asarray(phi, dtype=float), np.log(pressure), axis=-3, edge_order=2) / RD


def balanced_fields(phi: xr.DataArray, f0, bottom_theta=None, top_theta=None, grid: QGGrid | None = None):
    """Balanced fields of a geopotential anomaly phi' (m2 s-2).

    Parameters
    ----------
    phi : DataArray (..., pressure, latitude, longitude)
    f0 : float
        Constant Coriolis parameter (s-1) of the inversion.
    bottom_theta, top_theta : array-like (..., latitude, longitude), optional
        The boundary theta' (K) the inversion used.  When given, the
        temperature and theta anomaly on the lowest/highest level are these
        values (the discrete solution has exactly that outer-face gradient);
        otherwise one-sided second-order differences are used there.
    grid : QGGrid, optional
        Reused for the Laplacian (otherwise built with a unit sigma, which the
        Laplacian does not use).

    Returns
    -------
    Dataset with ``geopotential_anomaly``, ``height_anomaly`` (phi'/g),
    ``u``, ``v`` (m s-1), ``relative_vorticity`` (s-1, NaN on the lateral
    boundary), ``temperature_anomaly`` and ``theta_anomaly`` (K); attrs
    ``f0``.
    """
    phi = spatial_dims(phi, "phi")
    f0 = float(f0)
    data = np.asarray(phi.values, dtype=np.float64)
    lat = np.asarray(phi["latitude"].values, dtype=float)
    lon = np.asarray(phi["longitude"].values, dtype=float)
    p = np.asarray(phi["pressure"].values, dtype=float)
    if grid is None:
        grid = QGGrid(lat, lon, p, np.ones(p.size), f0)
    rlat, rlon = np.deg2rad(lat), np.deg2rad(lon)
    a = EARTH_RADIUS
    dphi_dlat = _deriv(data, rlat, -2)
    dphi_dlon = _deriv(data, rlon, -1, periodic=grid.periodic)
    u = -dphi_dlat / (f0 * a)
    v = dphi_dlon / (f0 * a * np.cos(rlat)[:, None])
    zeta = horizontal_laplacian(grid, data) / f0
    temp = hydrostatic_temperature(data, p)
    pi = (p / P0) ** KAPPA
    if bottom_theta is not None:
        temp[..., 0, :, :] = pi[0] * np.asarray(bottom_theta, dtype=float)
    if top_theta is not None:
        temp[..., -1, :, :] = pi[-1] * np.asarray(top_theta, dtype=float)
    theta = temp / pi[:, None, None]
    values = dict(
        geopotential_anomaly=data,
        height_anomaly=data / G,
        u=u,
        v=v,
        relative_vorticity=zeta,
        temperature_anomaly=temp,
        theta_anomaly=theta,
    )
    ds = xr.Dataset(
        {k: (phi.dims, val, dict(_ATTRS[k])) for k, val in values.items()},
        coords=phi.coords,
    )
    ds.attrs.update(
        f0=f0,
        balance="quasi-geostrophic, constant f0, spherical metric",
        caution="Diagnostic analysis of model or analysis data, not a forecast or warning.",
    )
    return ds


def invert_qgpv(
    qgpv_anomaly: xr.DataArray,
    *,
    sigma,
    f0=None,
    bottom_theta=None,
    top_theta=None,
    lateral_geopotential=None,
) -> xr.Dataset:
    """Invert a QG PV anomaly for the balanced flow.

    Parameters
    ----------
    qgpv_anomaly : DataArray (..., pressure, latitude, longitude)
        q' (s-1); NaN allowed on the lateral boundary nodes only.
        Leading dims (time, member) are inverted together.
    sigma : DataArray over pressure (or array, one value per level)
        Reference static stability (m2 s-2 Pa-2), > 0.
    f0 : float, optional
        Default: Coriolis parameter at the domain's central latitude.
    bottom_theta, top_theta : DataArray (..., latitude, longitude), optional
        theta' (K) on the lowest / highest level (boundary PV sheets); None = 0.
    lateral_geopotential : DataArray like qgpv_anomaly, optional
        phi' (m2 s-2) whose lateral-boundary values are the Dirichlet data;
        None = 0.

    Returns
    -------
    Dataset of :func:`balanced_fields` on the same grid, attrs ``f0`` and
    ``method``.
    """
    if not isinstance(qgpv_anomaly, xr.DataArray):
        raise TypeError("qgpv_anomaly: expected an xarray.DataArray with dims (..., pressure, latitude, longitude).")
    q = spatial_dims(qgpv_anomaly, "qgpv_anomaly")
    grid = grid_for(q, sigma, f0)
    solver = get_solver(grid)

    def values(obj, name, dims):
        if obj is None:
            return None
        if isinstance(obj, xr.DataArray):
            lead = [d for d in obj.dims if d not in dims]
            missing = [d for d in dims if d not in obj.dims]
            if missing:
                raise GridError(f"{name}: missing dimension(s) {', '.join(missing)}; give it on the field's grid.")
            obj = obj.transpose(*lead, *dims)
            for d in dims:
                if obj.sizes[d] != q.sizes[d] or not np.allclose(obj[d].values, q[d].values):
                    raise GridError(f"{name}: its {d} coordinate differs from qgpv_anomaly's; put it on the same grid.")
            obj = obj.values
        return np.asarray(obj, dtype=float)

    bt = values(bottom_theta, "bottom_theta", DIMS[1:])
    tt = values(top_theta, "top_theta", DIMS[1:])
    lat_phi = values(lateral_geopotential, "lateral_geopotential", DIMS)
    phi = solver.solve(q.values, bt, tt, lat_phi)
    phi_da = xr.DataArray(phi, dims=q.dims, coords=q.coords, name="geopotential_anomaly")
    ds = balanced_fields(phi_da, grid.f0, bottom_theta=bt, top_theta=tt, grid=grid)
    ds.attrs["method"] = "QG inversion: vertical eigenmodes x sine/Fourier transform x tridiagonal (direct)"
    return ds
