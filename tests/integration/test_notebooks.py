"""The notebooks run headless with nbclient on this environment's ``python3`` kernel."""

from __future__ import annotations

import sys
from pathlib import Path

import nbformat
import pytest
from jupyter_client.kernelspec import KernelSpecManager
from nbclient import NotebookClient

NOTEBOOKS = Path(__file__).resolve().parents[2] / "notebooks"
NAMES = ["live_alignment.ipynb", "qudit_frames.ipynb"]


def test_python3_kernel_spec_is_found():
    # ipykernel installs this spec into the venv (share/jupyter/kernels/python3); jupyter_client
    # starts a spec whose argv[0] is "python" with the running interpreter, so the kernel runs
    # in this venv, where labwatch is installed (checked again by KERNEL-PREFIX below)
    spec = KernelSpecManager().get_kernel_spec("python3")
    assert spec.language == "python" and "ipykernel" in " ".join(spec.argv)


@pytest.mark.timeout(180)
@pytest.mark.parametrize("name", NAMES)
def test_notebook_executes_headless(name):
    nb = nbformat.read(NOTEBOOKS / name, as_version=4)
    # a last cell that reports where the kernel runs
    nb.cells.append(nbformat.v4.new_code_cell("import sys; print('KERNEL-PREFIX', sys.prefix)"))
    client = NotebookClient(
        nb,
        kernel_name="python3",
        timeout=120,  # per cell; generous for a loaded CI machine, the notebook takes ~25 s
        resources={"metadata": {"path": str(NOTEBOOKS)}},
    )
    client.execute()  # raises CellExecutionError on the first failing cell
    outputs = [
        o.get("text", "")
        for c in nb.cells
        if c.cell_type == "code"
        for o in c.get("outputs", [])
        if o.get("output_type") == "stream"
    ]
    text = "".join(outputs)
    assert "checks passed" in text
    assert f"KERNEL-PREFIX {sys.prefix}" in text
