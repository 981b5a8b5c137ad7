"""QG inversion benchmarks: the fast solver against a 3-D FFT round trip, spsolve and PyAMG.

Run ``python benchmarks/bench_inversion.py [--json]`` (same as ``pvwb bench``); see
:mod:`workbench.bench` for what is measured. Figures are recorded in DEVELOPERS.md.
"""
from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from workbench.bench import main  # noqa: E402

if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
