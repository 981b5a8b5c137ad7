"""Batch: the same pieces over every time and ensemble member, serially or on a Dask cluster.

Each task opens the case from its path (workers share no memory with the client), takes the
reference state computed once on the client, runs :func:`workbench.analysis.analyse` for one
(time, member) and returns its attribution table. The tables are joined into one DataFrame
with ``time`` and ``member`` columns. Computation only.
"""
from __future__ import annotations

import argparse
from pathlib import Path

import pandas as pd

from .errors import InputError

__all__ = ["run_batch", "main"]


def _one(path, ti, mi, pieces, target, reference, options):
    import workbench as wb
    from workbench.analysis import analyse

    case = wb.open_case(path, **options)
    _, table, tgt = analyse(case, ti, mi, pieces, target, reference)
    table = table.reset_index()
    table.insert(0, "member", "" if mi is None else str(case.members[mi]))
    table.insert(0, "time", str(case.times[ti])[:19])
    table["target_lon"], table["target_lat"], table["target_hpa"] = tgt
    return table


def run_batch(path, *, pieces=None, times=None, members=None, target=None, reference=None,
              client=None, options=None, progress=False) -> pd.DataFrame:
    """Attribution tables for every (time, member) of the case at ``path``.

    Parameters
    ----------
    pieces : list of Piece or dicts (default: :func:`workbench.analysis.standard_pieces`)
    times, members : indices to run (default: all)
    target : (lon, lat, hPa) or None for each time's storm centre
    reference : as for :meth:`Case.reference` (None: the case's default); computed once here and
        shipped to the workers
    client : a ``dask.distributed.Client`` (the run is spread over its workers) or None (serial)
    options : keywords of :func:`workbench.open_case` (e.g. ``region``, ``times``), used by every task
    progress : True for a tqdm bar on stderr (shown once the run has lasted about two seconds)
    """
    import workbench as wb

    options = dict(options or {})
    path = str(Path(path))
    case = wb.open_case(path, **options)
    times = list(range(case.times.size)) if times is None else [case.time_index(t) for t in times]
    if case.members is None:
        mems = [None]
    else:
        mems = list(range(case.members.size)) if members is None else [case.member_index(m) for m in members]
    if not times:
        raise InputError("run_batch: no times selected.")
    if reference is None or isinstance(reference, str):
        reference = case.resolve_reference(reference)
    ref = case.reference(reference) if isinstance(reference, str) else reference
    pieces = None if pieces is None else [p.to_dict() if hasattr(p, "to_dict") else dict(p) for p in pieces]
    jobs = [(ti, mi) for ti in times for mi in mems]
    from .cli import progress as _bar

    bar = _bar(total=len(jobs), desc="batch", unit="task", enabled=bool(progress))
    try:
        if client is None:
            tables = []
            for ti, mi in jobs:
                tables.append(_one(path, ti, mi, pieces, target, ref, options))
                bar.update(1)
        else:
            import time

            ref_future = client.scatter(ref, broadcast=True)
            futures = [client.submit(_one, path, ti, mi, pieces, target, ref_future, options, pure=False)
                       for ti, mi in jobs]
            while True:  # polls the futures' state (no extra tasks left behind by an interrupt)
                done = sum(f.done() for f in futures)
                bar.update(done - bar.n)
                if done == len(futures) or any(f.status == "error" for f in futures):
                    break
                time.sleep(0.2)
            tables = client.gather(futures)
    finally:
        bar.close()
    out = pd.concat(tables, ignore_index=True)
    out.attrs.update(source=path, reference=str(reference) if isinstance(reference, str) else "dataset")
    return out


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
    [--overwrite] [--quiet]``: arguments checked first, one-line errors, a progress bar."""
    from . import cli
    from .analysis import default_case_path

    parser = cli.build_parser("pvwb batch", "Attribution over every time and member, serially or on Dask.")
    parser.add_argument("case", nargs="?", help="case file (default: the invented sample storm)")
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
    parser.add_argument("--overwrite", action="store_true")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    args = parser.parse_args(argv)
    from .analysis import _parse_target, load_pieces

    target = _parse_target(args.target)
    if args.output:
        cli.check_output(args.output, args.overwrite)
    pieces = load_pieces(args.pieces) if args.pieces else None
    path = args.case or default_case_path()
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
            from dask.distributed import Client, LocalCluster

            cluster = LocalCluster(n_workers=args.local_cluster, threads_per_worker=1, host="127.0.0.1",
                                   dashboard_address=None, processes=True)
            client = Client(cluster)
        print(f"Dask: {client}")
    try:
        table = run_batch(path, pieces=pieces, target=target, reference=args.reference,
                          client=client, options=options, progress=not args.quiet and cli.progress_enabled())
    finally:
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()
    cols = ["time", "member", "piece", "height_anomaly", "wind_speed", "height_share_pct"]
    with pd.option_context("display.width", 160, "display.max_rows", 500, "display.precision", 2):
        print(table[cols].to_string(index=False))
    if args.output:
        from .export import atomic_target

        with atomic_target(args.output, overwrite=args.overwrite, what="batch table") as tmp:
            tmp.write_text(table.to_csv(index=False))
        print(f"wrote {args.output}")
    return 0
