"""Cross-sections (workbench.sections): geometry, interpolation, normal wind, pieces.

Checks against outside references: MetPy's ``cross_section`` / ``normal_component``
(reference library) and spherical geometry (analytic: great-circle arc length a*angle, points
of a great circle lie in one plane through the Earth's centre).
"""
import numpy as np
import pytest
import xarray as xr

import workbench as wb
from workbench.errors import InputError
from workbench.sections import Section, cross_section, great_circle_path, normal_and_tangent
from workbench.units import EARTH_RADIUS, G, RD


def _dataset():
    """A small invented baroclinic case (fixture only, never a check value)."""
    p = np.array([1000, 925, 850, 700, 500, 400, 300, 250, 200, 150, 100], float) * 100
    lat = np.linspace(30, 66, 19)
    lon = np.linspace(-50, 10, 31)
    P, LA, LO = np.meshgrid(p, lat, lon, indexing="ij")
    z = 44330.8 * (1 - (P / 101325) ** 0.190263)
    t = np.where(z < 11000, 288.15 - 0.0065 * z, 216.65)
    trop = np.clip((P - 22000) / 78000, 0, 1)
    bump = np.exp(-(((LO + 20) / 10) ** 2 + ((LA - 50) / 7) ** 2))
    t = t - 12 * (LA - 48) / 18 * trop - 5 * bump * trop
    phi = np.zeros_like(t)
    phi[0] = G * (100 - 150 * bump[0])
    for k in range(1, len(p)):
        phi[k] = phi[k - 1] - RD * 0.5 * (t[k] + t[k - 1]) * np.log(p[k] / p[k - 1])
    f = 2 * 7.292e-5 * np.sin(np.deg2rad(lat))[None, :, None]
    dy = np.gradient(phi, np.deg2rad(lat), axis=1) / EARTH_RADIUS
    dx = np.gradient(phi, np.deg2rad(lon), axis=2) / (EARTH_RADIUS * np.cos(np.deg2rad(lat))[None, :, None])
    dims = ("time", "pressure", "latitude", "longitude")
    return xr.Dataset(
        {"temperature": (dims, t[None], {"units": "K"}),
         "u": (dims, (-dy / f)[None], {"units": "m s-1"}),
         "v": (dims, (dx / f)[None], {"units": "m s-1"}),
         "geopotential": (dims, phi[None], {"units": "m2 s-2"})},
        coords={"time": np.array(["2031-01-10T00"], "datetime64[ns]"),
                "pressure": ("pressure", p, {"units": "Pa"}),
                "latitude": ("latitude", lat, {"units": "degrees_north"}),
                "longitude": ("longitude", lon, {"units": "degrees_east"})},
        attrs={"title": "invented section test case"})


@pytest.fixture(scope="module")
def case():
    return wb.open_case(_dataset())


def _metpy_section(da, start, end, steps):
    """MetPy's cross_section on a spherical lat/lon CRS; start/end given as (lon, lat)."""
    from metpy.interpolate import cross_section as mp_cross

    da = da.metpy.assign_crs(grid_mapping_name="latitude_longitude", earth_radius=EARTH_RADIUS)
    return mp_cross(da, (start[1], start[0]), (end[1], end[0]), steps=steps, interp_type="linear")


def test_meridian_path_length_is_radius_times_angle():
    # analytic: along a meridian the great-circle distance is a * dlat (radians)
    lon, lat, dist, az = great_circle_path((-20.0, 35.0), (-20.0, 55.0), npoints=41)
    assert np.allclose(lon, -20.0)
    assert np.allclose(lat, np.linspace(35, 55, 41), atol=1e-9)
    assert dist[-1] == pytest.approx(EARTH_RADIUS * np.deg2rad(20.0) / 1000.0, rel=1e-9)
    assert np.allclose(az, 0.0, atol=1e-9)  # due north


def test_path_points_lie_on_one_great_circle():
    # analytic: every point of a great circle lies in the plane through the centre
    # spanned by its end points, so its unit vector is normal to s x e.
    start, end = (-45.0, 35.0), (5.0, 62.0)
    lon, lat, dist, _ = great_circle_path(start, end, npoints=60)

    def unit(lo, la):
        lo, la = np.deg2rad(lo), np.deg2rad(la)
        return np.stack([np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)], -1)

    n = np.cross(unit(*start), unit(*end))
    assert np.abs(unit(lon, lat) @ n).max() < 1e-12
    # total length = a * central angle (spherical law of cosines)
    ang = np.arccos(np.clip(unit(*start) @ unit(*end), -1, 1))
    assert dist[-1] == pytest.approx(EARTH_RADIUS * ang / 1000.0, rel=1e-9)
    assert np.all(np.diff(dist) > 0)


def test_fields_match_metpy_cross_section(case):
    # reference library: MetPy cross_section (geodesic via pyproj + xarray linear interp)
    start, end = (-42.0, 36.0), (4.0, 61.0)
    sec = cross_section(case, start, end, npoints=50)
    ref_pv = _metpy_section(case.pv(), start, end, 50)
    ref_th = _metpy_section(case.theta(), start, end, 50)
    assert sec["ertel_pv"].dims == ("pressure", "distance")
    np.testing.assert_allclose(sec["longitude"], ref_pv["longitude"], atol=1e-9)
    np.testing.assert_allclose(sec["latitude"], ref_pv["latitude"], atol=1e-9)
    np.testing.assert_allclose(sec["ertel_pv"].values, ref_pv.transpose("pressure", "index").values,
                               rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(sec["potential_temperature"].values,
                               ref_th.transpose("pressure", "index").values, rtol=1e-12)
    assert sec["ertel_pv"].attrs["units"] == "PVU"


def test_normal_wind_matches_metpy_normal_component_on_a_meridian(case):
    # reference library: MetPy normal_component, whose unit normal points to the left of
    # the start->end direction. MetPy measures directions from north at the START point,
    # we from local north; along a meridian the two frames coincide everywhere.
    import metpy.calc as mpcalc
    from metpy.interpolate import cross_section as mp_cross

    start, end = (-25.0, 33.0), (-25.0, 64.0)
    sec = cross_section(case, start, end, npoints=60)
    ds = case.at()[["u", "v"]]
    ds = ds.metpy.assign_crs(grid_mapping_name="latitude_longitude", earth_radius=EARTH_RADIUS)
    cross = mp_cross(ds, (start[1], start[0]), (end[1], end[0]), steps=60)
    ref = mpcalc.normal_component(cross["u"], cross["v"]).metpy.dequantify()
    np.testing.assert_allclose(sec["normal_wind"].values, ref.transpose("pressure", "index").values,
                               rtol=1e-9, atol=1e-9)
    # and near the start of a slanted line, where the frames still agree
    start, end = (-45.0, 34.0), (5.0, 63.0)
    sec = cross_section(case, start, end, npoints=200)
    cross = mp_cross(ds, (start[1], start[0]), (end[1], end[0]), steps=200)
    ref = mpcalc.normal_component(cross["u"], cross["v"]).metpy.dequantify()
    ref = ref.transpose("pressure", "index").values
    speed = float(np.hypot(ds["u"], ds["v"]).max())
    assert np.abs(sec["normal_wind"].values[:, :3] - ref[:, :3]).max() < 2e-3 * speed


def test_solid_body_rotation_about_the_sections_pole_is_all_along_section():
    # analytic: a solid-body rotation V = w k x r about the pole k of the section's great
    # circle is tangent to that circle: normal wind 0, along-section wind w*a everywhere.
    start, end = (-45.0, 34.0), (5.0, 63.0)

    def unit(lo, la):
        lo, la = np.deg2rad(lo), np.deg2rad(la)
        return np.stack([np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)], -1)

    k = np.cross(unit(*start), unit(*end))
    k /= np.linalg.norm(k)
    w = 20.0 / EARTH_RADIUS  # 20 m/s on the circle itself
    ds = _dataset()
    lat, lon = ds["latitude"].values, ds["longitude"].values
    LA, LO = np.meshgrid(lat, lon, indexing="ij")
    r = unit(LO, LA) * EARTH_RADIUS
    vel = w * np.cross(k, r)
    lam, phi = np.deg2rad(LO), np.deg2rad(LA)
    east = np.stack([-np.sin(lam), np.cos(lam), 0 * lam], -1)
    north = np.stack([-np.sin(phi) * np.cos(lam), -np.sin(phi) * np.sin(lam), np.cos(phi)], -1)
    u2, v2 = (vel * east).sum(-1), (vel * north).sum(-1)
    nz = ds.sizes["pressure"]
    ds["u"] = (ds["u"].dims, np.broadcast_to(u2, (1, nz) + u2.shape).copy(), {"units": "m s-1"})
    ds["v"] = (ds["v"].dims, np.broadcast_to(v2, (1, nz) + v2.shape).copy(), {"units": "m s-1"})
    sec = cross_section(wb.open_case(ds), start, end, npoints=80)
    # bilinear interpolation of a smooth field on a 2-degree grid: errors of order
    # (dx/a)^2 * V, well under 0.05 m/s here
    assert np.abs(sec["normal_wind"]).max() < 0.05
    np.testing.assert_allclose(sec["tangential_wind"], 20.0, atol=0.05)


def test_normal_wind_sign_on_simple_paths():
    # analytic: a westerly u = 10 m/s crosses a south->north line from left to right, so
    # the normal wind (positive to the left) is -10 and the along-line wind 0; on a
    # west->east line (azimuth 90) the normal wind is v; on a southward line, u.
    n, t = normal_and_tangent(10.0, 0.0, 0.0)
    assert n == pytest.approx(-10.0) and t == pytest.approx(0.0)
    n, t = normal_and_tangent(3.0, 7.0, 90.0)
    assert n == pytest.approx(7.0) and t == pytest.approx(3.0)
    n, t = normal_and_tangent(3.0, 7.0, 180.0)  # southward line: left is east
    assert n == pytest.approx(3.0) and t == pytest.approx(-7.0)


def test_tropopause_pressure_at_grid_points(case):
    # start and end on grid nodes: the interpolated value equals the node value
    start, end = (-40.0, 40.0), (0.0, 60.0)
    sec = cross_section(case, start, end, npoints=30)
    trop = case.tropopause()
    for k, (lo, la) in ((0, start), (-1, end)):
        node = float(trop["pressure"].sel(longitude=lo, latitude=la))
        assert float(sec["tropopause_pressure"][k]) == pytest.approx(node, rel=1e-12)
    assert sec["tropopause_pressure"].attrs["units"] == "Pa"


def test_pieces_and_omega_on_section(case):
    # analytic: uniform balanced wind u=5, v=-2 on a south->north meridian section gives
    # normal wind -5; a temperature anomaly linear in latitude is reproduced exactly by
    # linear interpolation.
    ds = case.at()
    shape = (ds.sizes["pressure"], ds.sizes["latitude"], ds.sizes["longitude"])
    coords = {k: ds[k] for k in ("pressure", "latitude", "longitude")}
    dims = ("pressure", "latitude", "longitude")
    lat3 = np.broadcast_to(ds["latitude"].values[None, :, None], shape)
    bal = xr.Dataset({"u": (dims, np.full(shape, 5.0)), "v": (dims, np.full(shape, -2.0)),
                      "temperature_anomaly": (dims, 0.1 * lat3)}, coords=coords)
    omega = xr.DataArray(np.full(shape, 0.3), dims=dims, coords=coords)
    sec = cross_section(case, (-20.0, 35.0), (-20.0, 60.0), npoints=26,
                        results={"upper": bal, "total": bal},
                        omega={"upper": omega, "full flow": 2 * omega})
    assert list(sec["piece"].values) == ["upper", "total"]
    np.testing.assert_allclose(sec["balanced_normal_wind"].sel(piece="upper"), -5.0, atol=1e-12)
    np.testing.assert_allclose(sec["balanced_temperature_anomaly"].sel(piece="total").isel(pressure=0),
                               0.1 * sec["latitude"].values, rtol=1e-12)
    assert sec["piece_qg_omega"].dims == ("piece", "pressure", "distance")
    np.testing.assert_allclose(sec["piece_qg_omega"].sel(piece="upper"), 0.3)
    assert bool(sec["piece_qg_omega"].sel(piece="total").isnull().all())  # none given for it
    assert sec["qg_omega"].dims == ("pressure", "distance")
    np.testing.assert_allclose(sec["qg_omega"], 0.6)


def test_bad_sections_raise_clear_errors(case):
    with pytest.raises(InputError, match="outside the case domain"):
        cross_section(case, (-80.0, 40.0), (0.0, 50.0))
    with pytest.raises(InputError, match="coincide"):
        cross_section(case, (-20.0, 40.0), (-20.0, 40.0))
    with pytest.raises(InputError, match="longitude, latitude"):
        cross_section(case, ("a", 40.0), (0.0, 50.0))
    with pytest.raises(InputError, match="at least 2"):
        cross_section(case, (-20.0, 40.0), (0.0, 50.0), npoints=1)


def test_section_dict_round_trip():
    s = Section((-20.5, 40.0), (3.0, 55.0), "across the trough", 80)
    assert Section.from_dict(s.to_dict()) == s
    with pytest.raises(InputError, match="start"):
        Section.from_dict({"end": [1, 2]})
