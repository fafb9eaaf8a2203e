"""The notebooks run top to bottom (nbclient) on a tiny demo scenario, so they never rot."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import nbformat
import pytest
from nbclient import NotebookClient

NOTEBOOKS = sorted((Path(__file__).resolve().parent.parent / "notebooks").glob("*.ipynb"))
KERNEL = "auction-replay-test"


@pytest.fixture(scope="module")
def kernel_env(tmp_path_factory):
    """A kernelspec that runs this interpreter (the venv's), whatever else is installed."""
    root = tmp_path_factory.mktemp("jupyter")
    spec = root / "kernels" / KERNEL
    spec.mkdir(parents=True)
    (spec / "kernel.json").write_text(json.dumps({
        "argv": [sys.executable, "-m", "ipykernel_launcher", "-f", "{connection_file}"],
        "display_name": "auction-replay tests", "language": "python"}))
    return root


def test_there_are_two_notebooks():
    names = [p.name for p in NOTEBOOKS]
    assert "01_what_if_campaign_bid_differently.ipynb" in names
    assert "02_backtest_new_update_rule.ipynb" in names


@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.stem for p in NOTEBOOKS])
def test_notebook_executes(path, kernel_env, tmp_path, monkeypatch):
    # JUPYTER_PATH is searched before the user's and the system's kernel folders.
    monkeypatch.setenv("JUPYTER_PATH", str(kernel_env))
    monkeypatch.setenv("REPLAY_NOTEBOOK_CAMPAIGNS", "3")
    monkeypatch.setenv("REPLAY_NOTEBOOK_DAYS", "2")
    monkeypatch.setenv("TMPDIR", str(tmp_path))
    nb = nbformat.read(path, as_version=4)
    # Stored without outputs (the repository keeps them clean).
    assert all(not c.get("outputs") for c in nb.cells if c.cell_type == "code")
    assert any("Competitors are held fixed" in c.source for c in nb.cells)
    client = NotebookClient(nb, kernel_name=KERNEL, timeout=300,
                            resources={"metadata": {"path": str(tmp_path)}})
    client.execute()  # raises CellExecutionError with the traceback on any failing cell
    errors = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])
              if o.get("output_type") == "error"]
    assert not errors
