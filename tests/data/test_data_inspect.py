"""inspect_file: a readable description and a quick-look PNG."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.constants as sc
from data_helpers import polariton_map, write_matrix
from matplotlib.image import imread

from polkit.data import describe_file
from polkit.errors import DataError
from polkit.plotting.inspect import inspect_file

HC = sc.h * sc.c / sc.e * 1e9  # Source: CODATA via scipy.constants


def test_inspect_map_with_png(tmp_path):
    angle = np.linspace(-15, 15, 31)
    wl = np.linspace(830.0, 850.0, 60)
    path = tmp_path / "map.txt"
    write_matrix(
        path,
        polariton_map(angle, HC / wl).T,
        wl,
        angle,
        header="rows: wavelength [nm]; columns: angle [degree]; signal: counts\n"
        "sample: invented demo cavity; temperature: 10 K; wavelength_medium: air",
    )
    png = tmp_path / "out" / "map.png"
    text = inspect_file(path, png=png)
    assert "reader: matrix" in text
    assert "content: emission map" in text
    assert "dims: angle (31) x energy (60)" in text
    assert "angle: 31 values, -15 .. 15 degree" in text
    assert f"energy: 60 values, {HC / 850.0 * (1 + 2.7e-4):.3f}" in text[
        : text.index("signal")
    ] or ("energy: 60 values, 1.45" in text)
    assert "signal [counts nm/eV]" in text
    assert "temperature: 10.0 K" in text
    assert "wavelength_medium: air" in text
    assert "warnings: none" in text
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    img = imread(png)
    assert img.ndim == 3 and img.shape[0] > 100 and img.shape[1] > 100
    # the figure is not blank: the map shows up as many distinct colours
    assert len(np.unique(img.reshape(-1, img.shape[-1]), axis=0)) > 50


def test_inspect_series_with_png_lists_warnings(tmp_path):
    path = tmp_path / "sweep.csv"
    path.write_text(
        "power [mW],intensity [counts],sweep,operator\n"
        "1,10,up,a\n2,40,up,a\n3,200,up,a\n2,150,down,a\n1,12,down,a\n"
    )
    png = tmp_path / "sweep.png"
    text = inspect_file(path, png=png)
    assert "content: power series (table)" in text
    assert "dims: point (5)" in text
    assert "sweep: 2 down, 3 up" in text
    assert "variable intensity [counts]: 10 .. 200" in text
    # the text column without units is dropped with a warning, which is reported
    assert "DataWarning" in text and "'operator'" in text
    assert png.exists() and png.read_bytes()[:4] == b"\x89PNG"


def test_inspect_refuses_a_bad_file(tmp_path):
    path = tmp_path / "bad.csv"
    path.write_text("power [mW],intensity [counts]\n1,2\n2,x\n3,4\n")
    with pytest.raises(DataError, match=r"field 'intensity'.*'x'"):
        inspect_file(path)


def test_inspect_spectra_cube_with_png(tmp_path):
    path = tmp_path / "cube.npz"
    energy = np.linspace(1.45, 1.5, 30)
    power = np.array([0.5, 1.0, 2.0, 4.0])
    cube = np.outer(power**2, np.ones(energy.size)) + 1.0
    np.savez(
        path,
        intensity=cube,
        power=power,
        energy=energy,
        units_intensity="counts",
        units_power="mW",
        units_energy="eV",
    )
    png = tmp_path / "cube.png"
    text = inspect_file(path, png=png)
    assert "content: power series (spectra cube)" in text
    assert "dims: power (4) x energy (30)" in text
    assert png.read_bytes()[:4] == b"\x89PNG"


def test_the_data_layer_describes_a_file_without_drawing(tmp_path):
    path = tmp_path / "sweep.csv"
    path.write_text(
        "power [mW],intensity [counts],sweep,operator\n"
        "1,10,up,a\n2,40,up,a\n3,200,up,a\n2,150,down,a\n1,12,down,a\n"
    )
    text = describe_file(path)
    assert text.startswith(f"file: {path}\nreader: csv\n")
    assert "sweep: 2 down, 3 up" in text
    assert "DataWarning" in text and "'operator'" in text
    # the same description as the command's, less the figure line
    png = tmp_path / "sweep.png"
    assert inspect_file(path, png=png) == text + f"\nquick-look figure: {png}"
    assert inspect_file(path) == text
