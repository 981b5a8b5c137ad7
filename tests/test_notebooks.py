"""Every notebook in notebooks/ runs top to bottom without an error (nbclient, the venv's
python3 kernel) and is committed without outputs."""
from pathlib import Path

import nbformat
import pytest

NOTEBOOKS = sorted((Path(__file__).resolve().parents[1] / "notebooks").glob("*.ipynb"))


@pytest.mark.slow
@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.name for p in NOTEBOOKS])
def test_notebook_runs_without_errors(path, tmp_path):
    from nbclient import NotebookClient

    nb = nbformat.read(path, as_version=4)
    assert all(c.get("outputs", []) == [] and c.get("execution_count") is None
               for c in nb.cells if c.cell_type == "code"), "commit notebooks without outputs"
    client = NotebookClient(nb, timeout=600, kernel_name="python3",
                            resources={"metadata": {"path": str(tmp_path)}})
    client.execute()  # raises CellExecutionError on the first failing cell
    errors = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs
              if o.get("output_type") == "error"]
    assert errors == []
    assert len(NOTEBOOKS) >= 2


def test_there_are_notebooks():
    names = [p.name for p in NOTEBOOKS]
    assert "01_quick_start.ipynb" in names and "02_piecewise_inversion.ipynb" in names
