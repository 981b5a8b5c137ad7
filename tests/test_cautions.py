"""The caution (one constant, workbench.export.CAUTION) goes wherever results leave the tool:
the `serve` console at start, the `pvwb batch` and `pvwb invert` output, the first line of every
CSV the package writes (a "#" comment the package's own reader skips), and the `brief`
terminal line."""
from __future__ import annotations

import pandas as pd

from workbench import cli
from workbench.export import CAUTION, csv_text, read_csv


def test_csv_caution_line_and_reader(tmp_path):
    table = pd.DataFrame({"piece": ["trough #1", "full inversion"], "height_anomaly": [-12.5, -20.0]})
    path = tmp_path / "t.csv"
    path.write_text(csv_text(table, index=False))
    first = path.read_text().splitlines()[0]
    assert first.startswith("# ") and first.endswith(CAUTION)
    back = read_csv(path)
    # a "#" inside a cell is data, not a comment (pandas' comment="#" would cut it)
    assert back["piece"].tolist() == ["trough #1", "full inversion"]
    assert back["height_anomaly"].tolist() == [-12.5, -20.0]


def test_invert_output_and_csv_carry_the_caution(small_case_path, tmp_path, capsys):
    out = tmp_path / "attr.csv"
    assert cli.main(["--quiet", "invert", str(small_case_path), "--time", "0", "-o", str(out)]) == 0
    assert CAUTION in capsys.readouterr().out
    lines = out.read_text().splitlines()
    assert lines[0] == f"# PV Workbench {__import__('workbench').__version__}: {CAUTION}"
    assert "full inversion" in set(read_csv(out)["piece"])


def test_batch_output_and_csv_carry_the_caution(small_case_path, tmp_path, capsys):
    out = tmp_path / "batch.csv"
    assert cli.main(["--quiet", "batch", str(small_case_path), "-o", str(out)]) == 0
    text = capsys.readouterr().out
    assert CAUTION in text
    assert out.read_text().startswith("# ") and CAUTION in out.read_text().splitlines()[0]
    assert {"time", "piece", "height_share_pct"} <= set(read_csv(out).columns)


def test_brief_terminal_line_carries_the_caution(small_case_path, tmp_path, capsys):
    from workbench.brief import main

    pdf = tmp_path / "b.pdf"
    assert main([str(small_case_path), "-o", str(pdf), "--quiet", "--pages", "attribution"]) == 0
    line = capsys.readouterr().out.strip().splitlines()[-1]
    assert line.startswith("briefing written to") and line.endswith(CAUTION)


def test_serve_console_starts_with_the_caution(small_case_path, capsys):
    from workbench.app import serve

    server = serve(str(small_case_path), start=False)
    try:
        lines = capsys.readouterr().out.splitlines()
        assert lines[0].startswith("PV Workbench at http://127.0.0.1:")
        assert lines[1] == CAUTION
    finally:
        server.stop()
