"""Every notebook in notebooks/ runs top to bottom on a small generated demo workspace.

Each notebook is executed with nbclient (kernel python3) in a temporary folder;
the environment variables its first cell reads point it at a demo made once
for this module (CURATE_DEMO_DIR / CURATE_WORKSPACE). Any cell error fails the
test, with the cell's traceback in the message. The notebooks in the repository
must carry no outputs.
"""

from __future__ import annotations

from pathlib import Path

import nbformat
import pytest

REPO = Path(__file__).resolve().parent.parent
NOTEBOOKS = sorted((REPO / "notebooks").glob("*.ipynb"))
DEMO_IMAGES = 60

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """A small demo scenario with every pipeline step run on it (as `curate demo` does)."""
    from curate.demo import generate_scenario
    from curate.pipeline import run_pipeline

    out = tmp_path_factory.mktemp("notebook-demo") / "demo"
    generate_scenario(out, n_images=DEMO_IMAGES, random_state=0, progress=False, image_scale=0.5)
    run_pipeline(out, progress=False, echo=lambda line: None)
    return out


def test_there_are_four_notebooks_with_outputs_stripped():
    names = [p.name for p in NOTEBOOKS]
    assert names == [
        "01_assemble_and_validate.ipynb",
        "02_near_duplicates_review.ipynb",
        "03_taxonomy_and_balance.ipynb",
        "04_groups_split_check_freeze.ipynb",
    ]
    for path in NOTEBOOKS:
        nb = nbformat.read(path, as_version=4)
        nbformat.validate(nb)
        assert nb.metadata["kernelspec"]["name"] == "python3"
        for cell in nb.cells:
            if cell.cell_type == "code":
                assert cell.outputs == [] and cell.execution_count is None, path.name
        # the first code cell is the one a user changes: it names the workspace
        first = next(c for c in nb.cells if c.cell_type == "code")
        assert "WORKSPACE" in first.source, path.name


@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.stem for p in NOTEBOOKS])
def test_notebook_runs_clean_on_the_demo(path, demo, tmp_path, monkeypatch):
    from nbclient import NotebookClient
    from nbclient.exceptions import CellExecutionError

    monkeypatch.setenv("CURATE_DEMO_DIR", str(demo))
    monkeypatch.setenv("CURATE_WORKSPACE", str(demo / "workspace"))
    monkeypatch.setenv("CURATE_DEMO_IMAGES", str(DEMO_IMAGES))
    monkeypatch.setenv("CURATE_REVIEWER", "notebook test")
    monkeypatch.setenv("CURATE_PROGRESS", "0")
    monkeypatch.setenv("MPLBACKEND", "Agg")
    nb = nbformat.read(path, as_version=4)
    client = NotebookClient(nb, kernel_name="python3", timeout=600,
                            resources={"metadata": {"path": str(tmp_path)}})
    try:
        client.execute()
    except CellExecutionError as exc:
        pytest.fail(f"{path.name} failed:\n{exc}")
    errors = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs
              if o.get("output_type") == "error"]
    assert not errors
