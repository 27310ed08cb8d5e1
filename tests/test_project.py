"""Project-level checks: the README's commands, CI script and atomic writes."""

from __future__ import annotations

import os
import re
from pathlib import Path

import pytest

from polkit import files

ROOT = Path(__file__).resolve().parents[1]


def test_ci_runs_the_readme_test_command_verbatim():
    # common practice, no published source: CI must run exactly what the README tells users.
    readme = (ROOT / "README.md").read_text()
    ci = (ROOT / ".ci" / "run").read_text()
    blocks = re.findall(r"```\n(.*?)\n```", readme, flags=re.S)
    commands = [b.strip() for b in blocks if b.strip().startswith("python3 -m venv")]
    assert len(commands) == 2, "README must hold exactly two set-up commands"
    test_cmd = next(c for c in commands if "pytest" in c)
    assert test_cmd in ci.splitlines()
    assert "polkit demo" in next(c for c in commands if "pytest" not in c)


def test_atomic_write_replaces_or_keeps(tmp_path):
    # common practice, no published source: write-to-temp, fsync, rename.
    target = tmp_path / "r.json"
    files.write_json(target, {"a": 1.0, "nan": float("nan")})
    assert target.read_text().startswith("{")
    assert '"nan": null' in target.read_text()

    class Boom(Exception):
        pass

    with pytest.raises(Boom):
        with files.atomic_path(target) as tmp:
            tmp.write_text("half")
            raise Boom
    assert '"a": 1.0' in target.read_text()
    assert [p.name for p in tmp_path.iterdir()] == ["r.json"], "temporary file left behind"


@pytest.mark.skipif(os.geteuid() == 0, reason="root ignores folder permissions")
def test_read_only_folder_gives_clear_error(tmp_path):
    folder = tmp_path / "ro"
    folder.mkdir()
    (folder / "old.json").write_text("{}")
    folder.chmod(0o500)
    try:
        with pytest.raises(OSError, match="cannot write"):
            files.write_json(folder / "old.json", {"new": 1})
        assert (folder / "old.json").read_text() == "{}"
    finally:
        folder.chmod(0o700)


def test_the_main_verbs_and_settings_are_importable_from_polkit():
    # common practice, no published source: every public name of the package resolves, and
    # the verbs a user starts from are among them
    import polkit

    for name in polkit.__all__:
        assert getattr(polkit, name) is not None, name
    assert {"load_map", "load_series", "fit_dispersion", "compare_models", "fit_power",
            "energy_budget", "run_survey", "FitResult", "SamplerSettings", "LoadOptions",
            "PowerCalibration", "DataError", "ConfigError", "FitError"} <= set(polkit.__all__)
