"""The walkthrough notebook runs from top to bottom (executed with nbclient)."""

import pytest

from conftest import ROOT


def test_walkthrough_notebook_executes(tmp_path):
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    nb = nbformat.read(ROOT / "notebooks" / "walkthrough.ipynb", as_version=4)
    client = nbclient.NotebookClient(nb, timeout=600, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute()
    text = "".join(o.get("text", "") for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", []))
    assert "condition number of the G set" in text
    assert "line: b =" in text  # the dislocation was found
