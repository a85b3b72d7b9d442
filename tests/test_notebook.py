"""The notebook in notebooks/ is stored clean and runs from top to bottom in a fresh kernel.

The notebook asserts its own diagnosis as it goes (the wrong layer, the finding kind at the wrong delta, the fixed
backward pass holding), so a cell that fails here means the walkthrough no longer tells the truth.
"""

from __future__ import annotations

import os
import warnings
from pathlib import Path

import pytest

# Older jupyter_core 5.x releases warn (DeprecationWarning, "Jupyter is migrating its paths to use standard
# platformdirs ...") when jupyter's folders are looked up without JUPYTER_PLATFORM_DIRS set; pytest turns warnings
# into errors. Setting JUPYTER_PLATFORM_DIRS=1 is the documented opt-in that silences it; the filter below covers
# only that message, for the imports (jupyter_core 5.9 no longer warns at all).
PLATFORMDIRS_WARNING = r"Jupyter is migrating its paths"
with warnings.catch_warnings():
    warnings.filterwarnings("ignore", message=PLATFORMDIRS_WARNING, category=DeprecationWarning)
    import nbclient  # the notebook tools are in the test extras, so a missing one fails loudly
    import nbformat

ROOT = Path(__file__).resolve().parents[1]
NOTEBOOKS = sorted((ROOT / "notebooks").glob("*.ipynb"))


def test_there_is_exactly_one_notebook():
    assert [p.name for p in NOTEBOOKS] == ["diagnosing-a-backward-pass.ipynb"]


@pytest.mark.parametrize("path", NOTEBOOKS, ids=lambda p: p.name)
def test_notebook_is_valid_and_stored_without_outputs(path):
    nb = nbformat.read(path, as_version=4)
    nbformat.validate(nb)
    code = [c for c in nb.cells if c.cell_type == "code"]
    assert code, "the notebook has no code cell"
    assert all(c.outputs == [] and c.execution_count is None for c in code), "clear the outputs before committing"
    assert nb.metadata.kernelspec.name == "python3"


def _html_outputs(nb) -> list[str]:
    return [out["data"]["text/html"] for c in nb.cells if c.cell_type == "code"
            for out in c.outputs if out.get("output_type") == "execute_result" and "text/html" in out.get("data", {})]


@pytest.mark.parametrize("path", NOTEBOOKS, ids=lambda p: p.name)
def test_notebook_runs_in_a_fresh_kernel(path, tmp_path, monkeypatch):
    monkeypatch.setenv("JUPYTER_PLATFORM_DIRS", "1")  # see PLATFORMDIRS_WARNING above
    nb = nbformat.read(path, as_version=4)
    client = nbclient.NotebookClient(nb, timeout=120, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})
    # Agg: report.plot() must draw without a display (the kernel would otherwise use the inline backend)
    env = {**os.environ, "MPLBACKEND": "Agg", "JUPYTER_PLATFORM_DIRS": "1"}
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=PLATFORMDIRS_WARNING, category=DeprecationWarning)
        client.execute(env=env)
    reports = [h for h in _html_outputs(nb) if 'class="gradcheck-report"' in h]
    # the reports display themselves as HTML: the broken one, the located one, then the fixed one
    verdicts = [("WRONG" if "WRONG:" in h else "OK" if "OK:" in h else "?") for h in reports]
    assert verdicts == ["WRONG", "WRONG", "OK"]
    assert "glaze.z" not in reports[0] and "the tanh derivative" in reports[1]
