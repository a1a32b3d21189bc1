"""notebooks/replay_run.ipynb runs headless: the demo recording replayed into the dashboard."""

from __future__ import annotations

from pathlib import Path

import nbformat
import pytest
from nbclient import NotebookClient

NOTEBOOK = Path(__file__).resolve().parents[2] / "notebooks" / "replay_run.ipynb"


@pytest.mark.timeout(180)
def test_replay_notebook_executes_headless():
    nb = nbformat.read(NOTEBOOK, as_version=4)
    client = NotebookClient(
        nb,
        kernel_name="python3",
        timeout=120,  # per cell; generous for a loaded CI machine (the notebook takes ~5 s)
        resources={"metadata": {"path": str(NOTEBOOK.parent)}},
    )
    client.execute()  # raises CellExecutionError on the first failing cell
    text = "".join(
        o.get("text", "")
        for c in nb.cells
        if c.cell_type == "code"
        for o in c.get("outputs", [])
        if o.get("output_type") == "stream"
    )
    assert "replay checks passed" in text
    assert "CHSH = " in text and "fixed n" in text
