"""Every notebook in notebooks/ runs top to bottom (examples run as tests)."""

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
NOTEBOOKS = sorted((ROOT / "notebooks").glob("*.ipynb"))


def test_there_are_notebooks():
    assert NOTEBOOKS


@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.name for p in NOTEBOOKS])
def test_notebook_runs(path, tmp_path):
    import nbformat
    from nbclient import NotebookClient

    nb = nbformat.read(path, as_version=4)
    (tmp_path / "meshes").symlink_to(ROOT / "meshes")
    NotebookClient(nb, timeout=300, kernel_name="python3",
                   resources={"metadata": {"path": str(tmp_path)}}).execute()
    # execute() raises CellExecutionError on any failing cell; the notebooks'
    # own asserts are the checks
