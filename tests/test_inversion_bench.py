"""The benchmark entry point runs and reports the agreed record fields (no timing assertions:
speed targets are measured by `pvwb bench`, not by unit tests)."""
from __future__ import annotations

import io
import json

from workbench.bench import main, run


def test_bench_json_records_have_the_agreed_fields(capsys):
    buf = io.StringIO()
    records = run(json_output=True, grids=["1deg"], references=False, repeat=1, stream=buf)
    parsed = json.loads(buf.getvalue())
    assert parsed == json.loads(json.dumps(records))
    methods = [r["method"] for r in parsed]
    assert methods == ["fft_roundtrip", "fast_solver"]
    for r in parsed:
        assert {"grid", "shape", "method", "median_s", "ratio_to_fft", "max_rel_error"} <= set(r)
        assert r["shape"] == [21, 61, 101] and r["median_s"] > 0
    fast = parsed[1]
    # closure of the exact direct solver: round-off only
    assert fast["max_rel_error"] < 1e-10 and fast["peak_mem_mb"] > 0
    assert main(["--grid", "1deg", "--no-references", "--repeat", "1"]) == 0
    assert "fast_solver" in capsys.readouterr().out
