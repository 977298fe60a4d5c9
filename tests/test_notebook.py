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
    # the notebook prints one line per injected effect of fixtures/demo_truth.json: every one must be found
    import json

    with open(os.path.join(ROOT, "fixtures", "demo_truth.json"), encoding="utf-8") as fh:
        effects = json.load(fh)["effects"]
    lines = [l for l in outputs.splitlines() if l.startswith(("found ", "MISSED"))]
    # six measurement effects plus the two export idioms (troponin '<5', potassium with decimal commas)
    assert len(lines) == len(effects) == 8, lines
    assert all(l.startswith("found ") for l in lines), [l for l in lines if l.startswith("MISSED")]
    for e in effects:
        assert any(repr(e["feature"]) in l and repr(e["kind"]) in l for l in lines), e
    assert (tmp_path / "walkthrough-report" / "report.html").exists()
