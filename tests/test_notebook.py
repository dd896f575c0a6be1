"""The walkthrough notebook runs from top to bottom and is stored with its outputs."""

import shutil
from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")

NOTEBOOK = Path(__file__).resolve().parents[1] / "notebooks" / "walkthrough.ipynb"


def test_stored_notebook_has_its_outputs():
    nb = nbformat.read(NOTEBOOK, as_version=4)
    code = [cell for cell in nb.cells if cell.cell_type == "code"]
    assert code and all(cell.outputs for cell in code), "run the notebook and save it"
    assert all(cell.execution_count for cell in code)
    errors = [o for cell in code for o in cell.outputs if o.output_type == "error"]
    assert not errors
    images = [o for cell in code for o in cell.outputs if "image/png" in o.get("data", {})]
    assert len(images) == 2


@pytest.mark.slow
def test_notebook_executes(tmp_path):
    copy = tmp_path / NOTEBOOK.name
    shutil.copy(NOTEBOOK, copy)
    nb = nbformat.read(copy, as_version=4)
    client = nbclient.NotebookClient(nb, timeout=600, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute()  # raises CellExecutionError, with the cell and traceback, on failure
    text = "".join(o.get("text", "") for cell in nb.cells if cell.cell_type == "code"
                   for o in cell.outputs)
    assert "fisherwalk summary" in text
    assert "target acceptance" in text
    assert "run length: planned" in text  # the default walk() plans its length
    # progress is shown in a notebook by default (a widget, or a text bar on stderr)
    shown = [o for cell in nb.cells if cell.cell_type == "code" for o in cell.outputs
             if (o.get("name") == "stderr" and "sampling" in o.get("text", ""))
             or "application/vnd.jupyter.widget-view+json" in o.get("data", {})]
    assert shown
    figures = tmp_path / "walkthrough-figures"
    assert sorted(p.name for p in figures.glob("*.png")) == [
        "autocorrelation.png", "marginals.png", "traces.png", "tuning.png"]
