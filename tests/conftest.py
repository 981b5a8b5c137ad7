"""Shared fixtures: synthetic pressure-level cases built here (fixtures, never check values).

``std_atmosphere_dataset`` builds a resting U.S. Standard Atmosphere 1976 column on pressure
levels; ``wave_dataset`` a smooth, non-trivial baroclinic wave in (near) geostrophic and
hydrostatic balance for cross-checks against reference libraries.
"""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

os.environ.setdefault("MPLBACKEND", "Agg")

from workbench.units import G, OMEGA, RD, EARTH_RADIUS  # noqa: E402

ARTIFACTS = Path(__file__).parent / "artifacts"
ARTIFACTS.mkdir(exist_ok=True)

# U.S. Standard Atmosphere 1976 (NOAA/NASA/USAF), below 20 km: T0 = 288.15 K, p0 = 1013.25 hPa,
# lapse rate 6.5 K/km to 11 km (226.32 hPa), isothermal 216.65 K to 20 km (54.75 hPa).
USSA_T0 = 288.15
USSA_P0 = 101325.0
USSA_LAPSE = 0.0065
USSA_PTROP = 22632.0
USSA_TTROP = 216.65

STANDARD_LEVELS_HPA = np.array([1000, 950, 900, 850, 800, 750, 700, 650, 600, 550, 500, 450, 400, 350,
                                300, 275, 250, 225, 200, 175, 150, 125, 100, 85, 70], dtype=float)


def ussa_temperature_height(p_pa):
    """Temperature (K) and geopotential height (m) of the 1976 standard atmosphere at pressure p."""
    p = np.asarray(p_pa, dtype=float)
    t_trop = USSA_T0 * (p / USSA_P0) ** (RD * USSA_LAPSE / G)
    h_trop = (USSA_T0 - t_trop) / USSA_LAPSE
    h_strat = 11000.0 + RD * USSA_TTROP / G * np.log(USSA_PTROP / p)
    trop = p >= USSA_PTROP
    return np.where(trop, t_trop, USSA_TTROP), np.where(trop, h_trop, h_strat)


def std_atmosphere_dataset(levels_hpa=STANDARD_LEVELS_HPA, lat=np.arange(40.0, 50.01, 1.0),
                           lon=np.arange(-10.0, 10.01, 1.0), ntime=1):
    p = np.asarray(levels_hpa, dtype=float) * 100.0
    t, h = ussa_temperature_height(p)
    shape = (ntime, p.size, lat.size, lon.size)
    tt = np.broadcast_to(t[None, :, None, None], shape).astype("float32")
    zz = np.broadcast_to(h[None, :, None, None] * G, shape).astype("float32")
    zero = np.zeros(shape, dtype="float32")
    times = np.datetime64("2031-01-01T00") + np.arange(ntime) * np.timedelta64(6, "h")
    ds = xr.Dataset(
        dict(t=(("time", "level", "lat", "lon"), tt, dict(units="K", standard_name="air_temperature")),
             u=(("time", "level", "lat", "lon"), zero, dict(units="m s-1", standard_name="eastward_wind")),
             v=(("time", "level", "lat", "lon"), zero.copy(), dict(units="m s-1", standard_name="northward_wind")),
             z=(("time", "level", "lat", "lon"), zz, dict(units="m2 s-2", standard_name="geopotential"))),
        coords=dict(time=times, level=("level", levels_hpa, dict(units="hPa")),
                    lat=("lat", lat, dict(units="degrees_north")), lon=("lon", lon, dict(units="degrees_east"))),
        attrs=dict(title="resting standard atmosphere (test fixture)"))
    return ds


def wave_dataset(levels_hpa=STANDARD_LEVELS_HPA[:-2], lat=np.arange(30.0, 60.01, 1.5),
                 lon=np.arange(-40.0, 40.01, 1.5), ntime=2, amplitude=6.0, rh=True):
    """A baroclinic wave on a standard-atmosphere background: hydrostatic T from the geopotential,
    geostrophic winds (with the latitude-dependent f). A fixture, never a check value."""
    p = np.asarray(levels_hpa, dtype=float) * 100.0
    t0, h0 = ussa_temperature_height(p)
    la, lo = np.meshgrid(np.deg2rad(lat), np.deg2rad(lon), indexing="ij")
    lat0 = np.deg2rad(45.0)
    out_t, out_z = [], []
    for n in range(ntime):
        shift = np.deg2rad(4.0 * n)
        # temperature anomaly: a warm/cold wave tilting westward with height, plus a meridional gradient
        T = np.empty((p.size,) + la.shape)
        for k, pk in enumerate(p):
            weight = np.sin(np.pi * (pk - 10000.0) / 90000.0) if pk > 10000 else 0.0
            tilt = np.deg2rad(10.0) * (1 - pk / 100000.0)
            wave = amplitude * np.exp(-((la - lat0) / np.deg2rad(10)) ** 2) * np.cos(4 * (lo - shift + tilt))
            grad = -8.0 * np.tanh((la - lat0) / np.deg2rad(12.0)) * (pk > USSA_PTROP)
            T[k] = t0[k] + weight * wave + grad
        # geopotential: hypsometric integration from a 1000 hPa surface field
        z = np.empty_like(T)
        z[0] = h0[0] * G + 300.0 * np.cos(3 * (lo - shift)) * np.exp(-((la - lat0) / np.deg2rad(12)) ** 2)
        for k in range(1, p.size):
            tm = 0.5 * (T[k] + T[k - 1])
            z[k] = z[k - 1] + RD * tm * np.log(p[k - 1] / p[k])
        out_t.append(T)
        out_z.append(z)
    T = np.array(out_t)
    Z = np.array(out_z)
    f = 2 * OMEGA * np.sin(la)
    dzdy = np.gradient(Z, np.deg2rad(lat), axis=-2) / EARTH_RADIUS
    dzdx = np.gradient(Z, np.deg2rad(lon), axis=-1) / (EARTH_RADIUS * np.cos(la))
    U = -dzdy / f
    V = dzdx / f
    times = np.datetime64("2031-01-01T00") + np.arange(ntime) * np.timedelta64(6, "h")
    dims = ("time", "level", "lat", "lon")
    data = dict(t=(dims, T.astype("float32"), dict(units="K", standard_name="air_temperature")),
                u=(dims, U.astype("float32"), dict(units="m s-1", standard_name="eastward_wind")),
                v=(dims, V.astype("float32"), dict(units="m s-1", standard_name="northward_wind")),
                z=(dims, Z.astype("float32"), dict(units="m2 s-2", standard_name="geopotential")))
    if rh:
        R = 50 + 40 * np.exp(-((la - lat0) / np.deg2rad(8)) ** 2) * np.cos(4 * lo) ** 2
        data["r"] = (dims, np.broadcast_to(R, T.shape).astype("float32"), dict(units="%"))
    return xr.Dataset(data, coords=dict(time=times, level=("level", levels_hpa, dict(units="hPa")),
                                        lat=("lat", lat, dict(units="degrees_north")),
                                        lon=("lon", lon, dict(units="degrees_east"))),
                      attrs=dict(title="synthetic baroclinic wave (test fixture)"))


@pytest.fixture(scope="session")
def small_case_path(tmp_path_factory):
    """A small netCDF case file (synthetic wave, 2 times) written once per test session."""
    path = tmp_path_factory.mktemp("cases") / "wave_fixture.nc"
    wave_dataset().to_netcdf(path)
    return path


@pytest.fixture
def small_case(small_case_path):
    import workbench as wb

    return wb.open_case(small_case_path)


@pytest.fixture(scope="session")
def sample_case_path():
    """The committed invented sample storm, if present."""
    folder = Path(__file__).resolve().parents[1] / "sample_cases"
    files = sorted(folder.glob("*.nc"))
    if not files:
        pytest.skip("no sample case committed yet")
    return files[0]
