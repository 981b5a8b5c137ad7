"""Batch over times on a real Dask cluster on loopback, against the serial run."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import workbench as wb
from workbench.batch import run_batch


def test_batch_serial_matches_single_analyses(small_case_path):
    from workbench.analysis import analyse

    table = run_batch(small_case_path)
    case = wb.open_case(small_case_path)
    assert sorted(table["time"].unique()) == sorted(str(t)[:19] for t in case.times)
    for ti in range(case.times.size):
        _, one, _ = analyse(case, ti)
        rows = table[table["time"] == str(case.times[ti])[:19]].set_index("piece")
        np.testing.assert_allclose(rows.loc[one.index, "height_anomaly"], one["height_anomaly"], rtol=1e-12)
        # the pieces add up to the full inversion at the target (linearity of QG inversion,
        # Davis & Emanuel 1991)
        pieces = rows.drop(index=["sum of pieces", "full inversion"])
        assert abs(pieces["height_anomaly"].sum() - rows.loc["full inversion", "height_anomaly"]) < 1e-8


def test_batch_on_local_dask_cluster(small_case_path):
    distributed = pytest.importorskip("dask.distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1", processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        assert all(addr.startswith("tcp://127.0.0.1") for addr in client.scheduler_info()["workers"])
        par = run_batch(small_case_path, client=client)
    ser = run_batch(small_case_path)
    pd.testing.assert_frame_equal(par.reset_index(drop=True), ser.reset_index(drop=True), rtol=1e-10)


def test_batch_cli_writes_table(small_case_path, tmp_path, capsys):
    from workbench.cli import main

    out = tmp_path / "table.csv"
    assert main(["batch", str(small_case_path), "-o", str(out)]) == 0
    df = pd.read_csv(out)
    assert {"time", "piece", "height_anomaly", "height_share_pct"} <= set(df.columns)
    # refuses to overwrite without --overwrite, and says so in one line
    assert main(["batch", str(small_case_path), "-o", str(out)]) == 2
    assert "already exists" in capsys.readouterr().err


def test_batch_store_is_resumable(small_case_path, tmp_path, monkeypatch):
    import zarr

    import workbench.batch as batch

    store = tmp_path / "run.zarr"
    plain = run_batch(small_case_path)
    first = run_batch(small_case_path, store=store)
    pd.testing.assert_frame_equal(first, plain, rtol=1e-12)
    g = zarr.open_group(str(store), mode="r+")
    assert g["done"][...].tolist() == [[1], [1]]
    g["done"][1, 0] = 0  # as if the run had stopped before the second time
    calls = []
    real = batch._one
    monkeypatch.setattr(batch, "_one", lambda path, ti, *a: calls.append(ti) or real(path, ti, *a))
    again = run_batch(small_case_path, store=store)
    assert calls == [1]  # only the unfinished time ran
    pd.testing.assert_frame_equal(again, plain, rtol=1e-12)
    with pytest.raises(wb.InputError, match="other settings"):
        run_batch(small_case_path, store=store, reference="area_mean")


def test_batch_worker_warnings_come_back_once(small_case_path, recwarn):
    # a warning raised inside every task is re-issued once on the client (the CLI's note line)
    import warnings

    from workbench import analysis

    orig = analysis.analyse

    def noisy(*a, **k):
        warnings.warn("invented test warning from a task")
        return orig(*a, **k)

    analysis.analyse = noisy
    try:
        run_batch(small_case_path)
    finally:
        analysis.analyse = orig
    msgs = [str(w.message) for w in recwarn.list if "invented test warning" in str(w.message)]
    assert msgs == ["invented test warning from a task"]
