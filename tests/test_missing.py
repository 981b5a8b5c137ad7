"""Scattered missing values (not terrain): small gaps are filled from neighbours on the same level,
flagged and counted; large gaps stay missing and the inversion refuses them; shares whose
denominator is near zero are not given.

Files are written here with xarray (``_FillValue``) from the synthetic wave fixture.
"""
from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

import workbench as wb
from workbench import physics
from workbench.analysis import analyse
from workbench.errors import InputError
from workbench.inversion.pieces import SHARE_FLOORS, attribution, format_share

from conftest import wave_dataset

VARS = ("t", "u", "v", "z", "r")


def _holes(ds, mask):
    out = ds.copy()
    for n in VARS:
        out[n] = ds[n].where(~xr.DataArray(mask, dims=ds[n].dims))
    return out


def _write(ds, path):
    ds.to_netcdf(path, encoding={n: {"_FillValue": -9999.0} for n in ds.data_vars})
    return path


@pytest.fixture(scope="module")
def complete():
    return wb.open_case(wave_dataset())


@pytest.mark.parametrize("fraction", [0.01, 0.10])
def test_random_missing_points_cost_only_their_neighbourhood(complete, tmp_path, fraction):
    full = wave_dataset()
    rng = np.random.default_rng(7)
    mask = rng.random(full["t"].shape) < fraction
    mask[:, 0] = False  # keep this test about scattered gaps, not the lowest level (terrain rule)
    case = wb.open_case(_write(_holes(full, mask), tmp_path / f"holes{fraction}.nc"))
    # flagged and counted: every missing point was filled (no gap larger than the limit here)
    filled = np.stack([case.filled_points(t).values for t in range(2)])
    assert filled.sum() == mask.sum()
    assert not case.below_ground(0).values.any()
    assert any(f"{mask.sum()} scattered points" in n for n in case.notes), case.notes
    # the 320 K PV map: nothing lost, values close to the complete file's
    want = complete.map_field("ertel_pv", 320.0, 1)
    got = case.map_field("ertel_pv", 320.0, 1)
    lost = float((got.isnull() & want.notnull()).mean())
    print(f"{fraction:.0%} missing: 320 K PV map missing {100 * lost:.2f} %")
    assert lost == 0.0
    scale = float(np.abs(want).max())
    err = np.abs(got - want).values
    assert np.nanpercentile(err, 99) < (0.02 if fraction < 0.05 else 0.05) * scale
    # attribution: finite shares, close to the complete file's
    _, ref, target = analyse(complete, 1)
    _, tab, _ = analyse(case, 1, target=target)
    d = np.abs(tab["height_share_pct"] - ref["height_share_pct"]).max()
    print(f"{fraction:.0%} missing: largest share change {d:.2f} points; shares "
          f"{tab['height_share_pct'].min():.1f}..{tab['height_share_pct'].max():.1f} %")
    assert d < (2.0 if fraction < 0.05 else 15.0)


def test_fill_is_exact_for_a_linear_field():
    # Linear interpolation reproduces a field linear in longitude and latitude exactly
    # (analytic), for an isolated point and for a 3x3 cluster.
    lat = np.arange(30.0, 50.01, 1.0)
    lon = np.arange(-20.0, 20.01, 1.0)
    la, lo = np.meshgrid(lat, lon, indexing="ij")
    lin = 250.0 + 0.3 * lo - 0.7 * la
    p = np.array([100000.0, 85000.0, 70000.0])
    field = np.broadcast_to(lin, (3,) + lin.shape).copy()
    ds = xr.Dataset({n: (("pressure", "latitude", "longitude"), field.copy()) for n in
                     ("temperature", "geopotential", "u", "v")},
                    coords=dict(pressure=p, latitude=lat, longitude=lon))
    holes = np.zeros(field.shape, bool)
    holes[1, 5, 5] = True
    holes[1, 10:13, 20:23] = True
    holes[2, 0, 7] = True  # on the domain edge: only the longitude interpolant exists
    for n in ds.data_vars:
        ds[n] = ds[n].where(~xr.DataArray(holes, dims=ds[n].dims))
    out, info = physics.complete_fields(ds)
    assert info["n_filled"] == holes.sum() and info["n_gap_points"] == 0
    np.testing.assert_allclose(out["temperature"].values, field, rtol=0, atol=1e-9)


def test_large_gap_stays_missing_and_the_inversion_refuses(tmp_path):
    full = wave_dataset()
    mask = np.zeros(full["t"].shape, bool)
    mask[0, 6, 8:14, 20:26] = True  # 36 points on one level at the first time
    case = wb.open_case(_write(_holes(full, mask), tmp_path / "big_gap.nc"))
    assert case.missing_info(0)["n_gap_points"] == 36
    assert any("gaps larger" in n for n in case.notes)
    with pytest.raises(InputError, match="gaps larger than 9 points"):
        case.anomaly(0)
    # maps: the gap costs at most its own neighbourhood (one grid length around it)
    k = 6
    pv = case.pv(0).isel(pressure=k).values
    from scipy import ndimage

    near = ndimage.binary_dilation(mask[0, k], iterations=1)
    assert np.isnan(pv[mask[0, k]]).all()
    assert np.isfinite(pv[~near]).all()
    # the other time is complete and works
    assert np.isfinite(case.anomaly(1)["qgpv_anomaly"].values[:, 1:-1, 1:-1]).all()


def _fake_results(full_height, pieces_height):
    lat = np.array([40.0, 41.0, 42.0])
    lon = np.array([0.0, 1.0, 2.0])
    p = np.array([100000.0, 90000.0])

    def ds(h, zeta):
        shape = (2, 3, 3)
        return xr.Dataset({"height_anomaly": (("pressure", "latitude", "longitude"), np.full(shape, h)),
                           "u": (("pressure", "latitude", "longitude"), np.zeros(shape)),
                           "v": (("pressure", "latitude", "longitude"), np.zeros(shape)),
                           "relative_vorticity": (("pressure", "latitude", "longitude"), np.full(shape, zeta))},
                          coords=dict(pressure=p, latitude=lat, longitude=lon))

    res = {f"piece {k}": ds(h, 1e-5 * (k + 1)) for k, h in enumerate(pieces_height)}
    res["total"] = ds(full_height, 1e-5 * sum(k + 1 for k in range(len(pieces_height))))
    return res


def test_share_with_near_zero_denominator_is_not_given():
    # pieces of +400 and -399.5 m: the full anomaly 0.5 m is below the 1 m floor
    res = _fake_results(0.5, [400.0, -399.5])
    tab = attribution(res, 1.0, 41.0, 950.0)
    assert tab["height_share_pct"].isna().all()
    assert tab["vorticity_share_pct"].notna().all()
    assert any("height anomaly" in n and "1 m" in n for n in tab.attrs["share_notes"])
    assert format_share(tab.loc["piece 0", "height_share_pct"]) == "\u2014"
    assert format_share(tab.loc["piece 0", "vorticity_share_pct"]) != "\u2014"
    # the relative floor: 20 m against pieces of 1000 m cancelling (5 % = 50 m)
    tab = attribution(_fake_results(20.0, [1010.0, -990.0]), 1.0, 41.0, 950.0)
    assert tab["height_share_pct"].isna().all()
    # an ordinary case keeps its shares and they add up to 100 %
    tab = attribution(_fake_results(30.0, [20.0, 10.0]), 1.0, 41.0, 950.0)
    assert tab.loc["piece 0", "height_share_pct"] == pytest.approx(100 * 20 / 30)
    assert not tab.attrs["share_notes"]
    assert SHARE_FLOORS["relative_vorticity"] == 1e-6


def test_cli_table_shows_a_dash(tmp_path, capsys):
    # two times, almost identical: every anomaly is tiny, so no share can be given
    full = wave_dataset()
    full = full.isel(time=[0, 0]).assign_coords(time=full["time"].values)
    full["z"] = full["z"] + xr.DataArray([0.0, 1e-2], dims="time")
    path = _write(full, tmp_path / "calm.nc")
    from workbench.analysis import main

    main(["invert", str(path), "--time", "0", "--quiet"])
    out = capsys.readouterr().out
    assert "\u2014" in out and "nan" not in out.lower().replace("nana", "")


def test_share_rounding_to_zero_has_no_sign():
    # "-0.0 %" would read as a (tiny) negative share; Python's format keeps the sign of -0.004
    assert format(-0.004, ".1f") == "-0.0"
    assert format_share(-0.004) == "0.0" and format_share(-0.4, ".0f") == "0"
    assert format_share(-0.06) == "-0.1" and format_share(-3.4, ".0f") == "-3"
    assert format_share(0.04) == "0.0"
