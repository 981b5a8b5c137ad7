"""References for single analyses: a one-time file refuses "time_mean" with a message naming the
choices, defaults to a reference that works (shown in the summary, the CLI and the briefing's
state), and a climatology on another grid (levels, longitude convention) is interpolated or
refused clearly when it does not cover the domain."""
from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

import workbench as wb
from workbench.analysis import analyse
from workbench.errors import GridError, InputError

from conftest import wave_dataset


@pytest.fixture(scope="module")
def one_time_path(tmp_path_factory):
    path = tmp_path_factory.mktemp("single") / "one_time.nc"
    wave_dataset(ntime=1).to_netcdf(path)
    return path


def test_time_mean_refused_with_the_choices(one_time_path):
    case = wb.open_case(one_time_path)
    with pytest.raises(InputError) as err:
        case.anomaly(0, reference="time_mean")
    msg = str(err.value)
    assert "\n" not in msg
    for choice in ("zonal_mean", "area_mean", "climatology"):
        assert choice in msg


def test_default_reference_works_and_is_shown(one_time_path, capsys):
    case = wb.open_case(one_time_path)
    # the fixture domain is 80 degrees wide at 45 N (about 6300 km): the zonal mean
    assert case.width_km > 4000 and case.default_reference == "zonal_mean"
    assert any("zonal mean" in n for n in case.notes)
    assert "zonal mean" in repr(case)
    anom = case.anomaly(0)
    assert anom.attrs["reference"] == "zonal_mean"
    assert float(np.abs(anom["geopotential_anomaly"]).max()) > 10.0  # not all zero
    _, table, _ = analyse(case, 0)
    assert table.attrs["reference"] == "zonal_mean"
    assert np.isfinite(table.loc["full inversion", "height_anomaly"])
    assert abs(table.loc["full inversion", "height_anomaly"]) > 1.0
    from workbench.analysis import main

    main(["invert", str(one_time_path), "--quiet"])
    out = capsys.readouterr().out
    assert "reference zonal mean" in out
    # the state (and so the briefing and the app) starts from the case's default
    from workbench.state import State

    assert State(case).reference == "zonal_mean"


def test_narrow_domain_defaults_to_area_mean():
    ds = wave_dataset(ntime=1, lon=np.arange(-10.0, 10.01, 1.5))
    case = wb.open_case(ds)
    assert case.width_km < 4000 and case.default_reference == "area_mean"
    assert np.isfinite(case.anomaly(0)["qgpv_anomaly"].values[:, 1:-1, 1:-1]).all()


def test_several_times_keep_time_mean(small_case):
    assert small_case.default_reference == "time_mean"
    assert small_case.anomaly(0).attrs["reference"] == "time_mean"


def _climatology(lon, levels_hpa, lat=np.arange(20.0, 70.01, 2.0)):
    """A smooth invented climatology: temperature and geopotential of a resting column varying
    gently with latitude and longitude (a fixture)."""
    base = wave_dataset(levels_hpa=np.asarray(levels_hpa, float), lat=lat, lon=np.asarray(lon, float),
                        ntime=2, amplitude=0.0, rh=False)
    return base


def test_climatology_on_another_grid(one_time_path, tmp_path):
    case = wb.open_case(one_time_path)
    # 0..360 longitudes (the case is -40..40), 2-degree grid, other levels (a superset)
    lon360 = np.arange(0.0, 360.0, 2.0)
    levels = [1000, 925, 850, 700, 600, 500, 400, 300, 250, 200, 150, 100]
    clim = _climatology(lon360, levels)
    path = tmp_path / "clim.nc"
    clim.to_netcdf(path)
    ref = case.reference(str(path))
    assert ref["temperature"].dims == ("pressure", "latitude", "longitude")
    np.testing.assert_array_equal(ref["longitude"].values, case.data["longitude"].values)
    assert np.isfinite(ref["temperature"].values).all()
    # the same climatology in the case's own convention, interpolated by xarray directly
    # (linear in ln p, latitude and longitude): the package's result must agree
    c = wb.open_case(str(path)).data[["temperature"]].mean("time").load()
    c = c.assign_coords(longitude=np.where(c["longitude"] > 180, c["longitude"] - 360, c["longitude"])).sortby(
        "longitude")
    want = c.assign_coords(pressure=np.log(c["pressure"].values)).interp(
        pressure=np.log(case.data["pressure"].values), latitude=case.data["latitude"].values,
        longitude=case.data["longitude"].values)["temperature"].values
    np.testing.assert_allclose(ref["temperature"].values, want, rtol=1e-10)
    assert np.isfinite(case.anomaly(0, reference=str(path))["qgpv_anomaly"].values[:, 1:-1, 1:-1]).all()


def test_climatology_not_covering_the_domain_is_refused(one_time_path, tmp_path):
    case = wb.open_case(one_time_path)
    clim = _climatology(np.arange(-30.0, 30.01, 2.0), [1000, 850, 700, 500, 300, 200, 100])
    path = tmp_path / "small_clim.nc"
    clim.to_netcdf(path)
    with pytest.raises(GridError, match="covers .* but the case needs") as err:
        case.reference(str(path))
    assert "\n" not in str(err.value)
    # levels missing at the top
    clim = _climatology(np.arange(0.0, 360.0, 2.0), [1000, 850, 700, 500, 300])
    path2 = tmp_path / "low_clim.nc"
    clim.to_netcdf(path2)
    with pytest.raises(GridError, match="hPa"):
        case.reference(str(path2))
