"""What `polkit report` runs and how its parameters reach the notebook (invented notebook)."""

from __future__ import annotations

import nbformat

from polkit.cli import build_parser
from polkit.report import make_report


def test_report_help_says_that_notebook_code_is_executed():
    # common practice, no published source: running someone's notebook runs their code
    sub = next(a for a in build_parser()._actions if a.dest == "command")
    text = " ".join(sub.choices["report"].format_help().split())
    assert "run only notebooks you trust" in text and "passed exactly as given" in text


def test_text_parameters_are_passed_exactly_as_given(tmp_path, monkeypatch):
    # common practice, no published source: a text parameter is not rewritten, even when it
    # names a file that exists relative to the current folder
    nb = nbformat.v4.new_notebook()
    params = nbformat.v4.new_code_cell('label = "default"')
    params.metadata["tags"] = ["parameters"]
    nb.cells = [params, nbformat.v4.new_code_cell("print(repr(label))")]
    folder = tmp_path / "nb"
    folder.mkdir()
    nbformat.write(nb, folder / "tiny.ipynb")
    monkeypatch.chdir(tmp_path)
    (tmp_path / "data.txt").write_text("invented")
    paths = make_report(folder / "tiny.ipynb", params={"label": "data.txt"}, out=tmp_path / "r")
    done = nbformat.read(paths.notebook, as_version=4)
    injected = next(c for c in done.cells if "injected-parameters" in c.metadata.get("tags", []))
    assert "label = 'data.txt'" in injected.source
    printed = "".join(
        o.get("text", "") for c in done.cells if c.cell_type == "code" for o in c.outputs)
    assert "'data.txt'" in printed and str(tmp_path) not in printed
