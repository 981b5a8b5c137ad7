"""Benchmark of the nonlinear-balance inversion against one QG solve on the same grid.

    python benchmarks/bench_nonlinear.py [--grid 1deg 0.5deg 0.25deg] [--repeat N] [--json]

Grids as ``workbench.bench.GRIDS``; the state is invented (``nonlinear.bench_problem``: a jet
and a cut-off low, Rossby number about 0.3; first guess the harmonic extension of the lateral
data, or the analysed state as the Case paths do). Records carry ``method="qg_balance"`` / ``"nonlinear_balance"``.
"""
from __future__ import annotations

import argparse
import json
import sys

from workbench.bench import GRIDS
from workbench.inversion.nonlinear import bench_nonlinear


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--grid", nargs="*", default=["1deg", "0.5deg"], choices=list(GRIDS))
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args(argv)
    records = []
    for name in args.grid:
        records += bench_nonlinear(name, GRIDS[name], repeat=args.repeat)
    if args.json:
        print(json.dumps(records))
    else:
        for r in records:
            extra = ""
            if r["method"] == "nonlinear_balance":
                extra = (f" ({r['first_guess']}) = {r['qg_solves']:.0f} QG solves ({r['qg_solves_cpu']:.0f} by CPU "
                         f"time), Newton {r['newton_iterations']}, GMRES {r['gmres_iterations']}, residual "
                         f"{r['final_relative_residual']:.1e}")
            print(f"{r['grid']:7} {'x'.join(map(str, r['shape'])):>10} {r['method']:18} {r['median_s']:.4g} s{extra}")
    return records


if __name__ == "__main__":
    sys.exit(0 if main() is not None else 1)
