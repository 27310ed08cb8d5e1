"""Survey manifests: units in the header, per-position options, relative paths, and bad
manifests refused naming the file, the row and the column before anything runs.

Every manifest here is invented.
"""

from __future__ import annotations

import os

import pytest

from polkit import DataError
from polkit.config.manifest import read_manifest
from polkit.inference.settings import SamplerSettings
from polkit.jobs.survey.run import run_survey


def _manifest(tmp_path, text, files=("a.nc", "b.nc")):
    for f in files:
        (tmp_path / f).write_bytes(b"placeholder")
    path = tmp_path / "manifest.csv"
    path.write_text(text)
    return path


def test_manifest_units_options_and_relative_paths(tmp_path):
    path = _manifest(tmp_path, "# invented\nfile,x [um],y [cm],energy_min [meV],energy_max [eV],"
                               "kind,label\n"
                               "a.nc,1500,0.5,1530,1.56,reflectance,edge\nb.nc,0,0,,,,\n")
    a, b = read_manifest(path)
    assert (a.x_mm, a.y_mm) == (1.5, 5.0)
    assert a.energy_window == pytest.approx((1.530, 1.56))
    assert a.kind == "reflectance" and a.position_id == "000_edge"
    assert a.file == (tmp_path / "a.nc").resolve()
    assert b.energy_window is None and b.kind is None and b.position_id == "001_b"


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("file,x [mm]\na.nc,1\n", r"field 'y \[mm\]'.*expected a column 'y \[mm\]'"),
        ("file,x [mm],y\na.nc,1,2\n", r"field 'y'.*expected units of a length"),
        ("file,x [furlong],y [mm]\na.nc,1,2\n", r"found units 'furlong'"),
        ("file,x [mm],y [mm],colour\na.nc,1,2,red\n", r"unknown column 'colour'"),
        ("file,x [mm],y [mm]\na.nc,1,2\nb.nc,abc,2\n",
         r"field 'x \[mm\]': row 2 \(line 3\), column 'x \[mm\]': expected a number; found 'abc'"),
        ("file,x [mm],y [mm]\na.nc,1,\n", r"row 1 \(line 2\), column 'y \[mm\]'.*empty cell"),
        ('file,x [mm],y [mm]\na.nc,"1,5",2\n', r"decimal comma"),
        ("file,x [mm],y [mm]\na.nc,1,2\na.nc,3,4\n",
         r"row 2 .*'a.nc' is the same map as 'a.nc' in row 1 \(line 2\)"),
        ("file,x [mm],y [mm],kind\na.nc,1,2,absorption\n",
         r"field 'kind': row 1 \(line 2\), column 'kind': expected one of emission"),
        ("file,x [mm],y [mm],energy_min [eV],energy_max [eV]\na.nc,1,2,1.56,1.53\n",
         r"row 1 \(line 2\): expected energy_min < energy_max"),
        ("file,x [mm],y [mm]\na.nc,1\n", r"row 1 \(line 2\): expected 3 cells"),
        ("file,x [mm],y [mm]\n", r"found none"),
        ("# only a comment\n", r"expected a header line"),
        ("file,x [mm],y [mm],priors\na.nc,1,2,missing.toml\n", r"expected a priors file"),
    ],
    ids=["no-y", "no-units", "bad-units", "unknown-column", "not-a-number", "empty-cell",
         "decimal-comma", "duplicate-file", "bad-kind", "empty-window", "short-row", "no-rows",
         "no-header", "missing-priors"],
)
def test_bad_manifests_name_file_row_and_column(tmp_path, text, match):
    path = _manifest(tmp_path, text)
    with pytest.raises(DataError, match=match) as info:
        read_manifest(path)
    assert str(info.value).startswith(str(path))


def test_bad_manifest_stops_before_any_cluster_or_output(tmp_path):
    path = _manifest(tmp_path, "file,x [mm],y [mm]\na.nc,1,oops\n")
    with pytest.raises(DataError, match="row 1"):
        run_survey(path, out=tmp_path / "out", sampler=SamplerSettings(progress=False))
    assert not (tmp_path / "out").exists()
    with pytest.raises(DataError, match="found nothing at this path"):
        read_manifest(tmp_path / "nowhere.csv")


def test_no_worker_pool_is_needed_to_read_the_demo_manifest():
    # the bundled demo wafer (invented) is a valid manifest with a 3 x 3 grid
    demo = os.path.join(os.path.dirname(__file__), "..", "..", "data_examples", "wafer",
                        "manifest.csv")
    specs = read_manifest(demo)
    assert len(specs) == 9
    assert sorted({s.x_mm for s in specs}) == [-12.0, 0.0, 12.0]
    assert all(s.file.is_file() for s in specs)


@pytest.mark.parametrize("second", ["absolute", "dotdot", "symlink"])
def test_the_same_map_under_two_names_is_refused_naming_both_rows(tmp_path, second):
    # common practice, no published source: one map is one position, however it is named
    (tmp_path / "maps").mkdir()
    (tmp_path / "maps" / "a.nc").write_bytes(b"invented")
    (tmp_path / "other").mkdir()
    name = {"absolute": str(tmp_path / "maps" / "a.nc"),
            "dotdot": "other/../maps/a.nc",
            "symlink": "link.nc"}[second]
    if second == "symlink":
        os.symlink(tmp_path / "maps" / "a.nc", tmp_path / "link.nc")
    path = _manifest(tmp_path, f"file,x [mm],y [mm]\nmaps/a.nc,1,2\n{name},3,4\n")
    with pytest.raises(DataError, match=r"row 2 \(line 3\).*is the same map as 'maps/a.nc' "
                       r"in row 1 \(line 2\)"):
        read_manifest(path)
