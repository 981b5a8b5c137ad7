"""`pvwb batch` and run_batch with pieces that follow their anomaly.

Fixture (invented, from tests/test_tracking.py): a Gaussian QG PV blob carried east by a
solid-body westerly, 4 degrees of longitude per 6 h, on a resting U.S. Standard Atmosphere 1976
column; the background is written as the climatology reference.
"""
from __future__ import annotations

import json

import numpy as np
import pytest

from workbench.batch import main as batch_main, run_batch, tracked_table
from workbench.errors import InputError
from workbench.export import read_csv
from workbench.inversion.pieces import Piece

from test_tracking import AMP, STEP_DEG, _box, blob_dataset

N = 5


@pytest.fixture(scope="module")
def blob_files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("batch_tracking")
    blobs = [[(-16.0 + STEP_DEG * k, 45.0, 350.0, AMP, 5.0)] for k in range(N)]
    data, ref = blob_dataset(blobs)
    case_path, ref_path = folder / "blob.nc", folder / "blob_reference.nc"
    data.to_netcdf(case_path)
    ref.to_netcdf(ref_path)
    return case_path, ref_path


def _pieces(follow):
    return [Piece("blob", kind="interior", layer=(600.0, 100.0), sign=1, threshold=0.5,
                  polygon=_box(-16.0, 45.0), follow=follow,
                  follow_from="2040-01-01T00:00:00" if follow == "anomaly" else None)]


def _blob_centre(k):
    """Where the blob is at time k (by construction of the fixture), at 350 hPa."""
    return (-16.0 + STEP_DEG * k, 45.0, 350.0)


def test_tracked_blob_share_constant_fixed_outline_loses_it(blob_files):
    case_path, ref_path = blob_files
    tracked = run_batch(case_path, pieces=_pieces("anomaly"), reference=str(ref_path),
                        target=_blob_centre(0))
    tt = tracked_table(tracked)
    blob = tt[tt.piece == "blob"]
    assert len(blob) == N  # a row at every time
    assert list(blob.status) == ["start"] + ["tracked"] * (N - 1)
    # the same run with the outline fixed in place
    fixed = run_batch(case_path, pieces=_pieces("fixed"), reference=str(ref_path), target=_blob_centre(0))
    assert "follow" not in fixed.columns  # no tracking columns without a following piece
    # read both at the blob's centre at each time: one run per time with its own target
    t_share, f_share = [], []
    for k in range(N):
        for pieces, out in ((_pieces("anomaly"), t_share), (_pieces("fixed"), f_share)):
            tab = run_batch(case_path, pieces=pieces, reference=str(ref_path), times=[k], target=_blob_centre(k))
            out.append(float(tab[tab.piece == "blob"].height_share_pct.iloc[0]))
    t_share, f_share = np.array(t_share), np.array(f_share)
    # the share of a blob translated along a latitude circle stays the same (the QG operator has
    # no longitude dependence, common practice); the lateral boundaries change it a little as the
    # blob moves: tolerance 1 point of share
    assert t_share[0] > 20.0
    assert np.ptp(t_share) < 1.0, t_share
    # the fixed outline loses the blob
    assert f_share[-1] < 0.5 * f_share[0], f_share
    print("tracked shares (%):", np.round(t_share, 2), "fixed outline:", np.round(f_share, 2))


def test_batch_command_writes_tracks_table_and_plot(blob_files, tmp_path, capsys):
    case_path, ref_path = blob_files
    pieces_file = tmp_path / "pieces.json"
    pieces_file.write_text(json.dumps([p.to_dict() for p in _pieces("anomaly")]))
    out_csv, tracks_csv, plot = tmp_path / "all.csv", tmp_path / "tracks.csv", tmp_path / "tracks.png"
    rc = batch_main([str(case_path), "--pieces", str(pieces_file), "--reference", str(ref_path),
                     "--target=-16,45,350", "-o", str(out_csv), "--tracks", str(tracks_csv),
                     "--plot", str(plot), "--quiet"])
    assert rc == 0
    text = capsys.readouterr().out
    assert "tracked pieces: height share" in text
    tracks = read_csv(tracks_csv)
    assert list(tracks.columns[:5]) == ["time", "member", "piece", "follow", "status"]
    assert set(tracks.piece) == {"blob", "remainder"}
    blob = tracks[tracks.piece == "blob"]
    assert len(blob) == N and (blob.follow == "anomaly").all()
    from PIL import Image

    with Image.open(plot) as im:
        assert im.size[0] > 600 and im.size[1] > 300
        px = np.asarray(im.convert("L"))
    assert px.std() > 10  # a drawn figure, not a blank page
    # asking for tracks without a following piece is refused before any work
    fixed_file = tmp_path / "fixed.json"
    fixed_file.write_text(json.dumps([p.to_dict() for p in _pieces("fixed")]))
    with pytest.raises(InputError, match="follow their anomaly"):
        batch_main([str(case_path), "--pieces", str(fixed_file), "--tracks", str(tmp_path / "x.csv"), "--quiet"])
    assert not (tmp_path / "x.csv").exists()
