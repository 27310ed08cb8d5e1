"""The command line: every demo file inspected, bad input refused in one line."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from polkit.cli import main

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "data_examples"
DEMO_FILES = sorted(
    p.name for p in DEMO.glob("ds1_*") if p.suffix in {".nc", ".npz", ".txt", ".csv"}
)


@pytest.mark.parametrize("name", DEMO_FILES)
def test_inspect_handles_every_demo_file(name, tmp_path, capsys):
    # common practice, no published source: every bundled file loads and is drawn.
    status = main(["inspect", str(DEMO / name), "--png", str(tmp_path / "q.png")])
    out = capsys.readouterr().out
    assert status == 0
    assert (tmp_path / "q.png").stat().st_size > 1000
    assert "eV" in out or "mW" in out  # ranges are printed with their units


BROKEN = {
    "empty.csv": b"",
    "decimal_comma.csv": b"power [mW],intensity [counts]\n1,5;2\n",
    "nounits.csv": b"power,intensity\n1,2\n2,3\n3,4\n",
    "garbage.nc": b"\x89HDF\r\n\x1a\n" + b"\x00" * 40,
    "nan.txt": b"# rows: energy [eV]; columns: angle [degree]; signal: intensity [counts]\n"
    b"nan 0 1 2\n1.50 nan 2 3\n1.51 1 2 3\n",
    "random.npz": b"PK\x03\x04 not really a zip",
}


@pytest.mark.parametrize("name", sorted(BROKEN))
def test_broken_files_are_refused_in_one_line(name, tmp_path):
    path = tmp_path / name
    path.write_bytes(BROKEN[name])
    proc = subprocess.run(
        [sys.executable, "-m", "polkit.cli", "inspect", str(path), "--png",
         str(tmp_path / "x.png")],
        capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode == 2
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, proc.stderr
    assert lines[0].startswith("polkit: error:") and name in lines[0]
    assert "Traceback" not in proc.stderr
    assert not (tmp_path / "x.png").exists(), "nothing half-written"


def test_debug_shows_the_traceback(tmp_path):
    path = tmp_path / "empty.csv"
    path.write_bytes(b"")
    proc = subprocess.run(
        [sys.executable, "-m", "polkit.cli", "--debug", "inspect", str(path)],
        capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode != 0
    assert "Traceback" in proc.stderr
