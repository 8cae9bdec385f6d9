"""The notebooks in notebooks/ execute end to end (short chains) and show what they promise."""
from __future__ import annotations

from pathlib import Path

import nbformat
import pytest
from nbclient import NotebookClient

NOTEBOOKS = Path(__file__).resolve().parent.parent / "notebooks"


def _execute(name: str, out: Path, monkeypatch) -> list[str]:
    """Run notebook ``name`` with short chains; return each code cell's text output."""
    monkeypatch.setenv("HIERWORK_NOTEBOOK_DRAWS", "150")
    monkeypatch.setenv("HIERWORK_NOTEBOOK_OUT", str(out))
    notebook = nbformat.read(NOTEBOOKS / name, as_version=4)
    NotebookClient(notebook, timeout=900, kernel_name="python3",
                   resources={"metadata": {"path": str(NOTEBOOKS)}}).execute()
    texts = []
    for cell in notebook.cells:
        if cell.cell_type != "code":
            continue
        parts = []
        for output in cell.get("outputs", []):
            parts.append(output.get("text", ""))
            parts += [str(v) for k, v in output.get("data", {}).items() if k.startswith("text/")]
        texts.append("".join(parts))
    return texts, notebook


def _has_svg(cell) -> bool:
    return any("image/svg+xml" in o.get("data", {}) for o in cell.get("outputs", []))


@pytest.mark.slow
def test_api_walkthrough_runs(tmp_path, monkeypatch):
    texts, notebook = _execute("01_api_walkthrough.ipynb", tmp_path, monkeypatch)
    run = tmp_path / "wheat"
    assert (run / "report.html").is_file() and (run / "summary.md").is_file()
    assert any("Pooling plot for farm, expected outcome, 30 groups" in t for t in texts)
    assert any("pooling_weight" in t for t in texts)
    assert sum(_has_svg(c) for c in notebook.cells) == 3
    assert any(t.startswith("# Wheat yield across 30 farms") for t in texts)


@pytest.mark.slow
def test_failing_to_passing_runs(tmp_path, monkeypatch):
    texts, notebook = _execute("02_failing_to_passing.ipynb", tmp_path, monkeypatch)
    joined = "\n".join(texts)
    # Two chains of 100 draws cannot reach the default bulk ESS minimum of 400.
    assert "passed: False" in joined
    assert "Bulk ESS" in joined and "must be at least 400" in joined
    assert "Spec differences" in joined and "sampling.draws" in joined
    assert (tmp_path / "depots-longer" / "report.html").is_file()
    assert "outcome_mean" in joined and "p_above_population" in joined  # the outcome's scale
    assert any(_has_svg(c) for c in notebook.cells)
