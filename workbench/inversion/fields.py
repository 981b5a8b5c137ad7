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

import weakref

import numpy as np
import xarray as xr
from xarray.backends import BackendArray
from xarray.core import indexing

from workbench.errors import GridError, UnitsError
from workbench.inversion.operator import QGGrid, horizontal_laplacian
from workbench.inversion.solver import get_solver
from workbench.units import EARTH_RADIUS, G, KAPPA, P0, RD, coriolis

__all__ = ["balanced_fields", "BalancedSource", "balanced_source", "invert_qgpv", "grid_for", "spatial_dims", "central_f0", "hydrostatic_temperature"]

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


class BalancedSource:
    """phi' (..., nz, ny, nx, float64) and what its balanced fields need: computes any of them on
    a range of levels in one pass (the fields of one piece share the phi' they come from).

    The lazily computed Dataset variables of :func:`balanced_fields` and the point look-ups of
    :func:`workbench.inversion.pieces.attribution` go through :meth:`levels`, so a map level or a
    target costs a few levels of work, not whole 3-D fields, and the results keep only phi'.
    """

    def __init__(self, data, lat, lon, p, f0, grid, bottom_theta=None, top_theta=None):
        self.data = data
        self.shape = data.shape
        self.lat, self.lon, self.p = lat, lon, p
        self.f0 = float(f0)
        self.grid = grid
        self.rlat, self.rlon = np.deg2rad(lat), np.deg2rad(lon)
        self.pi = (p / P0) ** KAPPA
        flat = self.shape[:-3] + self.shape[-2:]
        self.bottom_theta = None if bottom_theta is None else np.broadcast_to(
            np.asarray(bottom_theta, dtype=float), flat)
        self.top_theta = None if top_theta is None else np.broadcast_to(np.asarray(top_theta, dtype=float), flat)

    @property
    def nbytes(self):
        return int(self.data.nbytes)

    def levels(self, names, k0, k1, lead=()):
        """dict name -> array (lead..., k1-k0, ny, nx) of the fields ``names`` on levels k0..k1-1,
        for the leading index ``lead`` (a tuple of ints/slices over the leading dims)."""
        nz = self.shape[-3]
        lead = tuple(lead)
        d = self.data[lead + (slice(k0, k1),)]
        out = {}
        a = EARTH_RADIUS
        f0 = self.f0
        for name in names:
            if name == "geopotential_anomaly":
                out[name] = d
            elif name == "height_anomaly":
                out[name] = d / G
            elif name == "u":
                out[name] = -_deriv(d, self.rlat, -2) / (f0 * a)
            elif name == "v":
                out[name] = _deriv(d, self.rlon, -1, periodic=self.grid.periodic) / (
                    f0 * a * np.cos(self.rlat)[:, None])
            elif name == "relative_vorticity":
                out[name] = horizontal_laplacian(self.grid, d) / f0
            elif name in ("temperature_anomaly", "theta_anomaly"):
                if "temperature_anomaly" not in out:
                    out["temperature_anomaly"] = self._temperature(k0, k1, lead, nz)
                if name == "theta_anomaly":
                    out[name] = out["temperature_anomaly"] / self.pi[k0:k1, None, None]
            else:
                raise KeyError(name)
        return {n: out[n] for n in names}

    def _temperature(self, k0, k1, lead, nz):
        # the ln p derivative on a halo of levels: np.gradient gives the same value at a level
        # from its neighbours whether the array holds all levels or a few around it
        lo, hi = max(0, k0 - 1), min(nz, k1 + 1)
        while hi - lo < min(3, nz):
            lo, hi = max(0, lo - 1), min(nz, hi + 1)
        temp = hydrostatic_temperature(self.data[lead + (slice(lo, hi),)], self.p[lo:hi])[..., k0 - lo:k1 - lo, :, :]
        if self.bottom_theta is not None and k0 == 0:
            temp[..., 0, :, :] = self.pi[0] * self.bottom_theta[lead]
        if self.top_theta is not None and k1 == nz:
            temp[..., -1, :, :] = self.pi[-1] * self.top_theta[lead]
        return temp


class _LazyField(BackendArray):
    """One balanced field of a :class:`BalancedSource`, computed for the levels asked for."""

    def __init__(self, source: BalancedSource, name: str):
        self.source = source
        self.name = name
        self.shape = source.shape
        self.dtype = np.dtype("float64")

    def __getitem__(self, key):
        return indexing.explicit_indexing_adapter(key, self.shape, indexing.IndexingSupport.BASIC, self._get)

    def _get(self, key):
        key = tuple(key) + (slice(None),) * (len(self.shape) - len(key))
        lead, kp, rest = key[:-3], key[-3], key[-2:]
        nz = self.shape[-3]
        if isinstance(kp, (int, np.integer)):
            k = int(kp) % nz
            vals = self.source.levels([self.name], k, k + 1, lead)[self.name]
            return vals[(Ellipsis, 0) + rest]
        idx = np.arange(nz)[kp]
        if idx.size == 0:
            vals = self.source.levels([self.name], 0, 1, lead)[self.name][..., :0, :, :]
            return vals[(Ellipsis, slice(None)) + rest]
        k0, k1 = int(idx.min()), int(idx.max()) + 1
        vals = self.source.levels([self.name], k0, k1, lead)[self.name]
        return vals[(Ellipsis, idx - k0) + rest]


FIELD_NAMES = ("geopotential_anomaly", "height_anomaly", "u", "v", "relative_vorticity",
               "temperature_anomaly", "theta_anomaly")


def balanced_fields(phi: xr.DataArray, f0, bottom_theta=None, top_theta=None, grid: QGGrid | None = None,
                    lazy: bool = True):
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
    lazy : bool
        True (default): only phi' is held; every other variable is computed from it when read,
        for the levels read (``ds["u"].isel(pressure=k)`` works on one level, ``.values`` on
        all), through :class:`BalancedSource`. Memory: one field instead of seven. False: all
        fields computed now (in memory).

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
    source = BalancedSource(data, lat, lon, p, f0, grid, bottom_theta, top_theta)
    if lazy:
        values = {k: (data if k == "geopotential_anomaly" else indexing.LazilyIndexedArray(_LazyField(source, k)))
                  for k in FIELD_NAMES}
    else:
        values = source.levels(FIELD_NAMES, 0, p.size)
    ds = xr.Dataset(
        {k: (phi.dims, val, dict(_ATTRS[k])) for k, val in values.items()},
        coords=phi.coords,
    )
    ds.attrs.update(
        f0=f0,
        balance="quasi-geostrophic, constant f0, spherical metric",
        caution="Diagnostic analysis of model or analysis data, not a forecast or warning.",
    )
    _SOURCES[id(ds)] = source
    return ds


#: the BalancedSource behind each Dataset made by balanced_fields (weakly: gone with the Dataset)
_SOURCES: "weakref.WeakValueDictionary[int, BalancedSource]" = weakref.WeakValueDictionary()


def balanced_source(ds) -> BalancedSource | None:
    """The :class:`BalancedSource` of a Dataset returned by :func:`balanced_fields` (None for any
    other Dataset, e.g. one made by arithmetic on results)."""
    src = _SOURCES.get(id(ds))
    if src is None or ds.get("geopotential_anomaly") is None:
        return None
    var = ds["geopotential_anomaly"].variable
    try:
        same = var._data is src.data  # the very Dataset balanced_fields made (not a copy or a slice)
    except AttributeError:
        same = False
    return src if same and var.shape == src.shape else None


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
