"""Pieces that follow the weather (workbench.tracking).

Fixture: Gaussian QG PV blobs on a resting U.S. Standard Atmosphere 1976 column plus a
solid-body westerly (uniform angular velocity, so a blob it advects is shifted by the same
number of degrees of longitude at every latitude). Each time is built with the package's own
inversion engine on a domain wider than the case (so the case's lateral boundary carries the
blob's far field) and cut to the case's window. Invented data, fixtures only.
"""
from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

import workbench as wb
from workbench.errors import InputError, PieceError
from workbench.export import read_csv
from workbench.inversion.pieces import Piece, polygon_mask
from workbench.tracking import outline_polygon, track_piece, tracked_shares

from conftest import ussa_temperature_height
from workbench.units import EARTH_RADIUS, G, OMEGA

LEVELS = np.array([1000, 900, 800, 700, 600, 500, 400, 300, 250, 200, 150, 100], dtype=float)
LAT = np.arange(30.0, 60.01, 1.0)
LON = np.arange(-40.0, 40.01, 1.0)
WIDE = np.arange(-75.0, 75.01, 1.0)  # the domain each time is inverted on
STEP_DEG = 4.0  # longitude shift per 6 h of the solid-body westerly
U45 = np.deg2rad(STEP_DEG) * EARTH_RADIUS * np.cos(np.deg2rad(45.0)) / 21600.0  # m/s at 45 N


def _background():
    """Temperature, geopotential, u of the background on (pressure, lat, lon) of the wide grid."""
    p = LEVELS * 100.0
    t, h = ussa_temperature_height(p)
    la = np.deg2rad(LAT)[None, :, None]
    # solid-body westerly u = U45 cos(lat)/cos(45) in gradient-free geostrophic balance with f(lat):
    # dZ/dlat = -f a u  ->  Z = -Omega a U45 sin^2(lat) / cos(45)
    u0 = U45 / np.cos(np.deg2rad(45.0))
    z = h[:, None, None] * G - OMEGA * EARTH_RADIUS * u0 * np.sin(la) ** 2
    shape = (p.size, LAT.size, WIDE.size)
    return (np.broadcast_to(t[:, None, None], shape), np.broadcast_to(z, shape),
            np.broadcast_to(u0 * np.cos(la), shape))


def _blob_q(blobs):
    """QG PV anomaly (s-1) of Gaussian blobs [(lon, lat, hPa, amplitude s-1, radius deg)] on the wide grid."""
    pp, la, lo = np.meshgrid(LEVELS, LAT, WIDE, indexing="ij")
    q = np.zeros(pp.shape)
    for lon, lat, phpa, amp, rad in blobs:
        q += amp * np.exp(-(((lo - lon) / rad) ** 2 + ((la - lat) / rad) ** 2) - ((pp - phpa) / 150.0) ** 2)
    return q


def blob_dataset(blobs_per_time):
    """A case Dataset with one time per entry of ``blobs_per_time`` and its background (reference)."""
    from workbench import physics
    from workbench.inversion.fields import central_f0, invert_qgpv

    t_bg, z_bg, u_bg = _background()
    coords = dict(pressure=LEVELS * 100.0, latitude=LAT, longitude=WIDE)
    temp = xr.DataArray(t_bg, dims=("pressure", "latitude", "longitude"), coords=coords)
    sigma = physics.static_stability(temp)
    f0 = central_f0(LAT)
    T, Z, U, V = [], [], [], []
    for blobs in blobs_per_time:
        q = xr.DataArray(_blob_q(blobs), dims=temp.dims, coords=coords)
        bal = invert_qgpv(q, sigma=sigma, f0=f0)
        T.append(t_bg + bal["temperature_anomaly"].values)
        Z.append(z_bg + bal["geopotential_anomaly"].values)
        U.append(u_bg + np.nan_to_num(bal["u"].values))
        V.append(np.nan_to_num(bal["v"].values))
    cut = slice(int(np.argmin(abs(WIDE - LON[0]))), int(np.argmin(abs(WIDE - LON[-1]))) + 1)
    times = np.datetime64("2040-01-01T00") + np.arange(len(blobs_per_time)) * np.timedelta64(6, "h")
    dims = ("time", "level", "lat", "lon")

    def ds(t, z, u, v, tt):
        return xr.Dataset(
            dict(t=(dims, np.asarray(t)[..., cut].astype("float64"), dict(units="K")),
                 z=(dims, np.asarray(z)[..., cut].astype("float64"), dict(units="m2 s-2", standard_name="geopotential")),
                 u=(dims, np.asarray(u)[..., cut].astype("float64"), dict(units="m s-1")),
                 v=(dims, np.asarray(v)[..., cut].astype("float64"), dict(units="m s-1"))),
            coords=dict(time=tt, level=("level", LEVELS, dict(units="hPa")),
                        lat=("lat", LAT, dict(units="degrees_north")), lon=("lon", LON, dict(units="degrees_east"))),
            attrs=dict(title="Gaussian PV blobs in a solid-body westerly (invented test fixture)"))

    data = ds(T, Z, U, V, times)
    ref = ds([t_bg], [z_bg], [u_bg], [np.zeros_like(u_bg)], times[:1])
    return data, ref


AMP = 6e-5  # s-1


def _box(lon, lat, half=6.0):
    return [(lon - half, lat - half), (lon + half, lat - half), (lon + half, lat + half), (lon - half, lat + half)]


@pytest.fixture(scope="module")
def advected():
    n = 5
    blobs = [[(-16.0 + STEP_DEG * k, 45.0, 350.0, AMP, 5.0)] for k in range(n)]
    data, ref = blob_dataset(blobs)
    return wb.open_case(data), ref, n


def _blob_piece(follow, threshold=0.5):
    return Piece("blob", kind="interior", layer=(600.0, 100.0), sign=1, threshold=threshold,
                 polygon=_box(-16.0, 45.0), follow=follow)


def test_outline_holds_exactly_the_region():
    # the 0.5 contour of a filled region holds its grid points and no other (even-odd rule)
    rng = np.random.default_rng(3)
    lon, lat = np.arange(0.0, 30.0), np.arange(40.0, 60.0)
    for _ in range(20):
        from scipy import ndimage

        seeds = rng.random((lat.size, lon.size)) > 0.7
        seeds[:2] = seeds[-2:] = False
        seeds[:, :2] = seeds[:, -2:] = False
        labels, n = ndimage.label(ndimage.binary_dilation(seeds))
        if n == 0:
            continue
        sizes = ndimage.sum_labels(np.ones_like(labels), labels, range(1, n + 1))
        region = ndimage.binary_fill_holes(labels == 1 + int(np.argmax(sizes)))
        poly = outline_polygon(region, lon, lat)
        assert np.array_equal(polygon_mask(poly, lon, lat), region)
    # a region touching the domain edge is closed by the padding
    region = np.zeros((lat.size, lon.size), bool)
    region[:5, :7] = True
    assert np.array_equal(polygon_mask(outline_polygon(region, lon, lat), lon, lat), region)


def test_blob_tracked_at_every_time_share_constant(advected):
    case, ref, n = advected
    steps = track_piece(case, _blob_piece("anomaly"), time=0, reference=ref)
    assert [s.time for s in steps] == list(range(n))
    assert all(s.piece is not None for s in steps)
    # the outline moves with the blob: its mean longitude advances by the wind's shift each time
    # (the blob's centre advances STEP_DEG per time by construction)
    centres = [np.mean([x for x, _ in s.piece.polygon]) for s in steps]
    assert np.allclose(np.diff(centres), STEP_DEG, atol=0.6), centres
    tracked = tracked_shares(case, [_blob_piece("anomaly")], target="centroid", reference=ref)
    rows = tracked[tracked.piece == "blob"]
    # the fixed outline read at the same points (the blob's centre at each time)
    points = {int(r.time_index): (r.target_lon, r.target_lat, r.target_hpa) for r in rows.itertuples()}
    fixed = tracked_shares(case, [_blob_piece("fixed")], target=lambda ti, _: points[ti], reference=ref)
    t_share = rows["height_share_pct"].to_numpy()
    f_share = fixed[fixed.piece == "blob"]["height_share_pct"].to_numpy()
    # the target follows the blob's centre
    assert np.allclose(np.diff(rows.target_lon), STEP_DEG, atol=0.01)
    # the region keeps its size (the drawn box holds the whole region at the start)
    assert rows.region_points.nunique() == 1 and rows.region_points.iloc[0] > 50
    # the share is invariant under translation along a latitude circle (the QG operator has no
    # longitude dependence, common practice); the lateral boundaries, 24..40 degrees away, change it
    # a little as the blob moves (measured 0.3 points)
    assert t_share[0] > 20.0
    assert np.ptp(t_share) < 1.0, t_share
    # the fixed outline loses the blob
    assert f_share[-1] < 0.5 * f_share[0], f_share
    assert list(tracked.status[tracked.piece == "blob"]) == ["start"] + ["tracked"] * (n - 1)


def test_split_reported_largest_kept():
    blobs = [[(0.0, 45.0, 350.0, AMP, 5.0)],
             [(-5.0, 45.0, 350.0, 1.3 * AMP, 3.0), (5.0, 45.0, 350.0, 0.8 * AMP, 3.0)]]
    data, ref = blob_dataset(blobs)
    case = wb.open_case(data)
    piece = Piece("blob", layer=(600.0, 100.0), threshold=0.5, polygon=_box(0.0, 45.0, 8.0), follow="anomaly")
    steps = track_piece(case, piece, time=0, reference=ref)
    assert "split into 2 regions" in steps[1].note
    xs = [x for x, _ in steps[1].piece.polygon]
    assert max(xs) < 0.0  # the stronger, western blob is kept
    table = tracked_shares(case, [piece], reference=ref, target=(0.0, 45.0, 400.0))
    assert table.status.tolist() == ["start", "split"]


def test_merge_reported():
    blobs = [[(-6.0, 45.0, 350.0, AMP, 3.0), (6.0, 45.0, 350.0, AMP, 3.0)],
             [(0.0, 45.0, 350.0, AMP, 6.0)]]
    data, ref = blob_dataset(blobs)
    case = wb.open_case(data)
    piece = Piece("west", layer=(600.0, 100.0), threshold=0.5, polygon=_box(-6.0, 45.0, 4.5), follow="anomaly")
    steps = track_piece(case, piece, time=0, reference=ref)
    assert "merged with 1 other region" in steps[1].note
    east = Piece("east", layer=(600.0, 100.0), threshold=0.5, polygon=_box(6.0, 45.0, 4.5), follow="anomaly")
    table = tracked_shares(case, [piece, east], reference=ref, target=(0.0, 45.0, 400.0))
    later = table[table.time_index == 1].set_index("piece")
    assert "same region as east" in later.loc["west", "note"]
    assert later.loc["west", "status"] == "merged"


def test_loss_stops_tracking_backwards_too():
    blobs = [[(0.0, 45.0, 350.0, 0.0, 5.0)], [(0.0, 45.0, 350.0, AMP, 5.0)],
             [(4.0, 45.0, 350.0, AMP, 5.0)], [(30.0, 45.0, 350.0, AMP, 3.0)], [(30.0, 45.0, 350.0, AMP, 3.0)]]
    data, ref = blob_dataset(blobs)
    case = wb.open_case(data)
    piece = Piece("blob", layer=(600.0, 100.0), threshold=0.5, polygon=_box(0.0, 45.0), follow="anomaly",
                  follow_from=str(case.times[1])[:16])
    steps = track_piece(case, piece, reference=ref)
    assert steps[0].piece is None and steps[0].note.startswith("lost at")
    assert steps[1].note.startswith("start") and steps[2].piece is not None
    assert steps[3].piece is None and steps[3].note.startswith("lost at")
    assert steps[4].piece is None and steps[4].note.startswith("not tracked")
    table = tracked_shares(case, [piece], reference=ref, target=(0.0, 45.0, 400.0))
    assert table.status.tolist() == ["lost", "start", "tracked", "lost", "not tracked"]
    assert np.isnan(table.height_share_pct.iloc[3]) and np.isfinite(table.height_share_pct.iloc[2])


def test_bad_input(advected):
    case, ref, _ = advected
    with pytest.raises(PieceError, match="needs an outline"):
        Piece("x", follow="anomaly")
    with pytest.raises(PieceError, match="cannot follow"):
        Piece("x", kind="lateral", polygon=_box(0, 45), follow="anomaly")
    with pytest.raises(PieceError, match="follow 'moving'"):
        Piece("x", follow="moving")
    with pytest.raises(InputError, match="not a time of the case"):
        track_piece(case, _blob_piece("anomaly"), time="1999-01-01T00")
    with pytest.raises(InputError, match="target 'middle' is unknown"):
        tracked_shares(case, [_blob_piece("anomaly")], target="middle", reference=ref)
    # round trip through the session form
    p = _blob_piece("anomaly")
    assert Piece.from_dict(p.to_dict()) == p


def test_track_command_table_and_plot(tmp_path, capsys):
    import json

    import pandas as pd

    from workbench.cli import main as pvwb

    blobs = [[(-16.0 + STEP_DEG * k, 45.0, 350.0, AMP, 5.0)] for k in range(3)]
    data, ref = blob_dataset(blobs)
    data.to_netcdf(tmp_path / "case.nc")
    ref.to_netcdf(tmp_path / "ref.nc")
    (tmp_path / "pieces.json").write_text(json.dumps([_blob_piece("anomaly").to_dict()]))
    args = ["--quiet", "track", str(tmp_path / "case.nc"), "--pieces", str(tmp_path / "pieces.json"),
            "--reference", str(tmp_path / "ref.nc"), "--target", "centroid",
            "-o", str(tmp_path / "shares.csv"), "--plot", str(tmp_path / "shares.png")]
    assert pvwb(args) == 0
    table = read_csv(tmp_path / "shares.csv")  # skips the caution comment line
    blob = table[table.piece == "blob"]
    assert blob.status.tolist() == ["start", "tracked", "tracked"]
    assert np.ptp(blob.height_share_pct) < 1.0
    assert (tmp_path / "shares.png").stat().st_size > 10_000
    assert "height share" in capsys.readouterr().out
    assert pvwb(args) == 2  # exists, no --overwrite
    assert "already exists" in capsys.readouterr().err
    assert pvwb(["track", str(tmp_path / "case.nc"), "--pieces", str(tmp_path / "pieces.json"),
                 "--target", "middle"]) == 2


def test_tracked_shares_figure(advected):
    from workbench.views.static import figure_text
    from workbench.views.tracks import tracked_shares_figure

    case, ref, n = advected
    table = tracked_shares(case, [_blob_piece("anomaly"), Piece(
        "blob fixed", layer=(600.0, 100.0), threshold=0.5, polygon=_box(-16.0, 45.0))],
        target=(-10.0, 45.0, 300.0), reference=ref)
    fig = tracked_shares_figure(table)
    ax = fig.axes[0]
    assert len([ln for ln in ax.get_lines() if len(ln.get_xdata()) == n]) == 2  # one line per piece
    assert "follows its anomaly" in figure_text(fig)
    with pytest.raises(InputError, match="no piece 'nope'"):
        tracked_shares_figure(table, pieces=["nope"])
