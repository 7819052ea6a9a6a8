"""Every notebook in notebooks/ runs top to bottom with the "python3" kernel (small sizes, a few seconds each)."""

import glob
import os
import shutil

import pytest

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
NOTEBOOKS = sorted(glob.glob(os.path.join(ROOT, "notebooks", "*.ipynb")))


def test_the_notebooks_are_there():
    names = {os.path.basename(path) for path in NOTEBOOKS}
    assert "workbench.ipynb" in names


@pytest.mark.parametrize("path", NOTEBOOKS, ids=os.path.basename)
def test_notebook_runs_top_to_bottom(path, tmp_path):
    import nbclient
    import nbformat

    notebook = nbformat.read(path, as_version=4)
    nbformat.validate(notebook)
    assert notebook.metadata["kernelspec"]["name"] == "python3"
    assert all(not cell.get("outputs") for cell in notebook.cells if cell.cell_type == "code"), (
        "notebooks are committed without outputs"
    )
    shutil.copy(path, tmp_path)  # run in a scratch folder: anything a notebook writes stays there
    client = nbclient.NotebookClient(notebook, timeout=240, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})  # fmt: skip
    client.execute()  # raises CellExecutionError, with the cell and its traceback, on any failing cell
    errors = [out for cell in notebook.cells for out in cell.get("outputs", []) if out.output_type == "error"]
    assert errors == []
