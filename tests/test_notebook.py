"""The walkthrough notebook runs end to end (executed with nbclient)."""
import os

import pytest

from .conftest import ROOT


@pytest.mark.slow
def test_walkthrough_notebook_runs(tmp_path):
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    nb = nbformat.read(os.path.join(ROOT, "notebooks", "walkthrough.ipynb"), as_version=4)
    os.environ["SITECHECK_ROOT"] = ROOT
    client = nbclient.NotebookClient(nb, timeout=900, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute()
    outputs = "".join(o.get("text", "") for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", []))
    assert "site probe AUC" in outputs and "verdict" in outputs
    assert "found " in outputs  # at least one injected effect recovered
    assert (tmp_path / "walkthrough-report" / "report.html").exists()
