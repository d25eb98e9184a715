"""Execute every notebook in notebooks/ so they cannot rot."""

from __future__ import annotations

from pathlib import Path

import nbclient
import nbformat
import pytest

NOTEBOOKS = sorted((Path(__file__).resolve().parents[1] / "notebooks").glob("*.ipynb"))


@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.name for p in NOTEBOOKS])
def test_notebook_runs(path):
    nb = nbformat.read(path, as_version=4)
    client = nbclient.NotebookClient(nb, timeout=120, kernel_name="python3",
                                     resources={"metadata": {"path": str(path.parent)}})
    client.execute()
    errors = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])
              if o.get("output_type") == "error"]
    assert not errors
