"""The getting-started page executed as a real notebook (nbclient and an IPython kernel), as a user runs it.

``tests/test_docs_run.py`` runs the same blocks in this process, cheaply, and checks what they make; this test runs
them the way a notebook user does, in a Jupyter kernel in a new process, one cell per block, so a block that only
works outside a kernel (or prints where a notebook shows) fails here. One hidden first cell makes the demo's
sampling small (2 chains x 150 draws after 150 tuning steps), as in ``test_docs_run.py``; every other cell is a
block of ``docs/getting_started.md`` as users read it. In the slow step: a kernel start and a fit take a minute.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from test_docs_run import DOCS, python_blocks

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")
pytest.importorskip("ipykernel")

SETUP = 'import hierchoice.demo\nhierchoice.demo.DEMO_SAMPLING = {"chains": 2, "draws": 150, "tune": 150}'


@pytest.mark.slow
def test_getting_started_runs_as_a_notebook(tmp_path: Path) -> None:
    blocks = python_blocks(DOCS / "getting_started.md")
    assert len(blocks) >= 9
    nb = nbformat.v4.new_notebook()
    nb.cells = [nbformat.v4.new_code_cell(SETUP)] + [nbformat.v4.new_code_cell(b) for b in blocks]
    client = nbclient.NotebookClient(nb, timeout=900, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute()  # raises CellExecutionError, naming the cell, on any error
    outputs = [cell.get("outputs", []) for cell in nb.cells]
    assert not any(o.get("output_type") == "error" for cell in outputs for o in cell)
    html = "".join(o.get("data", {}).get("text/html", "") for cell in outputs for o in cell)
    # the fit's display leads with its convergence verdict, and the page's tables are shown as HTML
    assert "convergence" in html.lower()
    assert "<table" in html
    assert (tmp_path / "results" / "report.html").exists()
