"""Execute the notebooks headless (nbclient, kernel python3); any cell error fails the test.

The notebooks choose small settings in their first cells (few advances, coarse meshes, few
harmonics), so each runs in a few minutes on 2 cores. Outputs go to a temporary folder
(``TBMINV_NOTEBOOK_OUT``); the notebook files on disk are never modified.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest

NOTEBOOKS = Path(__file__).resolve().parents[1] / "notebooks"
NAMES = ("01_shift", "02_reach", "03_methods")


def _run(name: str, tmp_path: Path) -> None:
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    path = NOTEBOOKS / f"{name}.ipynb"
    nb = nbformat.read(path, as_version=4)
    old = os.environ.get("TBMINV_NOTEBOOK_OUT")
    os.environ["TBMINV_NOTEBOOK_OUT"] = str(tmp_path)
    try:
        client = nbclient.NotebookClient(nb, timeout=1200, kernel_name="python3",
                                         resources={"metadata": {"path": str(NOTEBOOKS)}})
        client.execute()          # raises CellExecutionError on the first failing cell
    finally:
        if old is None:
            os.environ.pop("TBMINV_NOTEBOOK_OUT", None)
        else:
            os.environ["TBMINV_NOTEBOOK_OUT"] = old


@pytest.mark.parametrize("name", NAMES)
def test_notebook_is_stored_without_outputs(name):
    nb = json.loads((NOTEBOOKS / f"{name}.ipynb").read_text(encoding="utf-8"))
    assert nb["metadata"]["kernelspec"]["name"] == "python3"
    for cell in nb["cells"]:
        if cell["cell_type"] == "code":
            assert cell.get("outputs", []) == [] and cell.get("execution_count") is None
    text = " ".join("".join(c["source"]) for c in nb["cells"])
    assert "interpretation aid" in text and "licensed engineers" in text


@pytest.mark.slow
@pytest.mark.parametrize("name", NAMES)
def test_notebook_runs(name, tmp_path):
    _run(name, tmp_path)
    assert any(tmp_path.rglob("*.png"))
