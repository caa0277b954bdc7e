"""docs/tour.ipynb runs from top to bottom in a real Jupyter kernel (nbclient + ipykernel)."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

import ergodex

NOTEBOOK = Path(__file__).resolve().parents[1] / "docs" / "tour.ipynb"


@pytest.mark.slow
def test_tour_notebook_executes_and_shows_tables_and_figures(tmp_path, monkeypatch):
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    pytest.importorskip("ipykernel")
    pytest.importorskip("xarray")
    # the kernel imports the same ergodex as the tests, and works in a scratch folder
    source_root = str(Path(ergodex.__file__).resolve().parents[1])
    monkeypatch.setenv(
        "PYTHONPATH",
        os.pathsep.join(
            [source_root] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]
        ),
    )
    monkeypatch.setenv("MPLBACKEND", "module://matplotlib_inline.backend_inline")
    notebook = nbformat.read(NOTEBOOK, as_version=4)
    client = nbclient.NotebookClient(
        notebook,
        timeout=300,
        kernel_name="python3",
        resources={"metadata": {"path": str(tmp_path)}},
    )
    client.execute()  # raises CellExecutionError on the first failing cell

    outputs = [out for cell in notebook.cells if cell.cell_type == "code" for out in cell.outputs]
    assert not [o for o in outputs if o.output_type == "error"]
    html = [o["data"]["text/html"] for o in outputs if "text/html" in o.get("data", {})]
    # the fitter (scikit-learn's display), the surrogate, the check and the registry version
    assert any("SparseODE" in h for h in html)
    assert any("<b>Surrogate</b>" in h for h in html)
    assert any("<b>Scorecard</b>" in h for h in html)
    assert any("convection-loop/1" in h for h in html)
    images = [o for o in outputs if "image/png" in o.get("data", {})]
    assert len(images) >= 3  # histograms, autocorrelation, the simulated member
    # nothing was written beside the notebook or in the scratch folder but what the cells made
    assert not (tmp_path / "models").exists()
