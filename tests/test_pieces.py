"""Pieces: definitions, masks, piecewise inversion (additivity) and the attribution table."""
from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

from workbench.errors import InputError, PieceError
from workbench.inversion.operator import QGGrid, apply_qg_operator
from workbench.inversion.pieces import (
    Piece,
    attribution,
    invert_pieces,
    piece_forcing,
    piece_mask,
    polygon_mask,
)

P = np.array([1000, 925, 850, 700, 600, 500, 400, 300, 250, 200, 150, 100.0]) * 100.0
LAT = np.linspace(32.0, 62.0, 21)
LON = np.linspace(-30.0, 30.0, 31)
F0 = 1.0e-4


def make_anomaly(seed=0, rh=True):
    """Invented anomaly dataset in the layout of Case.anomaly (a fixture, never a check value):
    a smooth random phi', its QG PV anomaly and boundary theta' from the operator itself."""
    rng = np.random.default_rng(seed)
    sig = 2.0e-6 * (P[0] / P) ** 1.5
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        g = QGGrid(LAT, LON, P, sig, F0)
    Pg, Yg, Xg = np.meshgrid(P, LAT, LON, indexing="ij")
    phi = np.zeros(g.shape)
    for _ in range(4):
        x0, y0, p0 = rng.uniform(-20, 20), rng.uniform(40, 55), rng.uniform(20000, 90000)
        phi += rng.uniform(-800, 800) * np.exp(-((Xg - x0) / 8) ** 2 - ((Yg - y0) / 6) ** 2 - ((Pg - p0) / 25000) ** 2)
    bt = rng.uniform(-3, 3) * np.exp(-((Xg[0] - 5) / 10) ** 2 - ((Yg[0] - 45) / 7) ** 2)
    tt = rng.uniform(-3, 3) * np.exp(-((Xg[0] + 5) / 10) ** 2 - ((Yg[0] - 48) / 7) ** 2)
    q = apply_qg_operator(g, phi, bt, tt)
    dims = ("pressure", "latitude", "longitude")
    theta = 300.0 * (P[0] / Pg) ** 0.29
    data = dict(
        qgpv_anomaly=(dims, q, dict(units="s-1")),
        bottom_theta_anomaly=(dims[1:], bt, dict(units="K")),
        top_theta_anomaly=(dims[1:], tt, dict(units="K")),
        geopotential_anomaly=(dims, phi, dict(units="m2 s-2")),
        ertel_pv_anomaly=(dims, np.nan_to_num(q) / 1.0e-5, dict(units="PVU")),
        potential_temperature=(dims, theta, dict(units="K")),
        static_stability=("pressure", sig),
    )
    if rh:
        data["relative_humidity"] = (dims, rng.uniform(20, 100, g.shape), dict(units="%"))
    return xr.Dataset(data, coords=dict(pressure=P, latitude=LAT, longitude=LON), attrs=dict(f0=F0))


ANOM = make_anomaly()


# ----------------------------------------------------------------------------- definitions


def test_piece_round_trip_and_validation():
    p = Piece("upper", polygon=[(-10, 40), (10, 40), (10, 55)], layer=(500, 200), sign=-1, threshold=0.5,
              rh_min=None, colour="#336699")
    d = p.to_dict()
    assert json.loads(json.dumps(d)) == d
    assert Piece.from_dict(json.loads(json.dumps(d))) == p
    assert p.layer == (200.0, 500.0)
    bad = [
        (dict(name="x", kind="middle"), "kind"),
        (dict(name="x", polygon=[(0, 0), (1, 1)]), "at least 3"),
        (dict(name="x", polygon=[(0, 40), (1, 41), (2, 42)]), "no area"),
        (dict(name="x", layer=(500, 500)), "different"),
        (dict(name="x", layer_coord="height"), "layer_coord"),
        (dict(name="x", sign=2), "sign"),
        (dict(name="x", threshold=-1), "threshold"),
        (dict(name="x", rh_min=120), "rh_min"),
        (dict(name="x", shape="round"), "unknown field"),
        (dict(name="total"), "reserved"),
        (dict(name=""), "name"),
    ]
    for d, msg in bad:
        with pytest.raises(PieceError, match=msg):
            Piece.from_dict(d)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), nvert=st.integers(3, 9))
def test_polygon_mask_matches_matplotlib_path(seed, nvert):
    # Reference: matplotlib.path.Path.contains_points (even-odd / non-zero agree for simple polygons);
    # vertices at random non-grid positions so no grid point lies on an edge.
    from matplotlib.path import Path

    rng = np.random.default_rng(seed)
    ang = np.sort(rng.uniform(0, 2 * np.pi, nvert))
    rad = rng.uniform(3.3, 17.7, nvert)
    poly = np.c_[0.37 + rad * np.cos(ang), 47.13 + 0.8 * rad * np.sin(ang)]
    mask = polygon_mask(poly, LON, LAT)
    X, Y = np.meshgrid(LON, LAT)
    ref = Path(poly).contains_points(np.c_[X.ravel(), Y.ravel()]).reshape(X.shape)
    np.testing.assert_array_equal(mask, ref)
    # the same polygon in 0..360 longitudes selects the same points of a -180..180 grid
    np.testing.assert_array_equal(polygon_mask(np.c_[poly[:, 0] + 360.0, poly[:, 1]], LON, LAT), mask)


def test_piece_mask_layer_sign_threshold_and_moisture():
    e = ANOM["ertel_pv_anomaly"]
    m = piece_mask(Piece("a", layer=(250, 500), sign=1, threshold=0.2), ANOM)
    assert m.dims == ("pressure", "latitude", "longitude") and m.dtype == bool and bool(m.any())
    php = ANOM["pressure"] / 100
    expected_layer = (php >= 250) & (php <= 500)
    assert not bool((m & ~expected_layer).any())
    assert bool(((e >= 0.2) == m).where(expected_layer, True).all())
    neg = piece_mask(Piece("b", sign=-1, threshold=0.1), ANOM)
    assert bool((e.where(neg) <= -0.1).where(neg, True).all()) and bool(neg.any())
    moist = piece_mask(Piece("c", sign=0, rh_min=80), ANOM)
    assert bool((ANOM["relative_humidity"].where(moist) >= 80).where(moist, True).all())
    assert bool((moist | (ANOM["relative_humidity"] < 80)).all())
    th = piece_mask(Piece("d", sign=0, layer=(310, 330), layer_coord="theta"), ANOM)
    t = ANOM["potential_temperature"]
    assert bool((th == ((t >= 310) & (t <= 330))).all())
    with pytest.raises(PieceError, match="relative_humidity"):
        piece_mask(Piece("e", rh_min=80), make_anomaly(rh=False))


def test_boundary_piece_forcing_has_one_entry():
    f = piece_forcing(Piece("sfc", kind="bottom", polygon=[(-20, 35), (20, 35), (20, 55), (-20, 55)], sign=0), ANOM)
    assert np.abs(f["bottom_theta"]).max() > 0
    assert not f["q"].any() and not f["top_theta"].any() and not f["lateral"].any()
    inside = polygon_mask([(-20, 35), (20, 35), (20, 55), (-20, 55)], LON, LAT)
    assert not f["bottom_theta"][~inside].any()


# ----------------------------------------------------------------------------- inversion


def _sum_of_pieces(res, var="geopotential_anomaly"):
    return sum(ds[var] for name, ds in res.items() if name != "total")


piece_strategy = st.builds(
    lambda kind, x0, y0, w, lo, hi, sign, thr, use_poly: Piece(
        name="p",
        kind=kind,
        polygon=[(x0, y0), (x0 + w, y0), (x0 + w, y0 + 0.8 * w), (x0, y0 + 0.8 * w)] if use_poly else None,
        layer=(lo, lo + hi) if kind == "interior" else None,
        sign=sign,
        threshold=thr,
    ),
    kind=st.sampled_from(["interior", "interior", "bottom", "top", "lateral"]),
    x0=st.floats(-30, 10), y0=st.floats(32, 50), w=st.floats(4, 30),
    lo=st.floats(100, 900), hi=st.floats(50, 600), sign=st.sampled_from([-1, 0, 1]),
    thr=st.floats(0, 1), use_poly=st.booleans(),
)


@settings(max_examples=20, deadline=None)
@given(pieces=st.lists(piece_strategy, min_size=0, max_size=5))
def test_pieces_add_up_to_full_inversion(pieces):
    # Piecewise inversion (Davis & Emanuel 1991): QG inversion is linear, so any partition of the
    # forcing (interior q', boundary theta', lateral data) adds up to the full inversion.
    for i, p in enumerate(pieces):
        p.name = f"p{i}"
    res = invert_pieces(ANOM, pieces)
    assert list(res)[-2:] == ["remainder", "total"]
    total = res["total"]
    for var in ("geopotential_anomaly", "u", "v", "temperature_anomaly"):
        scale = float(np.abs(total[var]).max())
        assert float(np.abs(_sum_of_pieces(res, var) - total[var]).max()) <= 1e-10 * scale


def test_full_inversion_reproduces_phi_and_first_claim_wins():
    # Closure: the anomaly's own q', theta' and lateral phi' invert back to its phi' (round-off,
    # since the fixture's q' comes from the same operator).
    a = Piece("a", polygon=[(-20, 38), (5, 38), (5, 56), (-20, 56)])
    b = Piece("b", polygon=[(-5, 40), (20, 40), (20, 58), (-5, 58)])
    res = invert_pieces(ANOM, [a, b])
    phi = ANOM["geopotential_anomaly"].values
    assert np.abs(res["total"]["geopotential_anomaly"].values - phi).max() <= 1e-9 * np.abs(phi).max()
    # overlapping interior pieces: the first in the list claims the overlap
    ma, mb = piece_mask(a, ANOM).values, piece_mask(b, ANOM).values
    assert (ma & mb).any()
    q = np.nan_to_num(ANOM["qgpv_anomaly"].values)
    only_b = Piece("b", polygon=b.polygon)
    qb_alone = piece_forcing(only_b, ANOM)["q"]
    res_ba = invert_pieces(ANOM, [b, a])
    # b alone (first in the list) equals b's own forcing inverted
    alone = invert_pieces(ANOM, [only_b])["b"]["geopotential_anomaly"]
    np.testing.assert_allclose(res_ba["b"]["geopotential_anomaly"], alone, atol=1e-9 * np.abs(phi).max())
    assert np.abs(res["b"]["geopotential_anomaly"] - alone).max() > 1e-6 * np.abs(phi).max()
    assert np.abs(qb_alone - np.where(mb, q, 0)).max() == 0
    # the remainder holds what the pieces left: boundary theta' and lateral data here
    assert res["remainder"].attrs["kind"] == "remainder"


def test_remainder_piece_name_and_errors():
    res = invert_pieces(ANOM, [Piece("rest", kind="remainder"), Piece("up", layer=(100, 400))])
    assert list(res) == ["up", "rest", "total"]
    with pytest.raises(PieceError, match="only one remainder"):
        invert_pieces(ANOM, [Piece("r1", kind="remainder"), Piece("r2", kind="remainder")])
    with pytest.raises(PieceError, match="share this name"):
        invert_pieces(ANOM, [Piece("x"), Piece("x", kind="bottom")])
    with pytest.raises(PieceError, match="kept for the remainder"):
        invert_pieces(ANOM, [Piece("remainder", kind="bottom")])


def test_attribution_rows_sum_to_full_inversion():
    pieces = [Piece("upper", layer=(100, 450)), Piece("lower", layer=(600, 1000)), Piece("sfc", kind="bottom"),
              Piece("lid", kind="top"), Piece("edge", kind="lateral")]
    res = invert_pieces(ANOM, pieces)
    tab = attribution(res, 2.3, 46.1, 850.0)
    assert list(tab.index) == ["upper", "lower", "sfc", "lid", "edge", "remainder", "sum of pieces", "full inversion"]
    rows = tab.drop(index=["sum of pieces", "full inversion"])
    for col in ("height_anomaly", "u", "v", "relative_vorticity"):
        full = tab.loc["full inversion", col]
        assert abs(rows[col].sum() - full) <= 1e-9 * max(abs(rows[col]).max(), 1e-30)
    assert rows["height_share_pct"].sum() == pytest.approx(100.0, rel=1e-8)
    # at a grid node the interpolated value is the node value
    at_node = attribution(res, float(LON[14]), float(LAT[9]), 500.0)
    assert at_node.loc["upper", "height_anomaly"] == pytest.approx(
        float(res["upper"]["height_anomaly"].sel(pressure=50000.0).isel(latitude=9, longitude=14)), rel=1e-12)
    assert "bilinear" in tab.attrs["interpolation"]
    with pytest.raises(InputError, match="outside the domain"):
        attribution(res, 100.0, 45.0, 850.0)
