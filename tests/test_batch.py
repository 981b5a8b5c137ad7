"""Batch over times on a real Dask cluster on loopback, against the serial run."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import workbench as wb
from workbench.batch import run_batch
from workbench.export import read_csv


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
    import os

    distributed = pytest.importorskip("dask.distributed")
    from workbench.batch import local_cluster

    with local_cluster(2) as cluster, distributed.Client(cluster) as client:
        assert all(addr.startswith("tcp://127.0.0.1") for addr in client.scheduler_info()["workers"])
        # the nanny's default MALLOC_TRIM_THRESHOLD_ (which doubles a task's time) is not set
        assert set(client.run(lambda: os.environ.get("MALLOC_TRIM_THRESHOLD_")).values()) == {None}
        par = run_batch(small_case_path, client=client)
    ser = run_batch(small_case_path)
    pd.testing.assert_frame_equal(par.reset_index(drop=True), ser.reset_index(drop=True), rtol=1e-10)


def test_tasks_on_one_single_thread_worker_do_not_deadlock(small_case_path):
    # two tasks queued on one single-thread worker, the case not yet open there: the first
    # opens it (computing Dask arrays), the second waits for it. Computing through the worker's
    # client would secede and never get the thread back (deadlock); tasks compute locally.
    distributed = pytest.importorskip("dask.distributed")
    from workbench.batch import _task, local_cluster

    with local_cluster(1) as cluster, distributed.Client(cluster) as client:
        dask_chunks = {"chunks": {}}  # Dask arrays even for this small file
        futures = [client.submit(_task, str(small_case_path), ti, None, None, None, ("time_mean", None),
                                 dask_chunks, pure=False) for ti in (0, 1)]
        distributed.wait(futures, timeout=60)  # raises TimeoutError on a deadlock
        tables = [f.result()[0] for f in futures]
    assert [t["time"].nunique() for t in tables] == [1, 1]
    assert tables[0]["time"][0] != tables[1]["time"][0]


def test_reference_from_partial_sums_is_the_time_mean(small_case_path):
    # the cluster's time-mean reference (partial sums per worker, summed pairwise) against
    # numpy's nanmean over the complete fields of every time (outside check: NumPy)
    from workbench.batch import _reference_combine, _reference_part, _reference_sum

    case = wb.open_case(small_case_path)
    n = case.times.size
    parts = [_reference_part(str(small_case_path), {}, [(ti, None)]) for ti in range(n)]
    name, ref = _reference_combine("time_mean", [_reference_sum(parts[:1]), _reference_sum(parts[1:])])
    assert name == "time_mean"
    own = case.reference("time_mean")
    for v in ("temperature", "geopotential", "u", "v"):
        stack = np.stack([case._complete(ti, None, store=False)[0][v].values for ti in range(n)])
        np.testing.assert_allclose(ref[v].values, np.nanmean(stack, axis=0), rtol=1e-13)
        np.testing.assert_allclose(ref[v].values, own[v].values, rtol=1e-13)
        assert ref[v].dims == own[v].dims and ref[v].attrs == own[v].attrs


def test_batch_cli_writes_table(small_case_path, tmp_path, capsys):
    from workbench.cli import main

    out = tmp_path / "table.csv"
    assert main(["batch", str(small_case_path), "-o", str(out)]) == 0
    df = read_csv(out)  # skips the caution comment line
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


def test_workers_take_the_clients_census_unless_the_file_changed(small_case_path, tmp_path, monkeypatch):
    # a batch's workers open the file with Case.open_state of the client's open: the
    # missing-value census (which reads every time) and the checksum are not redone, unless the
    # file's size or modification time differ (then everything is examined again)
    import os
    import shutil

    import xarray as xr

    from workbench.case import Case

    path = tmp_path / "gaps.nc"
    ds = xr.open_dataset(small_case_path).load()
    ds["t"].values[0, 3, 5, 7] = np.nan  # one scattered missing value: filled, and said so
    ds.to_netcdf(path)
    case = wb.open_case(path)
    state = case.open_state()
    assert any("Missing values" in n for n in case.notes) and state["census_complete"]
    calls = []
    real = Case._missing_census
    monkeypatch.setattr(Case, "_missing_census", lambda self: calls.append(1) or real(self))
    again = wb.open_case(path, known=state)
    assert calls == [] and again.notes == case.notes and again.checksum == case.checksum
    assert again._census == case._census
    shutil.copy(path, tmp_path / "copy.nc")
    st = os.stat(path)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))  # same bytes, touched
    fresh = wb.open_case(path, known=state)
    assert calls == [1] and fresh.notes == case.notes
    other = wb.open_case(tmp_path / "copy.nc", known=state)  # another file
    assert calls == [1, 1] and other.checksum == case.checksum  # (same bytes, checksummed again)


def test_a_time_the_physics_refuses_leaves_empty_rows_and_the_run_goes_on(small_case_path, tmp_path,
                                                                          capsys, monkeypatch):
    # a DomainError at one time (as nonlinear balance gives where it is not elliptic) leaves that
    # time's rows NaN with the reason in 'refused'; the other times are those of a plain run; a
    # store does not mark the refused time done (a rerun tries it again); the command line lists it
    from workbench import analysis
    from workbench.cli import main
    from workbench.errors import DomainError

    plain = run_batch(small_case_path)
    t1 = sorted(plain["time"].unique())[1]
    orig = analysis.analyse

    def refuse_second(case, ti, *a, **k):
        if str(case.times[ti])[:19] == t1:
            raise DomainError("invented refusal for the test")
        return orig(case, ti, *a, **k)

    monkeypatch.setattr(analysis, "analyse", refuse_second)
    for store in (None, tmp_path / "run.zarr"):
        with pytest.warns(UserWarning, match="refused by the physics"):
            table = run_batch(small_case_path, store=store)
        bad = table[table["time"] == t1]
        assert (bad["refused"] == "invented refusal for the test").all()
        assert bad["height_anomaly"].isna().all() and len(bad) == len(plain[plain["time"] == t1])
        good = table[table["time"] != t1]
        assert (good["refused"] == "").all()
        pd.testing.assert_frame_equal(good.drop(columns="refused").reset_index(drop=True),
                                      plain[plain["time"] != t1].drop(columns="refused")
                                      .reset_index(drop=True), rtol=1e-12)
    import zarr

    assert zarr.open_group(str(tmp_path / "run.zarr"), mode="r")["done"][...].ravel().tolist() == [1, 0]
    assert main(["batch", str(small_case_path), "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "Refused at 1 of 2 time(s)" in out and "invented refusal for the test" in out
