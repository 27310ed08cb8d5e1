"""Every notebook in notebooks/ runs top to bottom on the demo sample, so none can go stale.

The notebooks are executed with nbclient in a fresh kernel of this interpreter, with small
step counts set through their parameters cell (the cell tagged ``parameters``; the values
below are injected after it, as ``polkit report`` does).  Parameters the tests set when a
notebook has them: ``max_steps``, ``n_draws`` and ``out_dir`` (a temporary folder).
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat")
nbclient = pytest.importorskip("nbclient")
pytest.importorskip("ipykernel")

NOTEBOOKS = sorted((Path(__file__).resolve().parents[1] / "notebooks").glob("*.ipynb"))
SMALL = {"max_steps": 40, "n_draws": 400}


def _inject(nb, values: dict) -> dict:
    from polkit.report import _defaults, _parameter_cell

    index = _parameter_cell(nb, Path(nb.metadata.get("path", "notebook")))
    assert index is not None, "a notebook needs a first cell tagged 'parameters'"
    defaults = _defaults(nb.cells[index].source, Path("notebook"))
    chosen = {k: v for k, v in values.items() if k in defaults}
    cell = nbformat.v4.new_code_cell("\n".join(f"{k} = {v!r}" for k, v in chosen.items()))
    cell.metadata["tags"] = ["injected-parameters"]
    nb.cells.insert(index + 1, cell)
    return chosen


def test_the_workbench_notebooks_are_there():
    names = {p.name for p in NOTEBOOKS}
    assert {"01_dispersion.ipynb", "02_power_series.ipynb", "03_energy_budget.ipynb"} <= names


@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.stem for p in NOTEBOOKS])
def test_notebook_is_committed_clean(path):
    nb = nbformat.read(path, as_version=4)
    nbformat.validate(nb)
    code = [c for c in nb.cells if c.cell_type == "code"]
    assert all(not c.outputs and c.execution_count is None for c in code), (
        f"{path.name}: clear the outputs before committing (diffable notebooks)")
    first_code = code[0]
    assert "parameters" in first_code.metadata.get("tags", []), (
        f"{path.name}: the first code cell must be tagged 'parameters'")
    assert sum(c.cell_type == "markdown" for c in nb.cells) >= 3  # text at each step
    # no absolute paths of the machine the notebook was written on: nothing above the clone
    outside = str(Path(__file__).resolve().parents[2]) + "/"
    assert outside not in "".join(c.source for c in nb.cells)


@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.stem for p in NOTEBOOKS])
def test_notebook_runs_top_to_bottom(path, tmp_path):
    nb = nbformat.read(path, as_version=4)
    chosen = _inject(nb, {**SMALL, "out_dir": str(tmp_path / "out")})
    nb.cells.append(nbformat.v4.new_code_cell("import sys\nprint(sys.executable)"))
    client = nbclient.NotebookClient(nb, kernel_name="python3", timeout=600,
                                     resources={"metadata": {"path": str(path.parent)}})
    client.execute()  # raises CellExecutionError naming the failing cell
    errors = [o for c in nb.cells for o in c.get("outputs", []) if o.output_type == "error"]
    assert not errors
    # the kernel is this interpreter (the "python3" kernel resolved to sys.executable)
    printed = "".join(o.get("text", "") for o in nb.cells[-1].outputs)
    assert Path(printed.strip()).resolve() == Path(sys.executable).resolve()
    if "out_dir" in chosen:
        written = [p for p in (tmp_path / "out").rglob("*") if p.is_file()]
        assert written, f"{path.name} wrote no result into out_dir"
    # every widget has a static figure beside it: count image outputs
    images = sum("image/png" in o.get("data", {}) for c in nb.cells for o in c.get("outputs", []))
    widgets = sum("application/vnd.jupyter.widget-view+json" in o.get("data", {})
                  for c in nb.cells for o in c.get("outputs", []))
    assert images >= widgets
