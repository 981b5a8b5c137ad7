"""Balanced fields and the xarray entry point invert_qgpv."""
from __future__ import annotations

import warnings

import numpy as np
import pytest
import xarray as xr

from workbench.errors import GridError, UnitsError
from workbench.inversion.fields import balanced_fields, invert_qgpv
from workbench.inversion.operator import QGGrid, apply_qg_operator
from workbench.units import KAPPA, OMEGA, P0, RD

P_LEVELS = np.array([1000, 925, 850, 700, 500, 400, 300, 250, 200, 150, 100.0]) * 100.0
LAT = np.linspace(35.0, 60.0, 26)
LON = np.linspace(-25.0, 25.0, 41)


def coords(p=P_LEVELS, lat=LAT, lon=LON):
    return dict(pressure=("pressure", p, dict(units="Pa")), latitude=lat, longitude=lon)


def sigma_da(p=P_LEVELS):
    return xr.DataArray(2.0e-6 * (p[0] / p) ** 1.5, dims="pressure", coords={"pressure": p},
                        attrs=dict(units="m2 s-2 Pa-2"))


def smooth_q(amplitude=5e-5):
    # invented fixture: an upper-level PV blob
    P, Y, X = np.meshgrid(P_LEVELS, LAT, LON, indexing="ij")
    q = amplitude * np.exp(-(((X - 3) / 9) ** 2) - ((Y - 47) / 6) ** 2 - ((P - 30000.0) / 15000.0) ** 2)
    return xr.DataArray(q, dims=("pressure", "latitude", "longitude"), coords=coords())


def test_balanced_wind_matches_metpy_geostrophic_wind():
    # Reference: MetPy's geostrophic_wind of the same geopotential, with the latitude argument set
    # where f = f0 (constant-f0 balance) and the spherical grid spacings dx = a cos(lat) dlon,
    # dy = a dlat passed explicitly.
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    from workbench.units import EARTH_RADIUS, G

    ds = invert_qgpv(smooth_q(), sigma=sigma_da(), f0=1.0e-4)
    lat0 = np.rad2deg(np.arcsin(1.0e-4 / (2 * OMEGA)))
    la = np.deg2rad(LAT)
    dx = EARTH_RADIUS * np.cos(la)[:, None] * np.diff(np.deg2rad(LON))[None, :]
    dy = EARTH_RADIUS * np.diff(la)[:, None] * np.ones((1, LON.size))
    for k in (2, 6):
        z = ds["geopotential_anomaly"].isel(pressure=k).values / G
        ug, vg = mpcalc.geostrophic_wind(z * units.m, dx * units.m, dy * units.m,
                                         latitude=np.full(z.shape, lat0) * units.degree)
        scale = np.abs(ug.m_as("m/s")).max()
        assert scale > 1.0
        np.testing.assert_allclose(ds["u"].isel(pressure=k).values, ug.m_as("m/s"), atol=1e-9 * scale)
        np.testing.assert_allclose(ds["v"].isel(pressure=k).values, vg.m_as("m/s"), atol=1e-9 * scale)


def test_invert_qgpv_returns_cf_dataset_and_closes():
    # Closure (definition of the inversion): invert_qgpv of L(phi) with phi's boundary data returns
    # phi; f0 defaults to 2 Omega sin(central latitude) (Coriolis parameter, Holton & Hakim ch. 1).
    rng = np.random.default_rng(2)
    q = smooth_q()
    f0 = 2 * OMEGA * np.sin(np.deg2rad(0.5 * (LAT[0] + LAT[-1])))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        g = QGGrid(LAT, LON, P_LEVELS, sigma_da().values, f0)
    phi = np.asarray(invert_qgpv(q, sigma=sigma_da())["geopotential_anomaly"])
    phi = phi + 50.0 * rng.standard_normal(phi.shape)
    bt = rng.standard_normal((LAT.size, LON.size))
    qq = apply_qg_operator(g, phi, bottom_theta=bt)
    qda = xr.DataArray(qq, dims=q.dims, coords=q.coords)
    btda = xr.DataArray(bt, dims=("latitude", "longitude"), coords=dict(latitude=LAT, longitude=LON))
    lat_da = xr.DataArray(phi, dims=q.dims, coords=q.coords)
    ds = invert_qgpv(qda, sigma=sigma_da(), bottom_theta=btda, lateral_geopotential=lat_da)
    assert ds.attrs["f0"] == pytest.approx(f0, rel=1e-12)
    np.testing.assert_allclose(ds["geopotential_anomaly"].values, phi, atol=1e-9 * np.abs(phi).max())
    for name, units in dict(geopotential_anomaly="m2 s-2", height_anomaly="m", u="m s-1", v="m s-1",
                            relative_vorticity="s-1", temperature_anomaly="K", theta_anomaly="K").items():
        assert ds[name].attrs["units"] == units and ds[name].dims == ("pressure", "latitude", "longitude")
        assert "long_name" in ds[name].attrs
    assert ds["u"].attrs["standard_name"] == "geostrophic_eastward_wind"
    # the lowest level's theta anomaly is the imposed boundary theta'
    np.testing.assert_allclose(ds["theta_anomaly"].isel(pressure=0).values, bt, rtol=1e-12)


def _ussa(p):
    # U.S. Standard Atmosphere 1976 below 20 km (NOAA/NASA/USAF): T0 = 288.15 K, p0 = 1013.25 hPa,
    # 6.5 K/km to 11 km (226.32 hPa), then isothermal at 216.65 K. Returns T (K) and phi (m2 s-2).
    from workbench.units import G

    t = 288.15 * (p / 101325.0) ** (RD * 0.0065 / G)
    z = (288.15 - t) / 0.0065
    zs = 11000.0 + RD * 216.65 / G * np.log(22632.0 / p)
    trop = p >= 22632.0
    return np.where(trop, t, 216.65), G * np.where(trop, z, zs)


def test_balanced_temperature_is_hydrostatic():
    # Hydrostatic relation T = -(p/R_d) dphi/dp (Holton & Hakim ch. 1), applied to the U.S. Standard
    # Atmosphere 1976 geopotential on the (non-uniform) levels: the temperature comes back within
    # 1 % in the troposphere (second-order differences in ln p) and exactly (1e-9) in the
    # isothermal layer where phi is linear in ln p. theta = T / Pi.
    p = np.array([1000, 925, 850, 700, 500, 400, 300, 250, 200, 150, 100, 70.0]) * 100.0
    t_ref, phi1 = _ussa(p)
    phi = np.broadcast_to(phi1[:, None, None], (p.size, LAT.size, LON.size))
    da = xr.DataArray(phi, dims=("pressure", "latitude", "longitude"), coords=coords(p=p))
    ds = balanced_fields(da, 1e-4)
    t = ds["temperature_anomaly"].values[:, 3, 4]
    trop = p > 25000.0
    np.testing.assert_allclose(t[trop], t_ref[trop], rtol=1e-2)
    strat = p < 20000.0
    np.testing.assert_allclose(t[strat], t_ref[strat], rtol=1e-9)
    np.testing.assert_allclose(ds["theta_anomaly"].values,
                               ds["temperature_anomaly"].values / (p / P0)[:, None, None] ** KAPPA)
    np.testing.assert_allclose(ds["u"].values, 0.0, atol=1e-9)  # round-off of phi ~ 2e5
    # relative vorticity: lap(phi)/f0 = 0 for a horizontally uniform phi; NaN on the lateral boundary
    assert np.isnan(ds["relative_vorticity"].values[:, 0]).all()
    np.testing.assert_allclose(ds["relative_vorticity"].values[:, 1:-1, 1:-1], 0.0, atol=1e-12)


def test_leading_dims_and_errors():
    q = smooth_q()
    q2 = xr.concat([q, 2 * q], dim="time").transpose("pressure", "time", "latitude", "longitude")
    ds = invert_qgpv(q2, sigma=sigma_da(), f0=1e-4)
    assert ds["u"].dims == ("time", "pressure", "latitude", "longitude")
    np.testing.assert_allclose(ds["u"].isel(time=1).values, 2 * ds["u"].isel(time=0).values, rtol=1e-10,
                               atol=1e-12)
    with pytest.raises(GridError, match="missing dimension"):
        invert_qgpv(q.isel(pressure=0), sigma=sigma_da())
    hpa = q.assign_coords(pressure=("pressure", P_LEVELS / 100.0, dict(units="hPa")))
    with pytest.raises(UnitsError, match="hPa"):
        invert_qgpv(hpa, sigma=sigma_da())
    with pytest.raises(GridError, match="sigma"):
        invert_qgpv(q, sigma=np.ones(3))
