"""The walk-through notebook runs from top to bottom (executed with nbclient, so it never rots)."""

from pathlib import Path

import pytest

NOTEBOOK = Path(__file__).parent.parent / "notebooks" / "walkthrough.ipynb"


def test_walkthrough_notebook_executes():
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    pytest.importorskip("ipykernel")
    nb = nbformat.read(NOTEBOOK, as_version=4)
    client = nbclient.NotebookClient(nb, timeout=600, kernel_name="python3",
                                     resources={"metadata": {"path": str(NOTEBOOK.parent)}})
    client.execute()
    outputs = [o for cell in nb.cells if cell.cell_type == "code" for o in cell.get("outputs", [])]
    assert not any(o.get("output_type") == "error" for o in outputs)
    assert any("image/png" in o.get("data", {}) for o in outputs)
