"""Southern-hemisphere storms: the mirror image of a northern case (latitude -> -latitude,
v -> -v; temperature, geopotential, u, humidity and sea-level pressure unchanged) must give the
same standard analysis, with the signs that flip under the mirror flipped.

Why these are the right answers (common practice / textbook symmetry, Holton & Hakim, An
Introduction to Dynamic Meteorology, 5th ed., ch. 4 and 6): under y -> -y with f -> -f the
geostrophic and hydrostatic relations are unchanged when v -> -v, Ertel and QG PV change sign,
relative vorticity changes sign, heights and u do not. So the balanced height of every piece,
and each piece's share, must equal the northern original.
"""
from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

import workbench as wb
from workbench.analysis import analyse, cyclonic_sign, standard_pieces, storm_centre
from workbench.analysis import default_case_path


def _mirror(ds: xr.Dataset) -> xr.Dataset:
    """The southern mirror image of a normalised northern dataset (a fixture)."""
    out = ds.assign_coords(latitude=-ds["latitude"].values)
    out["v"] = out["v"].copy(data=-out["v"].values)
    out["latitude"].attrs = dict(ds["latitude"].attrs)
    return out.sortby("latitude")


@pytest.fixture(scope="module")
def cases():
    # the invented sample storm, two times to keep the test short (reference = their mean)
    north_data = wb.open_case(default_case_path()).data.isel(time=[4, 6]).load()
    north = wb.open_case(north_data.copy())
    south = wb.open_case(_mirror(north_data))
    return north, south


def test_coriolis_and_hemisphere_signs(cases):
    north, south = cases
    assert north.f0 > 0 and south.f0 < 0
    np.testing.assert_allclose(south.f0, -north.f0, rtol=1e-12)
    assert cyclonic_sign(north) == 1 and cyclonic_sign(south) == -1
    assert cyclonic_sign([-70.0, -30.0]) == -1 and cyclonic_sign([30.0, 70.0]) == 1
    assert [p.sign for p in standard_pieces(hemisphere=-1)][:2] == [-1, -1]
    assert [p.sign for p in standard_pieces(hemisphere="north")][:2] == [1, 1]
    with pytest.raises(wb.errors.InputError, match="hemisphere"):
        standard_pieces(hemisphere=0)


def test_ertel_pv_and_tropopause_mirror(cases):
    north, south = cases
    pn = north.pv(0).values
    ps = south.pv(0).values[:, ::-1, :]
    # PV changes sign under the mirror (f and the relative vorticity both do)
    np.testing.assert_allclose(ps, -pn, rtol=1e-9, atol=1e-9 * np.nanmax(np.abs(pn)))
    tn = north.tropopause(0)["pressure"].values
    ts = south.tropopause(0)["pressure"].values[::-1, :]
    # the dynamic tropopause is |PV| = 2 PVU with the sign of f: the same pressure
    np.testing.assert_array_equal(np.isfinite(tn), np.isfinite(ts))
    np.testing.assert_allclose(ts[np.isfinite(ts)], tn[np.isfinite(tn)], rtol=1e-9)


def test_storm_centre_and_standard_shares_mirror(cases):
    north, south = cases
    lon_n, lat_n = storm_centre(north, 0)
    lon_s, lat_s = storm_centre(south, 0)
    assert (lon_s, lat_s) == (lon_n, -lat_n)
    _, tab_n, target_n = analyse(north, 0)
    _, tab_s, target_s = analyse(south, 0)
    assert target_s == (target_n[0], -target_n[1], target_n[2])
    assert list(tab_n.index) == list(tab_s.index)
    scale = float(np.abs(tab_n["height_anomaly"]).max())
    np.testing.assert_allclose(tab_s["height_anomaly"], tab_n["height_anomaly"], rtol=1e-6, atol=1e-6 * scale)
    np.testing.assert_allclose(tab_s["height_share_pct"], tab_n["height_share_pct"], rtol=1e-6, atol=1e-4)
    np.testing.assert_allclose(tab_s["vorticity_share_pct"], tab_n["vorticity_share_pct"], rtol=1e-6, atol=1e-4)
    np.testing.assert_allclose(tab_s["u"], tab_n["u"], rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(tab_s["v"], -tab_n["v"], rtol=1e-6, atol=1e-6)
    vmax = float(np.abs(tab_n["relative_vorticity"]).max())
    np.testing.assert_allclose(tab_s["relative_vorticity"], -tab_n["relative_vorticity"], rtol=1e-6,
                               atol=1e-6 * vmax)
    # the upper trough claims a real share (the sample's upper trough is a main contributor)
    assert abs(tab_n.loc["upper trough", "height_share_pct"]) > 5.0


def test_northern_signs_in_the_south_give_other_shares(cases):
    """Negative control: the northern signs applied to the southern mirror pick the
    anticyclonic anomalies, so the shares differ (what the hemisphere rule fixes)."""
    north, south = cases
    _, tab_n, target = analyse(north, 0)
    target_s = (target[0], -target[1], target[2])
    _, tab_wrong, _ = analyse(south, 0, pieces=standard_pieces(hemisphere=1), target=target_s)
    assert abs(tab_wrong.loc["upper trough", "height_share_pct"]
               - tab_n.loc["upper trough", "height_share_pct"]) > 5.0


def test_briefing_state_uses_the_southern_sign(cases):
    from workbench.brief import standard_state

    _, south = cases
    st = standard_state(south, 0)
    interior = [p for p in st.pieces if p.kind == "interior"]
    assert interior and all(p.sign == -1 for p in interior)
    assert st.target[1] < 0
