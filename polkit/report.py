"""Executed notebooks as shareable reports: parameters in; HTML, notebook, results out.

:func:`make_report` EXECUTES the notebook's code: run only notebooks you trust, as you would
run a Python script.  It runs the notebook top to bottom in a fresh kernel (nbclient) with the
values of ``params`` injected after its cell tagged ``parameters`` (a new cell tagged
``injected-parameters`` that re-assigns them, so the notebook's own defaults stay visible),
then writes into ``out``::

    <name>.html            self-contained: figures embedded as data URIs, no widget or
                           MathJax scripts fetched from the web
    <name>.ipynb           the executed notebook, with the provenance appended
    results/               the result files the notebook wrote (see below)
    results.json           their list: relative path, size and SHA-256
    provenance.json        polkit and library versions, Python, platform, date, the
                           notebook's SHA-256, the parameters, input-file SHA-256s, seeds
                           and priors (also appended to the notebook as a last cell)

Convention with the notebooks: a parameter named ``out_dir`` is the folder the notebook
writes its results to; ``make_report`` points it at ``out/results`` unless ``params``
sets it.  Every parameter is passed to the kernel exactly as given: text is never
rewritten, also when it looks like a path.  The kernel runs in the notebook's own folder,
so a relative path is read relative to the notebook (as its own defaults are); pass an
absolute path to name a file elsewhere.

Every file is written atomically (:mod:`polkit.files`) and only after the notebook ran
without error; a failing cell raises :class:`~polkit.errors.DataError` naming the cell, and
the partly executed notebook is kept as ``<name>.failed.ipynb`` for diagnosis.
"""

from __future__ import annotations

import ast
import json
import logging
import os
import platform
import re
import sys
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from polkit import files
from polkit._paths import shareable
from polkit.errors import ConfigError, DataError
from polkit.safety import safety_markdown

__all__ = ["make_report", "parse_params", "ReportPaths", "PARAMETERS_TAG", "INJECTED_TAG",
           "PROVENANCE_TAG"]

log = logging.getLogger(__name__)

PARAMETERS_TAG = "parameters"
INJECTED_TAG = "injected-parameters"
PROVENANCE_TAG = "provenance"
RESULTS_DIR = "results"
_LIBRARIES = ("numpy", "scipy", "xarray", "emcee", "arviz", "corner", "matplotlib", "h5netcdf",
              "h5py", "ipywidgets", "ipykernel", "nbclient", "nbconvert", "nbformat")


@dataclass(frozen=True)
class ReportPaths:
    """Where :func:`make_report` wrote the report.

    Attributes
    ----------
    folder
        The report folder (``out``).
    html
        The self-contained HTML file.
    notebook
        The executed notebook (provenance appended).
    results
        The folder of result files (``out/results``).
    manifest
        ``results.json``: the result files with size and SHA-256.
    provenance
        ``provenance.json``.
    result_files
        The result files, as paths.
    """

    folder: Path
    html: Path
    notebook: Path
    results: Path
    manifest: Path
    provenance: Path
    result_files: tuple[Path, ...] = field(default_factory=tuple)


# --------------------------------------------------------------------------------------
# parameters
# --------------------------------------------------------------------------------------
def _tags(cell) -> list[str]:
    return list(cell.get("metadata", {}).get("tags", []))


def _parameter_cell(nb, path: Path) -> int | None:
    found = [i for i, c in enumerate(nb.cells) if PARAMETERS_TAG in _tags(c)]
    if len(found) > 1:
        raise ConfigError(f"expected one cell tagged '{PARAMETERS_TAG}', found {len(found)} "
                          f"(cells {[i + 1 for i in found]}); keep the tag on one cell",
                          path=path, key=PARAMETERS_TAG)
    return found[0] if found else None


def _defaults(source: str, path: Path) -> dict[str, Any]:
    """Top-level ``name = literal`` assignments of the parameters cell (others: text)."""
    try:
        tree = ast.parse(source)
    except SyntaxError as exc:
        raise ConfigError(f"the parameters cell is not valid Python ({exc.msg}, line "
                          f"{exc.lineno})", path=path, key=PARAMETERS_TAG) from None
    out: dict[str, Any] = {}
    for node in tree.body:
        targets = node.targets if isinstance(node, ast.Assign) else (
            [node.target] if isinstance(node, ast.AnnAssign) and node.value is not None else [])
        for t in targets:
            if isinstance(t, ast.Name):
                try:
                    out[t.id] = ast.literal_eval(node.value)
                except ValueError:
                    out[t.id] = ast.get_source_segment(source, node.value)
    return out


def _literal(name: str, value: Any, path: Path) -> str:
    text = repr(value)
    try:
        same = ast.literal_eval(text) == value
    except (ValueError, SyntaxError):
        same = False
    if not same:
        raise ConfigError(f"parameter values must be Python literals (numbers, text, True/False/"
                          f"None, lists, dicts); got {type(value).__name__} {text[:60]}",
                          path=path, key=name)
    return text


def parse_params(items: list[str] | tuple[str, ...]) -> dict[str, Any]:
    """``["name=value", ...]`` from a command line into ``{name: value}``.

    The value is read as a Python literal when it is one (``seed=3`` gives the int 3,
    ``claims=['E < 1 fJ']`` a list, ``x=None`` None) and kept as text otherwise
    (``map_file=data/map.nc``).

    Raises
    ------
    ConfigError
        An item without ``=``, a name that is not an identifier, or a name given twice.
    """
    out: dict[str, Any] = {}
    for item in items:
        name, sep, text = item.partition("=")
        name = name.strip()
        if not sep or not name.isidentifier():
            raise ConfigError(f"expected name=value with a Python name, found {item!r}",
                              key="param")
        if name in out:
            raise ConfigError(f"parameter {name!r} given twice", key=name)
        try:
            out[name] = ast.literal_eval(text.strip())
        except (ValueError, SyntaxError):
            out[name] = text.strip()
    return out


# --------------------------------------------------------------------------------------
# provenance
# --------------------------------------------------------------------------------------
def _versions() -> dict[str, str]:
    from polkit import __version__
    from polkit.provenance import library_versions

    return {"polkit": __version__, **library_versions(_LIBRARIES)}


def _input_files(params: dict[str, Any], base: Path, results: Path) -> dict[str, dict]:
    """SHA-256 of every existing file a parameter names (files of a named folder too)."""
    out: dict[str, dict] = {}
    for name, value in params.items():
        if not isinstance(value, str) or not value:
            continue
        p = Path(value) if os.path.isabs(value) else base / value
        if not p.exists():
            continue
        p = p.resolve()
        if p == results.resolve() or results.resolve() in p.parents:
            continue
        named = [p] if p.is_file() else sorted(f for f in p.iterdir() if f.is_file())
        for f in named:
            out[str(f)] = {"parameter": name, "sha256": files.file_sha256(f),
                           "bytes": f.stat().st_size}
    return out


def _result_summaries(results: Path) -> dict[str, dict]:
    out = {}
    for f in sorted(results.rglob("summary.json")):
        try:
            out[str(f.parent.relative_to(results))] = json.loads(f.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            log.warning("cannot read %s: %s", f, exc)
    return out


def _provenance(nb_path: Path, params: dict, defaults: dict, results: Path,
                manifest: list[dict]) -> dict[str, Any]:
    summaries = _result_summaries(results)
    seeds = {k: v for k, v in {**defaults, **params}.items() if "seed" in k.lower()}
    fits = {}
    for where, s in summaries.items():
        prov = s.get("provenance", {}) if isinstance(s, dict) else {}
        fits[where] = {k: prov.get(k) for k in ("input", "input_sha256", "seed", "seed_spawn_key",
                                                "priors", "created") if k in prov}
        if isinstance(s, dict) and "diagnostics" in s:
            fits[where]["converged"] = s["diagnostics"].get("converged")
    all_params = {**defaults, **params}
    return {
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
        "notebook": {"path": str(nb_path), "sha256": files.file_sha256(nb_path)},
        "parameters": all_params,
        "injected": sorted(params),
        "seeds": seeds,
        "inputs": _input_files(all_params, nb_path.parent, results),
        "fits": fits,
        "results": manifest,
        "python": {"version": platform.python_version(),
                   "implementation": platform.python_implementation(),
                   "executable": sys.executable},
        "platform": {"system": platform.platform(), "machine": platform.machine()},
        "versions": _versions(),
    }


def _provenance_markdown(prov: dict[str, Any]) -> str:
    def table(header: tuple[str, ...], rows: list[tuple]) -> list[str]:
        if not rows:
            return ["(none)", ""]
        lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
        lines += ["| " + " | ".join(str(c).replace("|", "\\|") for c in r) + " |" for r in rows]
        return lines + [""]

    md = ["## Provenance", "",
          f"Report made {prov['created']} from `{Path(prov['notebook']['path']).name}` "
          f"(SHA-256 `{prov['notebook']['sha256']}`), Python {prov['python']['version']} "
          f"({prov['python']['implementation']}) on {prov['platform']['system']}.", "",
          "### Parameters", ""]
    md += table(("name", "value", "set by"),
                [(k, f"`{v!r}`", "report" if k in prov["injected"] else "notebook default")
                 for k, v in prov["parameters"].items()])
    md += ["### Seeds", ""]
    seed_rows = [(k, v, "parameter") for k, v in prov["seeds"].items()]
    seed_rows += [(f"{w}", f.get("seed"), "recorded in the result")
                  for w, f in prov["fits"].items() if f.get("seed") is not None]
    md += table(("name", "seed", "where"), seed_rows)
    md += ["### Input files", ""]
    md += table(("file", "parameter", "SHA-256"),
                [(Path(f).name, e["parameter"], f"`{e['sha256']}`")
                 for f, e in prov["inputs"].items()])
    md += table(("fit", "input", "input SHA-256", "converged"),
                [(w, Path(str(f.get("input", ""))).name, f"`{f.get('input_sha256')}`",
                  f.get("converged")) for w, f in prov["fits"].items()])
    md += ["### Priors", ""]
    prior_rows = []
    for w, f in prov["fits"].items():
        priors = f.get("priors") or {}
        items = priors.get("parameters", priors) if isinstance(priors, dict) else {}
        if isinstance(items, list):
            items = {e.get("name", str(i)): e for i, e in enumerate(items)}
        for name, spec in (items.items() if isinstance(items, dict) else []):
            spec = {k: v for k, v in spec.items() if k != "description"}
            prior_rows.append((w, name, f"`{json.dumps(spec, sort_keys=True)}`"))
    md += table(("fit", "parameter", "prior"), prior_rows)
    md += ["### Result files", ""]
    md += table(("file", "bytes", "SHA-256"),
                [(e["path"], e["bytes"], f"`{e['sha256']}`") for e in prov["results"]])
    md += ["### Versions", ""]
    md += table(("package", "version"), sorted(prov["versions"].items()))
    return "\n".join(md)


# --------------------------------------------------------------------------------------
# the report
# --------------------------------------------------------------------------------------
def _read_notebook(path: Path):
    import nbformat

    if not path.is_file():
        raise DataError("notebook not found; check the path", path=path)
    try:
        return nbformat.read(path, as_version=4)
    except (OSError, ValueError, nbformat.reader.NotJSONError) as exc:
        raise DataError(f"cannot read the notebook: expected a Jupyter notebook (.ipynb, "
                        f"nbformat 4), found {type(exc).__name__}: {exc}", path=path) from None


def _html(nb) -> str:
    from nbconvert import HTMLExporter

    exporter = HTMLExporter(embed_images=True)
    # self-contained: widget views need JavaScript from the web, so they are left out
    # (every widget in polkit's notebooks has a static figure beside it); no MathJax fetch
    exporter.mathjax_url = ""
    exporter.require_js_url = ""
    nb = _without_widget_views(nb)
    body, _ = exporter.from_notebook_node(nb)
    # the template still writes the (now empty) script tags: drop them
    return re.sub(r'<script src="">\s*</script>', "", body)


def _without_widget_views(nb):
    import copy

    nb = copy.deepcopy(nb)
    nb.metadata.pop("widgets", None)
    for cell in nb.cells:
        for out in cell.get("outputs", []):
            data = out.get("data")
            if data and "application/vnd.jupyter.widget-view+json" in data:
                data.pop("application/vnd.jupyter.widget-view+json")
                data["text/plain"] = ("[interactive panel: runs in JupyterLab; the static "
                                      "figure beside it shows its state]")
    return nb


def make_report(
    notebook: str | os.PathLike,
    *,
    params: dict[str, Any] | None = None,
    out: str | os.PathLike,
    kernel_name: str = "python3",
    timeout: int = 3600,
) -> ReportPaths:
    """Execute ``notebook`` with ``params`` and write a shareable report into ``out``.

    The notebook's code runs with your rights, like any Python script: run only
    notebooks you trust.

    Parameters
    ----------
    notebook
        The notebook (``.ipynb``); its cell tagged ``parameters`` holds the defaults.
    params
        ``{name: value}`` of Python literals to inject after the parameters cell.  Names
        must be assigned in the parameters cell.  ``out_dir`` defaults to ``out/results``.
        Values are passed exactly as given; relative paths are read by the notebook from
        its own folder.
    out
        The report folder (created; files in it are replaced atomically).
    kernel_name
        Jupyter kernel; ``"python3"`` runs in the current interpreter.
    timeout
        Seconds allowed per cell.

    Returns
    -------
    ReportPaths

    Raises
    ------
    DataError
        Missing or unreadable notebook, or a cell that failed (named, with its error).
    ConfigError
        Unknown parameter names, values that are not literals, more than one parameters
        cell, or parameters given to a notebook without a parameters cell.
    """
    nb_path = Path(notebook).resolve()
    out = Path(out).resolve()
    nb = _read_notebook(nb_path)
    results = out / RESULTS_DIR
    params, defaults = _inject_parameters(nb, nb_path, dict(params or {}), results)
    results.mkdir(parents=True, exist_ok=True)
    _execute(nb, nb_path, out, kernel_name=kernel_name, timeout=timeout)
    return _write_report(nb, nb_path, out, params, defaults)


def _inject_parameters(nb, nb_path: Path, params: dict[str, Any],
                       results: Path) -> tuple[dict[str, Any], dict[str, Any]]:
    """Check ``params`` against the parameters cell and insert them after it (tagged)."""
    import nbformat

    index = _parameter_cell(nb, nb_path)
    defaults = _defaults(nb.cells[index].source, nb_path) if index is not None else {}
    if "out_dir" in defaults and "out_dir" not in params:
        params["out_dir"] = str(results)
    if params and index is None:
        raise ConfigError(f"parameters {sorted(params)} given, but no cell is tagged "
                          f"'{PARAMETERS_TAG}'; tag the cell that sets the defaults",
                          path=nb_path, key=PARAMETERS_TAG)
    unknown = sorted(set(params) - set(defaults))
    if unknown:
        raise ConfigError(f"unknown parameters {unknown}; the parameters cell sets "
                          f"{sorted(defaults)}", path=nb_path, key=unknown[0])
    if params:
        lines = ["# Parameters injected by polkit report"]
        lines += [f"{k} = {_literal(k, v, nb_path)}" for k, v in params.items()]
        cell = nbformat.v4.new_code_cell("\n".join(lines))
        cell.metadata["tags"] = [INJECTED_TAG]
        nb.cells.insert(index + 1, cell)
    return params, defaults


def _execute(nb, nb_path: Path, out: Path, *, kernel_name: str, timeout: int) -> None:
    """Run every cell in a fresh kernel; a failed cell keeps the notebook and names the cell."""
    import nbformat
    from nbclient import NotebookClient
    from nbclient.exceptions import CellExecutionError

    client = NotebookClient(nb, kernel_name=kernel_name, timeout=timeout,
                            resources={"metadata": {"path": str(nb_path.parent)}},
                            store_widget_state=True)
    log.info("executing %s", nb_path)
    try:
        client.execute()
    except CellExecutionError as exc:
        failed = next((i for i, c in enumerate(nb.cells) if c.cell_type == "code" and any(
            o.get("output_type") == "error" for o in c.get("outputs", []))), None)
        keep = files.write_text(out / f"{nb_path.stem}.failed.ipynb", nbformat.writes(nb))
        where = f"cell {failed + 1}" if failed is not None else "a cell"
        err = next((o for c in nb.cells for o in c.get("outputs", [])
                    if o.get("output_type") == "error"), {})
        raise DataError(f"{where} failed with {err.get('ename', 'an error')}: "
                        f"{err.get('evalue', str(exc)[:300])}; the executed notebook is kept in "
                        f"{keep} -- fix the parameters or the notebook", path=nb_path,
                        field=where) from None


def _write_report(nb, nb_path: Path, out: Path, params: dict[str, Any],
                  defaults: dict[str, Any]) -> ReportPaths:
    """The executed notebook with safety and provenance cells, its HTML and the manifests."""
    import nbformat

    results = out / RESULTS_DIR
    manifest = [{"path": str(f.relative_to(results)), "bytes": f.stat().st_size,
                 "sha256": files.file_sha256(f)}
                for f in sorted(results.rglob("*")) if f.is_file() and not f.name.endswith(
                    ".part")]
    prov = _provenance(nb_path, params, defaults, results, manifest)
    # a report travels: name files by name and SHA-256, not by this machine's folders
    prov = json.loads(shareable(json.dumps(prov)))
    safety = nbformat.v4.new_markdown_cell("## Safety\n\n" + safety_markdown())
    safety.metadata["tags"] = ["safety"]
    nb.cells.append(safety)
    cell = nbformat.v4.new_markdown_cell(_provenance_markdown(prov))
    cell.metadata["tags"] = [PROVENANCE_TAG]
    nb.cells.append(cell)

    stem = nb_path.stem
    paths = ReportPaths(
        folder=out,
        html=out / f"{stem}.html",
        notebook=out / f"{stem}.ipynb",
        results=results,
        manifest=out / "results.json",
        provenance=out / "provenance.json",
        result_files=tuple(results / e["path"] for e in manifest),
    )
    files.write_json(paths.manifest, {"results": manifest})
    files.write_json(paths.provenance, prov)
    files.write_text(paths.notebook, nbformat.writes(nb))
    files.write_text(paths.html, _html(nb))
    stale = out / f"{stem}.failed.ipynb"
    if stale.exists():
        stale.unlink()
    log.info("report written to %s", out)
    return paths
