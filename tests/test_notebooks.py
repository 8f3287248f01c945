"""The worked-analysis notebooks: committed without outputs, and each one runs without error.

Each notebook is executed with nbclient on a python3 kernel, from the ``notebooks/`` folder (so
it finds ``data_demo/`` the way a user's Jupyter would); the executed copy is written to a
temporary folder, never back into the repository. A cell error fails the test with the cell's
traceback.
"""

from __future__ import annotations

from pathlib import Path

import nbclient
import nbformat
import pytest

ROOT = Path(__file__).resolve().parents[1]
NOTEBOOK_DIR = ROOT / "notebooks"
EXPECTED = ["01_first_analysis.ipynb", "02_polygons_latlon.ipynb",
            "03_planning_next_survey.ipynb", "04_repeated_surveys.ipynb"]


def _read(name: str):
    return nbformat.read(NOTEBOOK_DIR / name, as_version=4)


class TestCommittedNotebooks:
    def test_the_four_notebooks_are_there(self):
        assert sorted(p.name for p in NOTEBOOK_DIR.glob("*.ipynb")) == EXPECTED

    @pytest.mark.parametrize("name", EXPECTED)
    def test_valid_and_outputs_stripped(self, name):
        nb = _read(name)
        nbformat.validate(nb)
        for i, cell in enumerate(nb.cells):
            if cell.cell_type == "code":
                assert cell.outputs == [], f"{name} cell {i} has outputs; strip them"
                assert cell.execution_count is None, f"{name} cell {i} has an execution count"
        assert nb.metadata["kernelspec"]["name"] == "python3"

    @pytest.mark.parametrize("name", EXPECTED)
    def test_choices_are_explained(self, name):
        # every notebook says why it uses few permutations (runtime) and what a report needs
        nb = _read(name)
        text = " ".join(c.source for c in nb.cells if c.cell_type == "markdown")
        assert "permutations" in text and "Šidák" in text
        assert sum(c.cell_type == "markdown" for c in nb.cells) >= 6


_EXECUTED: dict = {}


def _execute(name: str, folder: Path):
    """Execute a notebook once per test session; the executed copy goes to ``folder``."""
    if name not in _EXECUTED:
        nb = _read(name)
        client = nbclient.NotebookClient(nb, timeout=900, kernel_name="python3",
                                         resources={"metadata": {"path": str(NOTEBOOK_DIR)}})
        try:
            client.execute()
        finally:
            nbformat.write(nb, folder / name)  # the executed copy stays out of the repository
        _EXECUTED[name] = nb
    return _EXECUTED[name]


@pytest.fixture(scope="module")
def out_folder(tmp_path_factory):
    return tmp_path_factory.mktemp("executed_notebooks")


@pytest.mark.slow          # executes every notebook end to end (about a minute); CI runs it
class TestNotebooksRun:
    @pytest.mark.parametrize("name", EXPECTED)
    def test_runs_without_error(self, name, out_folder):
        nb = _execute(name, out_folder)
        errors = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs
                  if o.output_type == "error"]
        assert not errors
        assert all(c.execution_count is not None for c in nb.cells if c.cell_type == "code")
        images = sum("image/png" in o.get("data", {}) for c in nb.cells
                     if c.cell_type == "code" for o in c.outputs)
        assert images >= 3  # figures are displayed as pictures, not as "<Figure ...>" text
        assert (out_folder / name).is_file()
        assert _read(name).cells[1].get("outputs") == []  # the repository copy is untouched

    def test_recommendation_comes_from_the_design_result(self, out_folder):
        nb = _execute("03_planning_next_survey.ipynb", out_folder)
        printed = "".join(o.get("text", "") for c in nb.cells if c.cell_type == "code"
                          for o in c.outputs if o.output_type == "stream")
        assert "Recommended layout:" in printed or "No candidate reaches power" in printed
        assert "To detect" in printed  # the sentences of evaluate_design, printed verbatim

    def test_repeated_surveys_find_the_declining_cluster(self, out_folder):
        # the resurvey's generating model (data_demo/resurvey/README.md) declines 16 cores in
        # 2024 and moves a fine-scale wave: the notebook must report both
        nb = _execute("04_repeated_surveys.ipynb", out_folder)
        printed = "".join(o.get("text", "") for c in nb.cells if c.cell_type == "code"
                          for o in c.outputs if o.output_type == "stream")
        assert "16 exceptional sites; truth: 16 declining cores" in printed
        assert "interaction is significant" in printed
