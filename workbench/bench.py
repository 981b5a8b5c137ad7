"""Benchmarks of the QG inversion (``pvwb bench [--json]``).

For grids of about 1 deg (21x61x101), 0.5 deg (26x121x201) and 0.25 deg
(37x241x401) points (levels x latitudes x longitudes) this measures, in one
run:

* ``fft_roundtrip``: one forward plus inverse 3-D real FFT
  (``scipy.fft.rfftn``/``irfftn``) of an array of the grid's shape -- the
  yardstick; ``ratio_to_fft`` of every other record is its median time over
  this one;
* ``fast_solver``: :class:`~workbench.inversion.solver.QGSolver` set-up time
  and the median of repeated solves; ``max_rel_error`` is the closure error
  ``|solve(L phi) - phi| / |phi|`` for a random phi with non-zero boundary data;
* on the 1 deg grid only: ``spsolve`` (SuperLU, one call: factorisation and
  solve, minimum-degree ordering on A^T + A) and ``pyamg`` (smoothed
  aggregation on the symmetrised operator, CG, tol 1e-12; ``median_s`` is the
  solve with the hierarchy reused, ``setup_s`` the hierarchy) on the same
  assembled operator; ``max_rel_error`` is their difference from the fast
  solver and ``fast_speedup`` how many times slower they are than the fast
  solver timed in the same window (``fast_median_s_same_window``: right before
  and after spsolve, interleaved with the PyAMG solves);
* ``peak_mem_mb``: tracemalloc peak of the fast solver's set-up plus one solve,
  and ``mem_ratio`` that peak over the size of one float64 field.

``pvwb bench`` (``run(analyse=True)``; ``--no-analyse`` leaves them out) also times the
whole analysis step (:func:`workbench.analysis.analyse`: reference state, PV, standard
pieces, piecewise inversion, attribution) on the invented sample storm interpolated to 1,
0.5 and 0.25 deg (21 levels; one time, float32, in memory; a fresh case and solver each run,
the opening not timed; :data:`ANALYSE_STEPS`), method ``analyse``: ``median_s`` (wall time), ``peak_mem_mb`` (tracemalloc, a separate run)
and ``mem_ratio`` = that peak over one time's input (the bytes of the time's pressure-level
variables as stored, ``input_mb``), ``solver_share`` (the part of the time spent in
:class:`~workbench.inversion.solver.QGSolver` set-up and solves). They add about 8 s (3 runs
per grid, a warm-up and a traced run) on a shared 2-core machine.

The fields are invented (random), the timings are wall-clock and noisy: compare
ratios within one run.
"""
from __future__ import annotations

import json
import statistics
import sys
import time
import tracemalloc
import warnings

import numpy as np

GRIDS = {
    "1deg": (21, 61, 101),
    "0.5deg": (26, 121, 201),
    "0.25deg": (37, 241, 401),
}

#: grid steps (degrees) of the ``analyse`` records
ANALYSE_STEPS = {"1deg": 1.0, "0.5deg": 0.5, "0.25deg": 0.25}

__all__ = ["run", "main", "GRIDS", "ANALYSE_STEPS", "make_grid", "bench_analyse"]


def make_grid(shape):
    """An invented regional grid of ``shape`` (nz, ny, nx) spanning 25-85N, 100 degrees of longitude."""
    from workbench.inversion.operator import QGGrid

    nz, ny, nx = shape
    lat = np.linspace(25.0, 85.0, ny)
    lon = np.linspace(-60.0, 40.0, nx)
    p = np.linspace(100000.0, 10000.0, nz)
    sigma = 2.0e-6 * (p[0] / p) ** 1.5
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # |f| varies by more than 2 over 25-85N: fine for timing
        return QGGrid(lat, lon, p, sigma, 1.0e-4)


def _median_time(fn, repeat):
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def _problem(grid, rng):
    from workbench.inversion.operator import apply_qg_operator

    phi = rng.standard_normal(grid.shape) * 100.0
    bt = rng.standard_normal(grid.shape[1:])
    tt = rng.standard_normal(grid.shape[1:])
    q = apply_qg_operator(grid, phi, bt, tt)
    return phi, q, bt, tt


def bench_grid(name, shape, repeat=9, with_references=False, log=None):
    """Records for one grid (see the module docstring)."""
    import scipy.fft as sfft

    from workbench.inversion.solver import QGSolver

    rng = np.random.default_rng(1)
    grid = make_grid(shape)
    phi, q, bt, tt = _problem(grid, rng)
    field_mb = q.nbytes / 1e6
    records = []

    def rec(method, median_s, t_fft, **extra):
        r = dict(grid=name, shape=list(shape), method=method, median_s=median_s,
                 ratio_to_fft=median_s / t_fft if t_fft else None, max_rel_error=None)
        r.update(extra)
        records.append(r)
        if log:
            log(r)
        return r

    data = rng.standard_normal(shape)
    t0 = time.perf_counter()
    solver = QGSolver(grid)
    setup = time.perf_counter() - t0
    back = solver.solve(q, bt, tt, lateral=phi)
    err = float(np.abs(back - phi).max() / np.abs(phi).max())
    del back
    q0 = np.nan_to_num(q)
    # interleave the yardstick and the solver so that both see the same machine load
    t_ffts, t_solves = [], []
    t_one = _median_time(lambda: sfft.irfftn(sfft.rfftn(data), s=data.shape), 1) + _median_time(
        lambda: solver.solve(q0, bt, tt, lateral=phi), 1)
    repeat = int(min(101, max(repeat, np.ceil(1.5 / t_one))))  # small grids: more samples against noise
    for _ in range(repeat):
        t_ffts.append(_median_time(lambda: sfft.irfftn(sfft.rfftn(data), s=data.shape), 1))
        t_solves.append(_median_time(lambda: solver.solve(q0, bt, tt, lateral=phi), 1))
    t_fft, t_fast = statistics.median(t_ffts), statistics.median(t_solves)
    rec("fft_roundtrip", t_fft, t_fft, repeats=repeat)
    tracemalloc.start()
    s2 = QGSolver(grid)
    s2.solve(q0, bt, tt, lateral=phi)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    del s2
    rec("fast_solver", t_fast, t_fft, setup_s=setup, max_rel_error=err, repeats=repeat,
               peak_mem_mb=peak / 1e6, mem_ratio=peak / 1e6 / field_mb, field_mb=field_mb)

    if with_references:
        import scipy.sparse as sp
        from scipy.sparse.linalg import spsolve

        from workbench.inversion.operator import assemble_operator

        ref_phi = solver.solve(q0, bt, tt, lateral=phi)
        A = assemble_operator(grid)
        b = A.rhs(q0, bt, tt, phi)
        scale = np.abs(ref_phi).max()
        Acsc = A.matrix.tocsc()

        def fast_window(n=21):
            return [_median_time(lambda: solver.solve(q0, bt, tt, lateral=phi), 1) for _ in range(n)]

        # the fast solver is timed right before and after (same machine load)
        window = fast_window()
        t0 = time.perf_counter()
        x = spsolve(Acsc, b, permc_spec="MMD_AT_PLUS_A")
        t_sp = time.perf_counter() - t0
        window += fast_window()
        t_win = statistics.median(window)
        rec("spsolve", t_sp, t_fft, max_rel_error=float(np.abs(A.expand(x, phi) - ref_phi).max() / scale),
            fast_speedup=t_sp / t_win, fast_median_s_same_window=t_win, repeats=1)
        try:
            import pyamg
        except ImportError:  # optional dependency (the "bench" extra)
            pyamg = None
        if pyamg is not None:
            d = A.spd_scaling()
            M = sp.csr_matrix(sp.diags(d) @ A.matrix)
            db = d * b
            t0 = time.perf_counter()
            ml = pyamg.smoothed_aggregation_solver(M)
            t_setup = time.perf_counter() - t0
            out = {}

            def amg():
                out["x"] = ml.solve(db, tol=1e-12, accel="cg", maxiter=1000)

            t_amgs, window = [], []
            for _ in range(3):  # interleaved with the fast solver
                t_amgs.append(_median_time(amg, 1))
                window += fast_window(7)
            t_amg, t_win = statistics.median(t_amgs), statistics.median(window)
            rec("pyamg", t_amg, t_fft, setup_s=t_setup,
                max_rel_error=float(np.abs(A.expand(out["x"], phi) - ref_phi).max() / scale),
                fast_speedup=t_amg / t_win, fast_median_s_same_window=t_win, repeats=3)
    return records


def analyse_case_data(step, time_index=6):
    """One time of the invented sample storm interpolated to ``step`` degrees (linear), float32,
    as a Dataset for :func:`workbench.open_case` (an in-memory case: no file reading timed)."""
    import xarray as xr

    from workbench.analysis import default_case_path

    with xr.open_dataset(default_case_path()) as src:
        ds = src.isel(time=[time_index]).load()
    lat = np.arange(float(ds.latitude.min()), float(ds.latitude.max()) + 1e-9, step)
    lon = np.arange(float(ds.longitude.min()), float(ds.longitude.max()) + 1e-9, step)
    if lat.size != ds.latitude.size or lon.size != ds.longitude.size or not np.allclose(lat, ds.latitude):
        ds = ds.interp(latitude=lat, longitude=lon)
    return ds.astype({v: "float32" for v in ds.data_vars})


class _SolverClock:
    """Seconds spent in QGSolver set-up and solves while active (the class methods wrapped)."""

    def __enter__(self):
        from workbench.inversion.solver import QGSolver

        self.seconds = 0.0
        self._orig = QGSolver.__init__, QGSolver.solve
        clock = self

        def timed(fn):
            def wrapper(*a, **k):
                t0 = time.perf_counter()
                try:
                    return fn(*a, **k)
                finally:
                    clock.seconds += time.perf_counter() - t0
            return wrapper

        QGSolver.__init__, QGSolver.solve = timed(self._orig[0]), timed(self._orig[1])
        return self

    def __exit__(self, *exc):
        from workbench.inversion.solver import QGSolver

        QGSolver.__init__, QGSolver.solve = self._orig
        return False


def bench_analyse(name, step, repeat=3, log=None):
    """The ``analyse`` record of one grid step (see the module docstring)."""
    import workbench as wb
    from workbench.analysis import analyse
    from workbench.inversion.solver import clear_solver_cache

    ds = analyse_case_data(step)
    inp = sum(ds[v].isel(time=0).nbytes for v in ds.data_vars if "pressure" in ds[v].dims)

    def fresh():
        clear_solver_cache()
        return wb.open_case(ds)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the case's own notes (|f| range, terrain) are not timed
        analyse(fresh())  # warm-up: lazy imports, first-call costs
        walls, shares = [], []
        for _ in range(repeat):
            case = fresh()
            with _SolverClock() as clock:
                t0 = time.perf_counter()
                analyse(case)
                wall = time.perf_counter() - t0
            walls.append(wall)
            shares.append(clock.seconds / wall)
            del case
        case = fresh()
        tracemalloc.start()
        try:
            analyse(case)
            peak = tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()
    shape = [ds.sizes["pressure"], ds.sizes["latitude"], ds.sizes["longitude"]]
    r = dict(grid=name, shape=shape, method="analyse", median_s=statistics.median(walls), ratio_to_fft=None,
             max_rel_error=None, repeats=repeat, solver_share=statistics.median(shares),
             peak_mem_mb=peak / 1e6, mem_ratio=peak / inp, input_mb=inp / 1e6)
    if log:
        log(r)
    return r


def _table(records):
    head = f"{'grid':8} {'shape':>14} {'method':14} {'median_s':>10} {'ratio_fft':>9} {'max_rel_err':>11} {'notes'}"
    lines = [head, "-" * len(head)]
    for r in records:
        notes = []
        if r.get("setup_s") is not None:
            notes.append(f"setup {r['setup_s']:.3g} s")
        if r.get("fast_speedup") is not None:
            notes.append(f"fast solver {r['fast_speedup']:.0f}x faster")
        if r.get("qg_solves") is not None:  # nonlinear balance (workbench.inversion.nonlinear.bench_nonlinear)
            cpu = r.get("qg_solves_cpu")
            notes.append(f"{r['qg_solves']:.0f} QG solves" + ("" if cpu is None else f" ({cpu:.0f} by CPU time)")
                         + f", Newton {r['newton_iterations']}, GMRES {r['gmres_iterations']}, residual "
                         f"{r['final_relative_residual']:.1e}, first guess {r['first_guess']}")
        if r.get("method") == "analyse":
            notes.append(f"peak {r['peak_mem_mb']:.0f} MB = {r['mem_ratio']:.1f}x one time's input "
                         f"({r['input_mb']:.1f} MB), solver {100 * r['solver_share']:.0f} % of the time")
        elif r.get("peak_mem_mb") is not None:
            notes.append(f"peak {r['peak_mem_mb']:.0f} MB = {r['mem_ratio']:.1f} fields")
        err = "" if r["max_rel_error"] is None else f"{r['max_rel_error']:.1e}"
        ratio = "" if r.get("ratio_to_fft") is None else f"{r['ratio_to_fft']:9.2f}"
        lines.append(f"{r['grid']:8} {'x'.join(map(str, r['shape'])):>14} {r['method']:14} {r['median_s']:10.4g} "
                     f"{ratio:>9} {err:>11} {', '.join(notes)}")
    return "\n".join(lines)


def run(json_output=False, grids=None, references=True, repeat=9, stream=None, tendency=False, nonlinear=False,
        analyse=False):
    """Run the benchmarks; print a table (or one JSON list) and return the list of records.

    ``grids``: names from :data:`GRIDS` (default all); ``references``: also time spsolve and
    PyAMG on the 1 deg grid (about half a minute); ``analyse``: also the whole analysis step
    on the same grid names (:func:`bench_analyse`, 3 runs each).
    """
    stream = stream or sys.stdout
    names = list(grids or GRIDS)
    records = []
    t0 = time.perf_counter()
    log = None if json_output else (lambda r: print(f"  measured {r['grid']} {r['method']}", file=sys.stderr))
    for name in names:
        if name not in GRIDS:
            from workbench.errors import InputError

            raise InputError(f"bench: unknown grid {name!r}; choose from {', '.join(GRIDS)}.")
        records += bench_grid(name, GRIDS[name], repeat=repeat, with_references=references and name == "1deg",
                              log=log)
    if nonlinear:  # nonlinear balance vs one QG solve, method "qg_balance" / "nonlinear_balance"
        from workbench.inversion.nonlinear import bench_nonlinear

        for name in names:
            for r in bench_nonlinear(name, GRIDS[name], repeat=min(repeat, 3), log=log):
                r.setdefault("ratio_to_fft", float("nan"))
                r.setdefault("max_rel_error", None)
                records.append(r)
    if analyse:  # the whole analysis step, method "analyse"
        for name in names:
            records.append(bench_analyse(name, ANALYSE_STEPS[name], repeat=min(repeat, 3), log=log))
    if tendency:  # tendency attribution and what-if records (workbench.whatif.bench_records)
        from workbench.whatif import bench_records

        records += bench_records(log=log)
    if json_output:
        print(json.dumps(records), file=stream)
    else:
        print(_table(records), file=stream)
        print(f"(total {time.perf_counter() - t0:.1f} s; invented fields; ratios are within this run)", file=stream)
    return records


def main(argv=None):
    """``pvwb bench [--json] [--grid NAME ...] [--no-references] [--no-analyse] [--tendency] [--nonlinear]``."""
    from workbench.cli import build_parser, count

    ap = build_parser("pvwb bench", "QG inversion benchmarks (solver vs FFT, spsolve, PyAMG).")
    ap.add_argument("--json", action="store_true", help="print one JSON list of records")
    ap.add_argument("--grid", action="append", choices=list(GRIDS), help="grid(s) to run (default all)")
    ap.add_argument("--no-references", action="store_true", help="skip spsolve and PyAMG (the slow part)")
    ap.add_argument("--repeat", type=count(1, 1000, "--repeat"), default=9,
                    help="repeats for the medians, 1..1000 (default 9)")
    ap.add_argument("--tendency", action="store_true", help="also time the tendency attribution and a 36 h what-if")
    ap.add_argument("--nonlinear", action="store_true",
                    help="also time the nonlinear-balance inversion against one QG solve (records by balance)")
    ap.add_argument("--no-analyse", action="store_true",
                    help="leave out the records of the whole analysis step (time, peak memory per input, "
                         "solver share; about 8 s)")
    args = ap.parse_args(argv)
    run(json_output=args.json, grids=args.grid, references=not args.no_references, repeat=args.repeat,
        tendency=args.tendency, nonlinear=args.nonlinear, analyse=not args.no_analyse)
    return 0


if __name__ == "__main__":
    sys.exit(main())
