"""Projected model grids (Lambert conformal, polar stereographic, Mercator, rotated pole) from
GRIB2 written with eccodes and CF netCDF with a grid_mapping variable; wind rotation;
several hypercubes and several files in one case; region and time selection."""
from __future__ import annotations

import shutil
import subprocess
import sys

import numpy as np
import pyproj
import pytest
import xarray as xr

import workbench as wb
from workbench import grids
from workbench.errors import GridError, InputError

import forecast_files as ff


@pytest.fixture(scope="module")
def sample():
    return wb.open_case(ff.SAMPLE)


def _compare_with_sample(case, sample, ti=0, si=4):
    """Max |difference| of u, v, T on the case's lat-lon grid vs the sample interpolated there
    (the reader's data as read: no terrain rule applied)."""
    d = case.data.isel(time=ti).astype("float64").load()
    s = sample.at(si).interp(latitude=d.latitude, longitude=d.longitude)
    return {v: float(np.nanmax(np.abs(d[v] - s[v]))) for v in ("u", "v", "temperature")}


# --- GRIB2 -----------------------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["lambert", "polar_stereographic"])
def test_grib_projected_grid_relative_winds(tmp_path, sample, kind):
    path = tmp_path / f"{kind}.grib2"
    ff.write_grib(path, kind, times=2, grid_relative=True)
    case = wb.open_case(path)
    assert case.data.sizes["time"] == 2
    assert case.data["latitude"].ndim == 1 and case.data["longitude"].ndim == 1
    notes = " ".join(case.notes)
    assert "rotated to earth-relative" in notes
    assert "uvRelativeToGrid=1" in notes or "component flags=8" in notes
    assert case.data.attrs["native_projection"] == {"lambert": "Lambert conformal",
                                                    "polar_stereographic": "polar stereographic"}[kind]
    # the reader's fields against the storm that was written, on the same lat-lon points: only
    # the two linear interpolations (sample -> 50 km grid -> 0.5 deg) separate them. A wrong or
    # missing wind rotation (up to 20 degrees here) would leave errors of 10-20 m/s.
    err = _compare_with_sample(case, sample)
    assert err["u"] < 1.0 and err["v"] < 1.0 and err["temperature"] < 0.5, err
    # several hypercubes in the file: surface fields kept, other level types listed
    for v in ("mslp", "surface_pressure", "surface_geopotential"):
        assert v in case.data
    assert "maxWind" in notes and "tropopause" in notes


def test_grib_earth_relative_winds_not_rotated(tmp_path, sample):
    path = tmp_path / "lcc_earth.grib2"
    ff.write_grib(path, "lambert", grid_relative=False, extra_levels=False)
    case = wb.open_case(path)
    assert "taken as earth-relative (GRIB uvRelativeToGrid=0)" in " ".join(case.notes)
    err = _compare_with_sample(case, sample)
    assert err["u"] < 1.0 and err["v"] < 1.0


def test_grib_below_ground_bitmap_is_missing(tmp_path):
    crs, x, y, lat2d, lon2d = ff.plane_grid("lambert")
    mountain = (lat2d - 50.0) ** 2 / 9 + (lon2d + 30.0) ** 2 / 25 < 1.0
    path = tmp_path / "terrain.grib2"
    ff.write_grib(path, "lambert", below_ground=mountain)
    case = wb.open_case(path)
    t = case.data["temperature"].isel(time=0)
    # the levels below 640 hPa are missing over the mountain, the upper ones nowhere
    assert bool(t.sel(pressure=70000.0).isnull().any())
    assert not bool(t.sel(pressure=50000.0).isnull().any())
    sp = case.data["surface_pressure"].isel(time=0)
    assert float(sp.min()) == pytest.approx(64000.0, abs=50.0)


def test_grib_levels_in_pa_join_the_hpa_levels(tmp_path, sample):
    """Upper levels written as isobaricInPa (a separate hypercube for cfgrib) join the hPa ones."""
    path = tmp_path / "pa.grib2"
    ff.write_grib(path, "lambert", pa_levels=(150, 100), extra_levels=False)
    case = wb.open_case(path)
    np.testing.assert_allclose(case.levels_hpa, ff.LEVELS)
    err = _compare_with_sample(case, sample)
    assert err["temperature"] < 0.5


def test_grib_ensemble_members(tmp_path):
    """An ensemble in one GRIB2 file (perturbationNumber) becomes the member dimension."""
    path = tmp_path / "ens.grib2"
    ff.write_grib(path, "lambert", members=3, extra_levels=False)
    case = wb.open_case(path)
    assert case.members is not None and len(case.members) == 3
    t0 = case.data["temperature"].isel(time=0, member=0)
    t2 = case.data["temperature"].isel(time=0, member=2)
    assert float((t2 - t0).mean()) == pytest.approx(0.2, abs=0.02)


def test_grib_forecast_steps_become_valid_times(tmp_path):
    path = tmp_path / "steps.grib2"
    _, atm = ff.write_grib(path, "lambert", times=3, steps=True, extra_levels=False)
    case = wb.open_case(path)
    np.testing.assert_array_equal(case.times.astype("datetime64[h]"), atm["time"].values.astype("datetime64[h]"))


def test_several_files_list_glob_folder(tmp_path):
    folder = tmp_path / "run"
    folder.mkdir()
    for k in range(3):
        ff.write_grib(folder / f"step{k}.grib2", "lambert", times=1, start=3 + k, extra_levels=(k == 0))
    by_folder = wb.open_case(folder)
    by_glob = wb.open_case(str(folder / "*.grib2"))
    by_list = wb.open_case(sorted(folder.glob("*.grib2"))[::-1])
    for case in (by_folder, by_glob, by_list):
        assert case.data.sizes["time"] == 3
        assert np.all(np.diff(case.times.astype("int64")) > 0)
    assert by_folder.checksum == by_glob.checksum == by_list.checksum
    xr.testing.assert_allclose(by_folder.at(2)["temperature"], by_list.at(2)["temperature"])
    # a file on another grid is refused, naming it
    ff.write_grib(folder / "other.grib2", "lambert", nx=30, ny=30)
    with pytest.raises(GridError, match="other.grib2"):
        wb.open_case(folder)


def test_grib_import_order_safe_in_fresh_interpreter(tmp_path):
    """eccodes imported before pyproj must not crash the reader (a bundled-library clash in
    newer eccodes wheels): open a projected GRIB file in a fresh interpreter that imports
    eccodes first."""
    path = tmp_path / "order.grib2"
    ff.write_grib(path, "lambert", extra_levels=False)
    code = f"import eccodes, workbench as wb; c = wb.open_case({str(path)!r}); print(c.data.sizes['latitude'])"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr[-2000:]
    assert int(out.stdout.strip()) > 3


# --- CF netCDF ------------------------------------------------------------------------------

@pytest.mark.parametrize("kind", ["lambert", "polar_stereographic", "mercator", "rotated_pole"])
@pytest.mark.parametrize("grid_relative", [False, True])
def test_cf_grid_mapping(tmp_path, sample, kind, grid_relative):
    path = tmp_path / f"{kind}.nc"
    ff.write_cf_netcdf(path, kind, grid_relative=grid_relative)
    case = wb.open_case(path)
    assert ("rotated to earth-relative" in " ".join(case.notes)) == grid_relative
    err = _compare_with_sample(case, sample)
    assert err["u"] < 1.0 and err["v"] < 1.0 and err["temperature"] < 0.5, err


def test_cf_without_latlon_uses_projection_axes(tmp_path, sample):
    path = tmp_path / "xy_only.nc"
    ff.write_cf_netcdf(path, "lambert", with_latlon=False, grid_relative=True)
    case = wb.open_case(path)
    err = _compare_with_sample(case, sample)
    assert err["u"] < 1.0 and err["v"] < 1.0


def test_2d_latlon_without_projection_is_refused(tmp_path):
    path = tmp_path / "nomap.nc"
    ff.write_cf_netcdf(path, "lambert")
    ds = xr.open_dataset(path).load()
    ds = ds.drop_vars("crs")
    for v in ds.data_vars:
        ds[v].attrs.pop("grid_mapping", None)
    ds.to_netcdf(tmp_path / "nomap2.nc")
    with pytest.raises(GridError, match="2-D latitude/longitude .* but no projection: add a CF grid_mapping"):
        wb.open_case(tmp_path / "nomap2.nc")


# --- physics on the native grid vs MetPy ------------------------------------------------------

def test_pv_matches_metpy_on_native_lambert_grid(tmp_path):
    """Ertel PV of the regridded case against MetPy's potential_vorticity_baroclinic computed on
    the native Lambert conformal grid (MetPy reads the CF grid mapping and applies the map
    factors; x_wind/y_wind are the grid-relative components it expects), interpolated to the
    same latitude-longitude points. The two differ by the interpolation and by the vertical
    differencing (ln p here, p in MetPy: up to 8 % near the tropopause, DEVELOPERS.md)."""
    import metpy.calc as mpcalc

    path = tmp_path / "lcc_metpy.nc"
    (crs, x, y, lat2d, lon2d), _ = ff.write_cf_netcdf(path, "lambert", grid_relative=True, nx=60, ny=50,
                                                      dx=25000.0)
    ds = xr.open_dataset(path).metpy.parse_cf()
    theta = mpcalc.potential_temperature(ds["pressure"], ds["ta"])
    mp = mpcalc.potential_vorticity_baroclinic(theta, ds["pressure"], ds["ua"], ds["va"])
    mp = mp.metpy.dequantify().isel(time=0) * 1e6  # PVU
    case = wb.open_case(path)
    pv = case.pv(0)
    fwd = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True)
    X, Y = fwd.transform(*np.meshgrid(pv.longitude, pv.latitude))
    mp = mp.interp(x=xr.DataArray(X, dims=("latitude", "longitude")), y=xr.DataArray(Y, dims=("latitude", "longitude")))
    for lev, tol in ((850, 0.03), (500, 0.05), (300, 0.12), (200, 0.10)):
        a = pv.sel(pressure=lev * 100.0).values[2:-2, 2:-2]
        b = mp.sel(pressure=lev).values[2:-2, 2:-2]
        rel = np.sqrt(np.nanmean((a - b) ** 2)) / np.sqrt(np.nanmean(b ** 2))
        assert rel < tol, (lev, rel)
        assert np.corrcoef(a.ravel(), b.ravel())[0, 1] > 0.99


# --- wind rotation against closed forms ------------------------------------------------------

def test_grid_angle_matches_pyproj_meridian_convergence():
    # pyproj.Proj.get_factors: meridian convergence; the grid x axis is turned from east by
    # minus the convergence
    for kind in ("lambert", "polar_stereographic", "mercator"):
        crs, x, y, lat2d, lon2d = ff.plane_grid(kind)
        a = grids.grid_angle(crs, x, y)
        f = pyproj.Proj(crs).get_factors(lon2d, lat2d)
        np.testing.assert_allclose(a, -np.deg2rad(f.meridian_convergence), atol=1e-6)


def test_lambert_angle_closed_form():
    """Lambert conformal conic: the grid is turned from east by -n (lon - lon0), with the cone
    constant n = ln(cos p1 / cos p2) / ln(tan(pi/4 + p2/2) / tan(pi/4 + p1/2))
    (Snyder 1987, Map Projections - A Working Manual, USGS Prof. Paper 1395, eqs. 15-3, 14-4)."""
    crs, x, y, lat2d, lon2d = ff.plane_grid("lambert")
    p1, p2 = np.deg2rad(35.0), np.deg2rad(60.0)
    n = np.log(np.cos(p1) / np.cos(p2)) / np.log(np.tan(np.pi / 4 + p2 / 2) / np.tan(np.pi / 4 + p1 / 2))
    expected = -n * np.deg2rad(lon2d - (-30.0))
    np.testing.assert_allclose(grids.grid_angle(crs, x, y), expected, atol=1e-6)


@pytest.mark.parametrize("kind", ["lambert", "polar_stereographic"])
def test_solid_body_rotation_rotated_back_to_earth(tmp_path, kind):
    """A solid-body rotation about the earth's axis (u = U cos(lat), v = 0, earth-relative)
    written as grid-relative components with the closed-form grid angle (Lambert: n (lon - lon0)
    as above; polar stereographic: the full longitude difference, n = 1, Snyder 1987 ch. 21) is
    read back as u = U cos(lat), v = 0."""
    path = tmp_path / f"solid_{kind}.nc"
    (crs, x, y, lat2d, lon2d), _ = ff.write_cf_netcdf(path, kind, grid_relative=True)
    if kind == "lambert":
        p1, p2 = np.deg2rad(35.0), np.deg2rad(60.0)
        n = np.log(np.cos(p1) / np.cos(p2)) / np.log(np.tan(np.pi / 4 + p2 / 2) / np.tan(np.pi / 4 + p1 / 2))
    else:
        n = 1.0
    angle = -n * np.deg2rad(lon2d + 30.0)
    U = 30.0
    ue, ve = U * np.cos(np.deg2rad(lat2d)), np.zeros_like(lat2d)
    ug, vg = ff.to_grid_relative(ue, ve, angle)
    ds = xr.open_dataset(path).load()
    ds["ua"][:] = np.broadcast_to(ug, ds["ua"].shape)
    ds["va"][:] = np.broadcast_to(vg, ds["va"].shape)
    ds.to_netcdf(tmp_path / "solid2.nc")
    case = wb.open_case(tmp_path / "solid2.nc")
    d = case.data.isel(time=0).load()
    lat = d["latitude"]
    np.testing.assert_allclose(d["u"].values, np.broadcast_to((U * np.cos(np.deg2rad(lat))).values[:, None],
                                                              d["u"].shape), atol=0.02)
    np.testing.assert_allclose(d["v"].values, 0.0, atol=0.02)


# --- resolution rule, region and time selection ------------------------------------------

def test_resolution_rule_and_box_inside_domain():
    crs, x, y, lat2d, lon2d = ff.plane_grid("lambert", dx=12000.0, nx=120, ny=100)
    lat, lon, step = grids.latlon_target(lat2d, lon2d, crs, x, y)
    assert step == 0.1  # 12 km / 111.2 km per degree = 0.108 -> nearest step 0.1
    fwd = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True)
    X, Y = fwd.transform(*np.meshgrid(lon, lat))
    assert X.min() >= x.min() and X.max() <= x.max() and Y.min() >= y.min() and Y.max() <= y.max()
    # the box keeps most of the domain (a Lambert domain is nearly a box at these latitudes)
    assert (lat[-1] - lat[0]) > 0.7 * (lat2d.max() - lat2d.min())


def test_projected_region_and_grid_step(tmp_path):
    path = tmp_path / "lcc.nc"
    ff.write_cf_netcdf(path, "lambert")
    case = wb.open_case(path, region=(-40, -20, 45, 55), grid_step=0.25)
    lat, lon = case.data["latitude"].values, case.data["longitude"].values
    assert lat[0] >= 45 and lat[-1] <= 55 and lon[0] >= -40 and lon[-1] <= -20
    assert np.allclose(np.diff(lat), 0.25)


def test_region_and_times_on_regular_grid(sample):
    case = wb.open_case(ff.SAMPLE, region=(-40, 0, 40, 60), times=[4, 5])
    assert case.data.sizes["time"] == 2
    d = case.domain
    assert d["lat_min"] >= 40 and d["lat_max"] <= 60 and d["lon_min"] >= -40 and d["lon_max"] <= 0
    xr.testing.assert_allclose(case.at(0)["temperature"],
                               sample.at(4)["temperature"].sel(latitude=case.data.latitude,
                                                               longitude=case.data.longitude))
    iso = wb.open_case(ff.SAMPLE, times=str(sample.times[3])[:19])
    assert iso.data.sizes["time"] == 1
    with pytest.raises(InputError, match="fewer than 3 x 3"):
        wb.open_case(ff.SAMPLE, region=(100, 110, 40, 60))
    with pytest.raises(InputError, match="four numbers W,E,S,N"):
        wb.open_case(ff.SAMPLE, region="1,2,3")
    with pytest.raises(InputError, match="S < N"):
        wb.open_case(ff.SAMPLE, region=(0, 10, 60, 40))


def test_cli_info_on_projected_grib(tmp_path, capsys):
    from workbench.cli import main

    path = tmp_path / "lcc.grib2"
    ff.write_grib(path, "lambert")
    assert main(["info", str(path)]) == 0
    out = capsys.readouterr().out
    assert "Lambert conformal" in out and "rotated to earth-relative" in out


@pytest.mark.skipif(shutil.which("true") is None, reason="needs a POSIX shell")
def test_domain_with_pole_needs_region():
    crs, x, y, lat2d, lon2d = ff.plane_grid("polar_stereographic", nx=60, ny=60, dx=100000.0, centre=(-30.0, 89.0))
    with pytest.raises(GridError, match="contains a pole"):
        grids.latlon_target(lat2d, lon2d, crs, x, y)


# --- maps in the data's own projection --------------------------------------------------------

@pytest.mark.parametrize("kind,cls", [("lambert", "LambertConformal"), ("polar_stereographic", "Stereographic"),
                                      ("rotated_pole", "RotatedPole"), ("mercator", "Mercator")])
def test_maps_drawn_in_native_projection_by_default(tmp_path, kind, cls):
    from pathlib import Path

    from workbench.views import static

    path = tmp_path / f"{kind}.nc"
    ff.write_cf_netcdf(path, kind, grid_relative=True)
    case = wb.open_case(path)
    fig = static.map_figure(case, field="ertel_pv", surface=320.0, time=0)
    assert type(fig.axes[0].projection).__name__ == cls
    art = Path(__file__).parent / "artifacts"
    art.mkdir(exist_ok=True)
    static.save_figure(fig, art / f"native_map_{kind}.png", overwrite=True)
    # the switch: the same map on plain latitude-longitude
    flat = static.map_figure(case, field="ertel_pv", surface=320.0, time=0, settings={"projection": "plate_carree"})
    assert type(flat.axes[0].projection).__name__ == "PlateCarree"
    # the projection's parameters are the file's: its standard parallels / pole
    if kind == "lambert":
        p = fig.axes[0].projection.proj4_params
        assert (p["lat_1"], p["lat_2"], p["lon_0"]) == (35.0, 60.0, -30.0)


def test_cli_region_with_negative_western_edge(capsys):
    """`--region -40,10,35,70` (a value starting with a minus sign) is taken as the region."""
    from workbench.cli import main

    assert main(["info", str(ff.SAMPLE), "--region", "-40,-10,40,60", "--times", "0..2"]) == 0
    out = capsys.readouterr().out
    assert "40°N..60°N, 40°W..10°W" in out and "(3 times)" in out


def test_region_across_the_seam_of_a_global_grid(tmp_path):
    """A region across longitude 0 of a 0..360 global file is cut lazily into one contiguous
    grid (-10..10 E), with the values of the file."""
    lat = np.arange(-90.0, 90.1, 2.5)
    lon = np.arange(0.0, 360.0, 2.5)
    lev = np.array([1000.0, 850.0, 700.0, 500.0, 300.0, 200.0])
    sample = xr.open_dataset(ff.SAMPLE).isel(time=[0, 1])
    shape = (2, lev.size, lat.size, lon.size)
    rng = np.random.default_rng(1)
    T0 = np.interp(np.log(lev), np.log([1000.0, 200.0]), [285.0, 220.0])[None, :, None, None]
    ds = xr.Dataset(
        dict(t=(("time", "level", "lat", "lon"), (T0 + rng.normal(0, 1, shape)).astype("f4"), {"units": "K"}),
             u=(("time", "level", "lat", "lon"), rng.normal(0, 5, shape).astype("f4"), {"units": "m s-1"}),
             v=(("time", "level", "lat", "lon"), rng.normal(0, 5, shape).astype("f4"), {"units": "m s-1"}),
             z=(("time", "level", "lat", "lon"),
                np.broadcast_to((-7000.0 * np.log(lev / 1013.0) * 9.81)[None, :, None, None], shape).astype("f4"),
                {"units": "m2 s-2", "standard_name": "geopotential"})),
        coords=dict(time=sample["time"].values, level=("level", lev, {"units": "hPa"}),
                    lat=("lat", lat, {"units": "degrees_north"}), lon=("lon", lon, {"units": "degrees_east"})))
    path = tmp_path / "global.nc"
    ds.to_netcdf(path)
    case = wb.open_case(path, region=(-10, 10, 30, 60))
    lon_c = case.data["longitude"].values
    np.testing.assert_allclose(lon_c, np.arange(-10.0, 10.1, 2.5))
    got = case.data["temperature"].isel(time=1).sel(pressure=50000.0).values
    want = ds["t"].isel(time=1).sel(level=500.0, lat=slice(30, 60)).sel(lon=np.mod(lon_c, 360.0)).values
    np.testing.assert_array_equal(got, want)


def test_regridding_keeps_derivatives_of_smooth_fields():
    """The physics differentiates the regridded fields. On a smooth closed-form field over a
    50 km Lambert grid regridded to 0.5 degrees, the centred d/dlon of the result is compared
    with the same difference of the exact field: a piecewise-linear interpolant has
    piecewise-constant derivatives (error O(h), stripes where the grids' spacings beat), a
    cubic spline's derivative error is O(h^3) (de Boor 1978, A Practical Guide to Splines,
    ch. IV-V; from memory). Fields not named cubic (surface fields) stay linear."""
    crs, x, y, lat2d, lon2d = ff.plane_grid("lambert", 48, 40, 50000.0)
    L = 900e3  # 18 native grid lengths: a well-resolved wave

    def f(X, Y):
        return np.sin(2 * np.pi * X / L) * np.cos(1.6 * np.pi * Y / L)

    XX, YY = np.meshgrid(x, y)
    ds = xr.Dataset({"level": (("y", "x"), f(XX, YY)), "surface": (("y", "x"), f(XX, YY))},
                    coords={"x": x, "y": y})
    lat, lon, step = grids.latlon_target(lat2d, lon2d, crs, x, y)
    to_plane = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True)
    LON, LAT = np.meshgrid(lon, lat)
    exact = f(*to_plane.transform(LON, LAT))
    dref = (exact[:, 2:] - exact[:, :-2]) / (2 * step)

    def derr(a):
        d = (a[:, 2:] - a[:, :-2]) / (2 * step)
        return np.sqrt(np.mean((d - dref) ** 2)) / np.sqrt(np.mean(dref ** 2))

    lin = grids.regrid_to_latlon(ds, crs, lat, lon, method="linear")
    new = grids.regrid_to_latlon(ds, crs, lat, lon, cubic=["level"])
    e_lin, e_cub = derr(lin["level"].values), derr(new["level"].values)
    assert e_lin > 0.01  # the stripes this guards against
    assert e_cub < 0.05 * e_lin and e_cub < 1e-3
    err_cub, err_lin = np.abs(new["level"].values - exact), np.abs(lin["level"].values - exact)
    assert err_cub[2:-2, 2:-2].max() < 2e-4 and err_cub.max() < 0.5 * err_lin.max()
    np.testing.assert_array_equal(new["surface"].values, lin["surface"].values)
    # the spline is SciPy's interpolating cubic: at the native points themselves it returns the
    # data (interpolation property), and it agrees with SciPy's RegularGridInterpolator "cubic"
    # (a different construction of a cubic spline interpolant) to the spline's accuracy
    from scipy.interpolate import RegularGridInterpolator

    iy, ix = np.meshgrid(np.arange(5, 30, 3.0), np.arange(5, 40, 3.0), indexing="ij")
    np.testing.assert_allclose(grids._spline_at(ds["level"].values, iy, ix),
                               ds["level"].values[5:30:3, 5:40:3], atol=1e-12)
    to = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True)
    PX, PY = to.transform(LON, LAT)
    rgi = RegularGridInterpolator((y, x), ds["level"].values, method="cubic")(
        np.stack([PY.ravel(), PX.ravel()], -1)).reshape(LON.shape)
    assert np.abs(new["level"].values - rgi)[2:-2, 2:-2].max() < 2e-4


def test_regridding_a_step_does_not_overshoot_and_keeps_missing_values():
    """A plateau's edge in surface pressure (a step) regridded: no value outside the data's range
    (surface fields are linear; a cubic spline rings there), and a level field with a bitmap of missing
    values keeps them missing by the linear rule (a target point next to one is missing) while
    the rest is finite."""
    crs, x, y, lat2d, lon2d = ff.plane_grid("lambert", 48, 40, 50000.0)
    XX, YY = np.meshgrid(x, y)
    plateau = (XX - XX.mean()) ** 2 + (YY - YY.mean()) ** 2 < 4e11
    level = np.where(plateau, np.nan, 280.0 + 1e-5 * XX)
    ds = xr.Dataset({"sp": (("y", "x"), np.where(plateau, 64000.0, 101000.0)),
                     "t": (("y", "x"), level)}, coords={"x": x, "y": y})
    lat, lon, _ = grids.latlon_target(lat2d, lon2d, crs, x, y)
    out = grids.regrid_to_latlon(ds, crs, lat, lon, cubic=["t"])
    assert float(out["sp"].min()) >= 64000.0 - 1e-6 and float(out["sp"].max()) <= 101000.0 + 1e-6
    lin = grids.regrid_to_latlon(ds, crs, lat, lon, method="linear")
    miss = np.isnan(out["t"].values)
    assert miss.any() and (miss == np.isnan(lin["t"].values)).mean() > 0.995
    np.testing.assert_allclose(out["t"].values[~miss], lin["t"].values[~miss], atol=0.05)
