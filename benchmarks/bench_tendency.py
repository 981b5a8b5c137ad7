"""Benchmark of the QG tendency attribution and the what-if runs.

``python benchmarks/bench_tendency.py [--large [--full]] [--json]``: the attribution matrix of the
standard pieces at the deepest time of the sample case (with and without the inversion in the
case cache), a 36 h what-if (control + experiment, upper trough at half strength) and, with
``--large``, the same on an invented 0.5 degree grid of 26 x 121 x 201 points. Wall-clock time
and tracemalloc peak memory; figures are recorded in DEVELOPERS.md ("Tendency attribution and
what-if").
"""
from __future__ import annotations

import argparse
import json
import sys

from workbench.whatif import bench_records


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--large", action="store_true", help="also the 0.5 degree grid (26 x 121 x 201)")
    ap.add_argument("--full", action="store_true",
                    help="with --large: also run the two whole 36 h what-if runs (about 70 s)")
    ap.add_argument("--json", action="store_true", help="print one JSON list of records")
    args = ap.parse_args(argv)
    records = bench_records(large=args.large, full=args.full)
    if args.json:
        print(json.dumps(records))
    else:
        for r in records:
            print(f"{r['grid']:7} {'x'.join(map(str, r['shape'])):>11} {r['method']:18} {r['median_s']:8.2f} s "
                  f"peak {r['peak_mem_mb']:7.1f} MB  {r['notes']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
