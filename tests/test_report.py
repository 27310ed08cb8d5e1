"""``make_report``: a notebook executed with parameters into HTML, notebook, results, provenance.

The notebook used here is written by the test: a short peak-table dispersion fit of an
invented map (simulated with polkit's own model and a fixed seed), a figure and a widget.
"""

from __future__ import annotations

import hashlib
import json
import re
import sys

import numpy as np
import pytest
import xarray as xr

nbformat = pytest.importorskip("nbformat")
pytest.importorskip("nbclient")
pytest.importorskip("nbconvert")

from polkit.errors import ConfigError, DataError  # noqa: E402
from polkit.report import make_report, parse_params  # noqa: E402

CELLS = [
    ("markdown", "# A small report\nAn invented map, fitted on the peak table.", None),
    ("code", 'map_file = "map.nc"\nseed = 1\nmax_steps = 60\nout_dir = "out"', ["parameters"]),
    ("code", "import warnings\nimport matplotlib.pyplot as plt\nimport ipywidgets\n"
             "from polkit.plotting import dispersion as plots\n"
             "from polkit import SamplerSettings\n"
             "from polkit.jobs.dispersion.run import fit_dispersion\n"
             "warnings.simplefilter('ignore')", None),
    ("code", "run = SamplerSettings(max_steps=max_steps, progress=False)\n"
             "result = fit_dispersion(map_file, peaks_only=True, seed=seed, out=out_dir,\n"
             "                        sampler=run, figures=False)\n"
             "plots.fit_figure(result)\nplt.show()", None),
    ("code", "ipywidgets.IntSlider(value=3)", None),
    ("code", "print(result.table())", None),
]


def _map(path):
    from polkit.models.simulate import simulate_map

    rng = np.random.default_rng(4)
    angles = np.linspace(-20.0, 20.0, 15)
    energy = np.linspace(1.528, 1.562, 140)
    occ = np.stack([np.full(15, 3.0), np.full(15, 0.5)], axis=-1)
    sim = simulate_map(angles, energy, kind="emission", e_c0=1.541, n_eff=3.4, e_x=1.545,
                       g=0.006, gamma_c=0.0004, gamma_x=0.0008, amplitudes=occ, background=50.0)
    counts = rng.poisson(np.clip(sim.signal, 0, None)) + rng.normal(0.0, 4.0, sim.signal.shape)
    da = xr.DataArray(
        counts, dims=("angle", "energy"), name="signal",
        coords={"angle": ("angle", angles, {"units": "degree", "long_name": "emission angle"}),
                "energy": ("energy", energy, {"units": "eV", "long_name": "photon energy"})},
        attrs={"units": "counts", "kind": "emission", "gain": 1.0, "read_noise": 4.0,
               "sample": "invented report-test map"})
    da.to_dataset().to_netcdf(path, engine="h5netcdf")
    return path


@pytest.fixture(scope="module")
def notebook(tmp_path_factory):
    folder = tmp_path_factory.mktemp("nb")
    _map(folder / "map.nc")
    nb = nbformat.v4.new_notebook()
    for kind, source, tags in CELLS:
        cell = (nbformat.v4.new_markdown_cell(source) if kind == "markdown"
                else nbformat.v4.new_code_cell(source))
        if tags:
            cell.metadata["tags"] = tags
        nb.cells.append(cell)
    path = folder / "small_report.ipynb"
    nbformat.write(nb, path)
    return path


@pytest.fixture(scope="module")
def two_reports(notebook, tmp_path_factory):
    base = tmp_path_factory.mktemp("reports")
    return [make_report(notebook, params={"seed": 7}, out=base / name) for name in ("a", "b")]


def test_html_is_self_contained_with_embedded_figures_and_provenance(two_reports, notebook):
    rep = two_reports[0]
    html = rep.html.read_text(encoding="utf-8")
    assert re.search(r'<img[^>]+src="data:image/png;base64,', html)
    assert not re.search(r'<(script|img|link)[^>]+(src|href)="https?://', html)
    assert "Provenance" in html
    sha = hashlib.sha256((notebook.parent / "map.nc").read_bytes()).hexdigest()
    assert sha in html  # the input file's SHA-256 (computed here independently)
    assert "interactive panel" in html  # the widget view is replaced by a note
    # common practice, no published source: every report carries the safety note, and
    # names no folder of the machine that made it
    assert "Safety" in html and "IEC 60825-1" in html
    prov = rep.provenance.read_text(encoding="utf-8")
    assert str(notebook.parent) not in prov and sys.executable not in prov
    prov = json.loads(rep.provenance.read_text())
    assert prov["seeds"] == {"seed": 7}
    assert prov["parameters"]["seed"] == 7 and prov["injected"] == ["out_dir", "seed"]
    assert prov["inputs"]["map.nc"]["sha256"] == sha  # by file name, not by folder
    assert prov["versions"]["polkit"] and prov["python"]["version"] and prov["created"]
    fit = prov["fits"]["."]
    assert fit["seed"] == 7 and "rabi_splitting" in fit["priors"]


def test_executed_notebook_results_and_manifest(two_reports):
    rep = two_reports[0]
    nb = nbformat.read(rep.notebook, as_version=4)
    tags = [c.metadata.get("tags", []) for c in nb.cells]
    assert ["injected-parameters"] in tags and tags[-1] == ["provenance"]
    injected = nb.cells[tags.index(["injected-parameters"])].source
    assert "seed = 7" in injected and str(rep.results) in injected
    assert any(o.get("output_type") == "execute_result" for c in nb.cells
               for o in c.get("outputs", []))
    names = {p.name for p in rep.result_files}
    assert {"posterior.nc", "summary.json"} <= names
    manifest = json.loads(rep.manifest.read_text())["results"]
    for entry in manifest:
        data = (rep.results / entry["path"]).read_bytes()
        assert entry["sha256"] == hashlib.sha256(data).hexdigest()
        assert entry["bytes"] == len(data)


def test_same_seed_same_numbers(two_reports, notebook, tmp_path):
    a, b = (json.loads((r.results / "summary.json").read_text())["parameters"]
            for r in two_reports)
    assert a == b
    other = make_report(notebook, params={"seed": 8}, out=tmp_path / "c")
    c = json.loads((other.results / "summary.json").read_text())["parameters"]
    assert c["rabi_splitting"]["median"] != a["rabi_splitting"]["median"]


def test_refusals_name_the_problem(notebook, tmp_path):
    with pytest.raises(ConfigError, match="unknown parameters"):
        make_report(notebook, params={"sead": 1}, out=tmp_path / "x")
    with pytest.raises(ConfigError, match="Python literals"):
        make_report(notebook, params={"seed": object()}, out=tmp_path / "x")
    with pytest.raises(DataError, match="notebook not found"):
        make_report(tmp_path / "missing.ipynb", out=tmp_path / "x")
    with pytest.raises(DataError, match=r"cell \d+ failed with (DataError|FileNotFoundError)"):
        make_report(notebook, params={"map_file": "no_such_map.nc"}, out=tmp_path / "bad")
    assert (tmp_path / "bad" / "small_report.failed.ipynb").is_file()
    assert not (tmp_path / "bad" / "small_report.html").exists()


def test_command_line_parameters_are_literals_or_text():
    got = parse_params(["seed=3", "map_file=data/map.nc", "claims=['E < 1 fJ']", "x=None",
                        "scale=1.5e-3"])
    assert got == {"seed": 3, "map_file": "data/map.nc", "claims": ["E < 1 fJ"], "x": None,
                   "scale": 1.5e-3}
    with pytest.raises(ConfigError, match="expected name=value"):
        parse_params(["seed"])
    with pytest.raises(ConfigError, match="given twice"):
        parse_params(["seed=1", "seed=2"])
