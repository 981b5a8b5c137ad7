"""Batch: the same pieces over every time and ensemble member, serially or on a Dask cluster.

What each task needs is sent once: the case is opened once per worker process (kept by path and
options, :func:`_worker_case`), the reference state is computed once (serially on the client; on
a cluster the time mean as one partial sum per worker, combined by one task, other references
as one task; Dask keeps the result and hands it to every task) and put in that case's cache, so
no task re-reads every time or re-interpolates a climatology. Tasks are the
(time, member) pairs; each runs :func:`workbench.analysis.analyse` and, with ``store=``, writes
its attribution table into its own region of a Zarr store (``done`` flag last), so a rerun skips
finished work. Warnings raised in a task come back with its result and are re-issued on the
client once each (the CLI shows them as one-line notes). Computation only.

Dask arrays of the case are computed inside the task, in the task's own thread (Dask's
synchronous scheduler; :func:`_local_dask`), never handed back to the cluster: a task that
computes through the worker's client secedes from the worker's thread pool and must later rejoin
it, and with one thread per worker a second task holding the slot (waiting for the case this one
is opening) deadlocks the worker. It also saves a scheduler round trip per array read.
"""
from __future__ import annotations

import json
import threading
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import DomainError, InputError

__all__ = ["run_batch", "local_cluster", "main", "COLUMNS", "tracked_table", "TRACK_COLUMNS"]

#: the attribution columns kept per piece row
COLUMNS = ("height_anomaly", "u", "v", "wind_speed", "relative_vorticity", "height_share_pct",
           "vorticity_share_pct")

_CASES: dict = {}
_CASES_LOCK = threading.Lock()
_LOCAL_DASK_SET = False


def _local_dask():
    """Compute Dask arrays in the calling thread from now on in this worker process (Dask's
    synchronous scheduler), instead of through the worker's client; see the module docstring.
    Set once per process and left set (``dask.config`` is process-wide, so a per-task context
    would race between a worker's threads)."""
    global _LOCAL_DASK_SET
    if not _LOCAL_DASK_SET:
        import dask

        dask.config.set(scheduler="synchronous")
        _LOCAL_DASK_SET = True


def _worker_case(path, options, ref_name, ref):
    """The case at ``path`` opened once per process (per options), with the shared reference in
    its cache under ``ref_name``."""
    import workbench as wb

    # ("known": what the client's open established, see Case.open_state; not part of the key)
    key = (path, json.dumps({k: v for k, v in options.items() if k != "known"}, sort_keys=True, default=str))
    with _CASES_LOCK:
        case = _CASES.get(key)
        if case is None:
            case = wb.open_case(path, **options)
            _CASES.clear()  # one case per worker at a time
            _CASES[key] = case
    if ref is not None:
        case._cache.get(("ref", ref_name), lambda: ref)  # case-level entry, kept
    return case


def forget_cases():
    """Drop the cases this process keeps open (``client.run(forget_cases)`` on every worker)."""
    with _CASES_LOCK:
        _CASES.clear()


def _reference(path, options, reference):
    """(name, Dataset): the reference state on the case grid, computed once (a cluster task)."""
    _local_dask()
    case = _worker_case(path, options, None, None)
    return reference, case.reference(reference)


_REF_VARS = ["temperature", "geopotential", "u", "v"]


def _reference_part(path, options, pairs):
    """Partial sums of the time-mean reference over some (time, member) pairs: (total, count),
    NaN skipped as in :meth:`Case.reference` (a cluster task; opens the case on its worker).
    The complete fields read stay in the case's cache (bounded by bytes), so the task of the
    same time on this worker does not read them again."""
    case = _worker_case(path, options, None, None)
    total = n = None
    for ti, mi in pairs:
        ds = case._complete(ti, mi)[0][_REF_VARS]
        ok = ds.notnull().astype("float64")
        total = ds.fillna(0.0) if total is None else total + ds.fillna(0.0)
        n = ok if n is None else n + ok
    for v in _REF_VARS:
        total[v].attrs = dict(case.data[v].attrs)
    return total, n


def _reference_part_task(path, options, pairs):
    """:func:`_reference_part` as a cluster task (Dask arrays computed in the task's thread)."""
    _local_dask()
    return _reference_part(path, options, pairs)


def _reference_sum(parts):
    """The sum of partial sums (total, count) of :func:`_reference_part` (attributes kept)."""
    total = n = None
    for t, c in parts:
        total = t if total is None else total + t
        n = c if n is None else n + c
    for v in _REF_VARS:
        total[v].attrs = dict(parts[0][0][v].attrs)
    return total, n


def _reference_combine(name, parts):
    """(name, Dataset): the time-mean reference from the partial sums of :func:`_reference_part`
    (the same mean as :meth:`Case.reference`, summed in another order)."""
    total, n = _reference_sum(parts)
    mean = total / n.where(n > 0)
    mean = mean.drop_vars([c for c in mean.coords if c not in ("pressure", "latitude", "longitude")])
    for v in _REF_VARS:
        mean[v].attrs = dict(parts[0][0][v].attrs)
    return name, mean.transpose("pressure", "latitude", "longitude")


def _submit_reference(client, path, options, reference, case, todo):
    """(future of (name, reference Dataset), {(time, member): worker}) on the cluster. The time
    mean is split into one partial sum per worker over a block of the tasks' own (time, member)
    pairs first (each worker opens the case meanwhile and keeps the fields it read), summed
    pairwise (a tree, so no worker receives all N partial sums) and divided; the returned placement sends each task to the worker holding its fields. Other
    references are one task (no placement)."""
    if reference != "time_mean":
        return client.submit(_reference, path, options, reference, pure=False), {}
    mems = [None] if case.members is None else range(case.members.size)
    todo_set = set(todo)
    pairs = list(todo) + [(ti, mi) for ti in range(case.times.size) for mi in mems if (ti, mi) not in todo_set]
    workers = list(client.scheduler_info(n_workers=-1)["workers"])
    k = max(1, min(len(workers), len(pairs)))
    bounds = np.linspace(0, len(pairs), k + 1).round().astype(int)
    place, parts = {}, []
    for i, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
        w = [workers[i]] if workers else None
        parts.append(client.submit(_reference_part_task, path, options, pairs[a:b], pure=False, workers=w,
                                   allow_other_workers=True))
        place.update({pair: w for pair in pairs[a:b]})
    while len(parts) > 1:  # summed pairwise: no worker receives every partial sum
        parts = [client.submit(_reference_sum, parts[i:i + 2], pure=False) if i + 1 < len(parts) else parts[i]
                 for i in range(0, len(parts), 2)]
    return client.submit(_reference_combine, reference, parts, pure=False), place


def _task(*args):
    """:func:`_one` as a cluster task (Dask arrays computed in the task's thread)."""
    _local_dask()
    return _one(*args)


def _one(path, ti, mi, pieces, target, ref, options, store=None, balance="qg", floor=False):
    """One (time, member)'s attribution table. A time the physics refuses (DomainError: e.g.
    nonlinear balance not elliptic, or a floored solve that stalled) gives NaN rows with the
    reason in the column ``refused`` instead of ending the run; the reason is also a note."""
    from workbench.analysis import analyse
    from workbench.inversion.pieces import Piece

    ref_name, ref_ds = ref
    refused = None
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        case = _worker_case(path, options, ref_name, ref_ds)
        plist = None if pieces is None else [Piece.from_dict(p) for p in pieces]
        try:
            _, table, tgt = analyse(case, ti, mi, plist, target, ref_name, balance=balance, floor=floor)
        except DomainError as exc:
            refused = str(exc)
    notes = list(dict.fromkeys(str(w.message) for w in caught))
    if refused is not None:
        when = str(case.times[ti])[:16].replace("T", " ") + (
            "" if mi is None else f", member {case.members[mi]}")
        notes.append(f"{when}: refused by the physics, rows left empty (the table's 'refused' "
                     "column says why)")
        rows = _rows(pieces if pieces is not None else [])
        if balance == "nonlinear":
            rows.insert(rows.index("sum of pieces"), "nonlinear remainder")
        table = pd.DataFrame(np.nan, index=pd.Index(rows, name="piece"), columns=list(COLUMNS))
        tgt = (np.nan, np.nan, np.nan)
    if store is not None and refused is None:  # a refused time is tried again by a rerun
        import zarr

        g = zarr.open_group(store, mode="r+")
        rows = g.attrs["rows"]
        g["table"][ti, 0 if mi is None else mi] = table.reindex(rows)[list(COLUMNS)].to_numpy(dtype=float)
        g["target"][ti, 0 if mi is None else mi] = np.asarray(tgt, dtype=float)
        g["done"][ti, 0 if mi is None else mi] = 1
    table = table.reset_index()
    table.insert(0, "member", "" if mi is None else str(case.members[mi]))
    table.insert(0, "time", str(case.times[ti])[:19])
    table["target_lon"], table["target_lat"], table["target_hpa"] = tgt
    table["refused"] = refused or ""
    return table, notes


def _rows(pieces):
    names = [p["name"] for p in pieces if p.get("kind") != "remainder"]
    rem = next((p["name"] for p in pieces if p.get("kind") == "remainder"), "remainder")
    return names + [rem, "sum of pieces", "full inversion"]


def _open_store(store, case, times_all, mems_all, pieces, reference, path):
    """The Zarr store of a run (created, or reopened when its settings match)."""
    import zarr

    settings = dict(source=str(path), checksum=case.checksum or "", reference=str(reference),
                    pieces=json.dumps(pieces, sort_keys=True, default=str),
                    times=[str(t)[:19] for t in case.times],
                    members=[] if case.members is None else [str(m) for m in case.members])
    rows = _rows(pieces)
    shape = (len(times_all), len(mems_all))
    if Path(store).exists():
        g = zarr.open_group(store, mode="r+")
        old = {k: g.attrs.get(k) for k in settings}
        if old != settings:
            diff = ", ".join(k for k in settings if old.get(k) != settings[k])
            raise InputError(f"{store}: this store holds a run with other settings ({diff}); give a new "
                             "store or remove it to start again.")
        return g
    g = zarr.open_group(store, mode="w")
    g.attrs.update(settings, rows=rows, columns=list(COLUMNS))
    g.create_array("table", shape=shape + (len(rows), len(COLUMNS)), dtype="float64",
                   chunks=(1, 1, len(rows), len(COLUMNS)), fill_value=np.nan)
    g.create_array("target", shape=shape + (3,), dtype="float64", chunks=(1, 1, 3), fill_value=np.nan)
    g.create_array("done", shape=shape, dtype="uint8", chunks=(1, 1), fill_value=0)
    return g


def _from_store(g, case, jobs):
    rows, cols = g.attrs["rows"], g.attrs["columns"]
    table, target = g["table"][...], g["target"][...]
    frames = []
    for ti, mi in jobs:
        m = 0 if mi is None else mi
        df = pd.DataFrame(table[ti, m], index=pd.Index(rows, name="piece"), columns=cols).reset_index()
        df.insert(0, "member", "" if mi is None else str(case.members[mi]))
        df.insert(0, "time", str(case.times[ti])[:19])
        df["target_lon"], df["target_lat"], df["target_hpa"] = (float(x) for x in target[ti, m])
        df["refused"] = ""
        frames.append(df)
    return frames


def run_batch(path, *, pieces=None, times=None, members=None, target=None, reference=None,
              client=None, options=None, progress=False, store=None, balance="qg", floor=False) -> pd.DataFrame:
    """Attribution tables for every (time, member) of the case at ``path``.

    Parameters
    ----------
    pieces : list of Piece or dicts (default: :func:`workbench.analysis.standard_pieces` for the
        case's hemisphere and humidity)
    times, members : indices to run (default: all)
    target : (lon, lat, hPa) or None for each time's storm centre
    reference : as for :meth:`Case.reference` (None: the case's default); computed once (on the
        cluster when there is a client) and shared by every task
    client : a ``dask.distributed.Client`` (the run is spread over its workers) or None (serial)
    options : keywords of :func:`workbench.open_case` (e.g. ``region``, ``times``), used by every task
    progress : True for a tqdm bar on stderr (shown once the run has lasted about two seconds)
    store : path of a Zarr store: each (time, member) writes its region there; a rerun with the
        same settings skips the finished ones (resumable)

    Pieces with ``follow="anomaly"`` are carried to every time by :mod:`workbench.tracking`
    (tracked over all the case's times from their ``follow_from`` time, else the first time,
    per member, on the client, before the tasks start); each task inverts the pieces as they are
    at its time, and a piece lost at a time is left out there (its forcing goes to the
    remainder; its row is NaN). The table then has the columns ``follow`` (fixed / anomaly),
    ``status`` (start, fixed, tracked, split, merged, split+merged, lost, not tracked) and
    ``track_note`` on the piece rows; :func:`tracked_table` gives each piece's share over time.

    A (time, member) the physics refuses (:class:`~workbench.errors.DomainError`, e.g. nonlinear
    balance where it is not elliptic) does not end the run: its rows are NaN, the column
    ``refused`` gives the reason ("" elsewhere), a warning names it, and a store leaves it
    unfinished (a rerun tries it again).
    """
    import dask

    # this process computes its own arrays with Dask's default local scheduler even when a
    # distributed Client is the default (the serial run must not ship its reads to a cluster)
    with dask.config.set(scheduler="threads"):
        return _run_batch(path, pieces=pieces, times=times, members=members, target=target,
                          reference=reference, client=client, options=options, progress=progress,
                          store=store, balance=balance, floor=floor)


def _run_batch(path, *, pieces, times, members, target, reference, client, options, progress, store,
               balance, floor):
    from .analysis import cyclonic_sign, standard_pieces

    options = dict(options or {})
    path = str(Path(path))
    case = _worker_case(path, options, None, None)
    times = list(range(case.times.size)) if times is None else [case.time_index(t) for t in times]
    if case.members is None:
        mems_all, mems = [None], [None]
    else:
        mems_all = list(range(case.members.size))
        mems = mems_all if members is None else [case.member_index(m) for m in members]
    if not times:
        raise InputError("run_batch: no times selected.")
    if reference is None or isinstance(reference, str):
        reference = case.resolve_reference(reference)
    if not isinstance(reference, str):
        raise InputError("run_batch: give the reference as a name or the path of a climatology file.")
    if pieces is None:
        moist = "relative_humidity" in case.data or "specific_humidity" in case.data
        pieces = standard_pieces(moist=moist, hemisphere=cyclonic_sign(case))
    pieces = [p.to_dict() if hasattr(p, "to_dict") else dict(p) for p in pieces]
    jobs = [(ti, mi) for ti in times for mi in mems]
    tracks = _track(case, pieces, mems, reference)  # None when no piece follows its anomaly
    job_pieces = {j: pieces for j in jobs} if tracks is None else \
        {(ti, mi): _pieces_at(pieces, tracks[mi], ti) for ti, mi in jobs}
    g = None
    if store is not None:
        store = str(store)
        g = _open_store(store, case, range(case.times.size), mems_all, pieces, reference, path)
        done = g["done"][...]
        todo = [(ti, mi) for ti, mi in jobs if not done[ti, 0 if mi is None else mi]]
    else:
        todo = jobs
    from .cli import progress as _bar

    bar = _bar(total=len(jobs), desc="batch", unit="task", enabled=bool(progress))
    bar.update(len(jobs) - len(todo))
    results = {}
    try:
        if client is None:
            if not todo:
                ref = (reference, None)
            elif reference == "time_mean":  # the fields read stay cached for the tasks (bounded cache)
                mems = [None] if case.members is None else range(case.members.size)
                pairs = [(ti, mi) for ti in range(case.times.size) for mi in mems]
                first = set(todo)  # the tasks' own pairs read last, the first task's most recently
                ref = _reference_combine(reference, [_reference_part(
                    path, options, [p for p in pairs if p not in first] + todo[::-1])])
            else:
                ref = (reference, case.reference(reference))
            for ti, mi in todo:
                results[(ti, mi)] = _one(path, ti, mi, job_pieces[(ti, mi)], target, ref, options, store, balance,
                                         floor)
                bar.update(1)
        elif todo:
            # the workers open the file with what the client's open established (its checksum
            # and missing-value census: measured, 0.43 -> s per worker at 0.5 deg, 8 times)
            options = dict(options, known=case.open_state())
            ref_future, place = _submit_reference(client, path, options, reference, case, todo)
            futures = [client.submit(_task, path, ti, mi, job_pieces[(ti, mi)], target, ref_future, options, store,
                                     balance, floor,
                                     pure=False, workers=place.get((ti, mi)), allow_other_workers=True)
                       for ti, mi in todo]
            from distributed import wait

            start = bar.n
            while True:  # waits at most 0.2 s at a time (Ctrl-C stays prompt, no extra tasks
                # left behind by an interrupt) and wakes as soon as a task ends
                pending = [f for f in futures if not f.done()]
                if pending:
                    try:
                        wait(pending, timeout=0.2, return_when="FIRST_COMPLETED")
                    except TimeoutError:
                        pass
                done_n = sum(f.done() for f in futures)
                bar.update(start + done_n - bar.n)
                if done_n == len(futures) or any(f.status == "error" for f in futures):
                    break
            for key, res in zip(todo, client.gather(futures)):
                results[key] = res
    finally:
        bar.close()
    for note in dict.fromkeys(n for _, notes in results.values() for n in notes):
        warnings.warn(note, stacklevel=3)
    if g is not None:
        tables = [results[j][0] if j in results and results[j][0]["refused"].iloc[0] else t
                  for j, t in zip(jobs, _from_store(g, case, jobs))]
    else:
        tables = [results[j][0] for j in jobs]
    out = pd.concat(tables, ignore_index=True)
    if tracks is not None:
        _add_track_columns(out, case, pieces, tracks)
    out.attrs.update(source=path, reference=str(reference),
                     target="each time's storm centre" if target is None else str(tuple(target)))
    return out


# ---------------------------------------------------------------------------------------- tracking
#: the columns of :func:`tracked_table`
TRACK_COLUMNS = ("time", "member", "piece", "follow", "status", "height_anomaly", "relative_vorticity",
                 "height_share_pct", "vorticity_share_pct", "target_lon", "target_lat", "target_hpa", "track_note")


def _track(case, pieces, mems, reference):
    """``{member index: {piece name: [tracking steps over all times]}}`` for the pieces that
    follow their anomaly, or None when none does."""
    from .inversion.pieces import Piece
    from .tracking import track_pieces

    follow = [Piece.from_dict(p) for p in pieces if p.get("follow") == "anomaly"]
    if not follow:
        return None
    return {mi: track_pieces(case, follow, member=mi, reference=reference) for mi in mems}


def _pieces_at(pieces, steps, ti):
    """The pieces as they are at time index ``ti``: fixed ones unchanged, following ones with
    their tracked outline, lost ones left out."""
    out = []
    for p in pieces:
        if p.get("follow") != "anomaly":
            out.append(p)
            continue
        step = next(s for s in steps[p["name"]] if s.time == ti)
        if step.piece is not None:
            out.append(step.piece.to_dict())
    return out


def _add_track_columns(table, case, pieces, tracks):
    follow = {p["name"]: p.get("follow", "fixed") for p in pieces}
    members = {"" if mi is None else str(case.members[mi]): mi for mi in tracks}
    times = {str(t)[:19]: k for k, t in enumerate(case.times)}
    status, notes = [], []
    for t, m, name in zip(table["time"], table["member"], table["piece"]):
        if name not in follow:
            status.append("")
            notes.append("")
        elif follow[name] != "anomaly":
            status.append("fixed")
            notes.append("")
        else:
            s = next(s for s in tracks[members[m]][name] if s.time == times[t])
            status.append(s.status)
            notes.append(s.note)
    table["follow"] = [follow.get(n, "") for n in table["piece"]]
    table["status"] = status
    table["track_note"] = notes


def tracked_table(table) -> pd.DataFrame:
    """Each piece's share over time from a :func:`run_batch` table whose pieces follow their
    anomaly (the pieces' and the remainder's rows, columns :data:`TRACK_COLUMNS`). With members the piece is called
    ``"<piece> (member <m>)"`` so that :func:`workbench.views.tracks.tracked_shares_figure`
    draws a line per piece and member. InputError when no piece follows its anomaly."""
    if "follow" not in table.columns or not (table["follow"] == "anomaly").any():
        raise InputError("no piece of this batch follows its anomaly; set \"follow\": \"anomaly\" on a piece "
                         "(and \"follow_from\": the time its outline was drawn at) in the pieces file")
    rows = table[~table["piece"].isin(["sum of pieces", "full inversion"])].copy()
    if (rows["member"] != "").any():
        rows["piece"] = [f"{p} (member {m})" for p, m in zip(rows["piece"], rows["member"])]
    out = rows[list(TRACK_COLUMNS)].reset_index(drop=True)
    out.attrs = dict(table.attrs)
    return out


def local_cluster(n_workers, **kwargs):
    """A Dask ``LocalCluster`` of ``n_workers`` worker processes on 127.0.0.1 for batch runs: one
    thread per worker (a task is single-threaded numerical work), no dashboard, worker logs at
    ERROR only, and the workers' C allocator left at its defaults.

    Dask's nanny sets ``MALLOC_TRIM_THRESHOLD_=65536`` in each worker's environment by default;
    setting it switches off glibc's adaptive mmap threshold, so every array over 128 KiB is
    mapped and unmapped afresh (page faults, zeroing): an analyse task took twice as long and
    half its time was system time. Here the variable is unset for the workers (the config
    value None). Workers started elsewhere (``--scheduler``) should do the same: Dask config
    ``distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_: null``.
    ``kwargs`` go to ``LocalCluster`` (they override these settings)."""
    import logging

    import dask
    from dask.distributed import LocalCluster

    opts = dict(n_workers=n_workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                dashboard_address=None, silence_logs=logging.ERROR)
    opts.update(kwargs)
    with dask.config.set({"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None}):
        return LocalCluster(**opts)


def _connect(address, timeout_s):
    """A Dask client of the scheduler at ``address``; InputError (one line) when it does not answer
    within ``timeout_s`` seconds."""
    from dask.distributed import Client

    try:
        return Client(address, timeout=f"{timeout_s:g}s")
    except (OSError, TimeoutError) as exc:
        raise InputError(f"--scheduler {address}: no Dask scheduler answered within {timeout_s:g} s "
                         f"({type(exc).__name__}); start one or check the address") from None
    except ValueError as exc:
        raise InputError(f"--scheduler {address!r} is not a scheduler address ({exc}); "
                         "give e.g. tcp://127.0.0.1:8786") from None


def _scheduler_address(text):
    import argparse
    from urllib.parse import urlsplit

    from .cli import host_address

    value = str(text).strip()
    url = urlsplit(value if "://" in value else f"tcp://{value}")
    if url.scheme not in ("tcp", "tls", "inproc", "ucx", "ws", "wss"):
        raise argparse.ArgumentTypeError(f"scheduler {text!r}: unknown protocol {url.scheme!r}; use tcp://HOST:PORT")
    try:
        port = url.port
    except ValueError:
        raise argparse.ArgumentTypeError(f"scheduler {text!r}: the port must be 1..65535") from None
    if not url.hostname or port is None or port == 0:
        raise argparse.ArgumentTypeError(f"scheduler {text!r}: give HOST:PORT, e.g. tcp://127.0.0.1:8786")
    host_address(url.hostname)
    return value if "://" in value else f"tcp://{value}"


def main(argv=None):
    """``pvwb batch [CASE] [--region W,E,S,N] [--times SPEC] [--pieces FILE] [--target LON,LAT,HPA]
    [--reference R] [--scheduler ADDRESS [--connect-timeout S] | --local-cluster N] [-o CSV]
    [--overwrite] [--store ZARR] [--quiet]``: arguments checked first, one-line errors, a progress bar."""
    from . import cli
    from .analysis import default_case_path

    parser = cli.build_parser("pvwb batch", "Attribution over every time and member, serially or on Dask.")
    cli.add_case_argument(parser)
    cli.add_selection_options(parser)
    parser.add_argument("--pieces", help="JSON file with a list of pieces (default: standard pieces)")
    parser.add_argument("--target", help="lon,lat,hPa (default: each time's storm centre)")
    parser.add_argument("--reference", default=None, help="time_mean | area_mean | zonal_mean | PATH "
                        "(default: time_mean for several times, else the case's default)")
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--scheduler", type=_scheduler_address,
                       help="address of a running Dask scheduler (tcp://127.0.0.1:8786)")
    group.add_argument("--local-cluster", type=cli.count(1, 256, "--local-cluster"), metavar="N", default=None,
                       help="start a Dask cluster of N (1..256) worker processes on 127.0.0.1")
    parser.add_argument("--connect-timeout", type=cli.positive_number("--connect-timeout"), default=5.0,
                        metavar="S", help="seconds to wait for --scheduler (default 5)")
    parser.add_argument("-o", "--output", help="write the joined table as CSV")
    parser.add_argument("--store", metavar="ZARR", help="write each time/member into this Zarr store "
                        "as it finishes; a rerun with the same settings skips the finished ones")
    cli.add_overwrite_option(parser)
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    parser.add_argument("--balance", choices=["qg", "nonlinear"], default="qg",
                        help="qg (default) or nonlinear balance (adds the 'nonlinear remainder' row)")
    parser.add_argument("--floor", action="store_true", help="nonlinear balance: accept the floor remedy")
    parser.add_argument("--tracks", metavar="CSV",
                        help="pieces with \"follow\": \"anomaly\": write each piece's share over time as CSV")
    parser.add_argument("--plot", metavar="FIG",
                        help="pieces with \"follow\": \"anomaly\": write the shares-over-time figure "
                             "(.png, .svg or .pdf)")
    args = parser.parse_args(argv)
    if args.floor and args.balance != "nonlinear":
        parser.error("--floor applies to --balance nonlinear only")
    if args.store and args.balance != "qg":
        parser.error("--store keeps QG runs only; leave out --store for --balance nonlinear")
    from .analysis import _parse_target, load_pieces

    target = _parse_target(args.target)
    if args.output:
        cli.check_output(args.output, args.overwrite)
    if args.tracks:
        cli.check_output(args.tracks, args.overwrite, suffixes=(".csv",), what="table")
    if args.plot:
        cli.check_output(args.plot, args.overwrite, suffixes=(".png", ".svg", ".pdf"), what="figure")
    pieces = load_pieces(args.pieces) if args.pieces else None
    if (args.tracks or args.plot) and not any(getattr(p, "follow", "fixed") == "anomaly" for p in pieces or []):
        from .errors import InputError

        raise InputError("--tracks/--plot need pieces that follow their anomaly: give --pieces FILE with "
                         "\"follow\": \"anomaly\" on at least one piece")
    path = cli.case_source(args.case) or default_case_path()
    options = cli.selection_options(args)
    import workbench as wb

    case = wb.open_case(path, **options)  # checks the file, target and pieces before any cluster starts
    cli.check_target(case, target)
    cli.check_pieces(case, pieces)
    del case
    client = cluster = None
    if args.scheduler or args.local_cluster:
        if args.scheduler:
            client = _connect(args.scheduler, args.connect_timeout)
        else:
            from dask.distributed import Client

            cluster = local_cluster(args.local_cluster)
            client = Client(cluster)
        print(f"Dask: {client}")
    try:
        table = run_batch(path, pieces=pieces, target=target, reference=args.reference,
                          client=client, options=options, progress=not args.quiet and cli.progress_enabled(),
                          store=args.store, balance=args.balance, floor=args.floor)
    finally:
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()
    cols = ["time", "member", "piece", "height_anomaly", "wind_speed", "height_share_pct"]
    with pd.option_context("display.width", 160, "display.max_rows", 500, "display.precision", 2):
        print(table[cols].to_string(index=False))
    _report_refused(table)
    from .export import CAUTION

    print(f"\n{CAUTION}")
    if args.output:
        from .export import atomic_target, csv_text

        with atomic_target(args.output, overwrite=args.overwrite, what="batch table") as tmp:
            tmp.write_text(csv_text(table, index=False))
        print(f"wrote {args.output}")
    if "follow" in table.columns:
        _report_tracks(table, args)
    return 0


def _report_refused(table):
    """Print the (time, member)s the physics refused, grouped by reason (their rows are NaN)."""
    if "refused" not in table.columns:
        return
    bad = table[table["refused"] != ""].drop_duplicates(["time", "member"])
    if bad.empty:
        return
    n_all = len(table.drop_duplicates(["time", "member"]))
    print(f"\nRefused at {len(bad)} of {n_all} time(s)/member(s); their rows are empty (column "
          "'refused' of the table says why):")
    for reason, grp in bad.groupby("refused", sort=False):
        whens = ", ".join(t[:16].replace("T", " ") + (f" member {m}" if m else "")
                          for t, m in zip(grp["time"], grp["member"]))
        print(f"  {whens}: {reason}")


def _report_tracks(table, args):
    """Print the tracked pieces' height shares over time and their notes; write --tracks/--plot."""
    from .inversion.pieces import format_share

    tracks = tracked_table(table)
    moving = tracks[tracks["follow"] == "anomaly"]
    wide = moving.pivot(index="time", columns="piece", values="height_share_pct")[
        list(dict.fromkeys(moving["piece"]))]
    with pd.option_context("display.width", 200, "display.max_rows", 500, "display.max_columns", 30):
        print("\ntracked pieces: height share (%) at the target")
        print(wide.to_string(float_format=lambda v: format_share(v), na_rep=format_share(None)))
    for row in moving[moving["status"].isin(["split", "merged", "split+merged", "lost"])].itertuples():
        print(f"note: {row.time} {row.piece}: {row.track_note}")
    if args.tracks:
        from .export import atomic_target, csv_text

        with atomic_target(args.tracks, overwrite=args.overwrite, what="tracked-shares table") as tmp:
            tmp.write_text(csv_text(tracks, index=False))
        print(f"wrote {args.tracks}")
    if args.plot:
        from .views.static import save_figure
        from .views.tracks import tracked_shares_figure

        save_figure(tracked_shares_figure(tracks), args.plot, overwrite=args.overwrite)
        print(f"wrote {args.plot}")
