"""Command-line behaviour a new user meets in the first hour (no fitting needed)."""

from __future__ import annotations

import re

import pytest

from polkit.cli import EXIT_INPUT, main


def test_a_typo_in_a_subcommand_option_shows_that_subcommands_usage(capsys):
    # common practice, no published source
    with pytest.raises(SystemExit) as info:
        main(["dispersion", "map.nc", "--mdoel", "two"])
    assert info.value.code == 2
    err = capsys.readouterr().err
    assert "usage: polkit dispersion" in err and "unrecognized arguments: --mdoel" in err


def test_out_pointing_at_an_existing_file_is_refused_at_once(tmp_path, capsys):
    # common practice, no published source
    target = tmp_path / "results.txt"
    target.write_text("not a folder")
    status = main(["dispersion", str(tmp_path / "missing.nc"), "--out", str(target)])
    assert status == EXIT_INPUT
    err = capsys.readouterr().err
    assert "is an existing file, not a folder" in err and "File exists" not in err
    assert target.read_text() == "not a folder"


def test_a_run_without_seed_prints_the_seed_it_uses(tmp_path, capsys):
    # common practice, no published source: a recorded seed makes a run repeatable
    status = main(["power", str(tmp_path / "missing.csv"), "--model", "coherent",
                   "--out", str(tmp_path / "o")])
    assert status == EXIT_INPUT  # the file is missing; the seed was still chosen first
    m = re.search(r"this run uses --seed (\d+)", capsys.readouterr().out)
    assert m and int(m.group(1)) >= 0
    main(["power", str(tmp_path / "missing.csv"), "--model", "coherent", "--seed", "5"])
    assert "this run uses --seed" not in capsys.readouterr().out
    main(["power", str(tmp_path / "missing.csv"), "--model", "coherent", "--resume",
          "--out", str(tmp_path / "o")])
    assert "this run uses --seed" not in capsys.readouterr().out  # resume keeps its own


def test_every_option_and_argument_has_help_and_meaningful_defaults_show():
    # common practice, no published source
    from polkit.cli import build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    for name, p in sub.choices.items():
        for action in p._actions:
            if action.dest == "help":
                continue
            assert action.help, f"polkit {name}: {action.option_strings or action.dest} has no help"
        text = " ".join(p.format_help().split())
        if name == "dispersion":
            assert "(default: two_oscillator)" in text and "transmission" in text
        if name == "budget":
            assert "(default: 4000)" in text


@pytest.mark.parametrize(("name", "text", "words"), [
    ("device.toml", '# a device\nnode_size = {value = 3.0, units = "um"}\n',
     "settings file (TOML)"),
    ("truth.json", '{"e_x": 1.545}\n', "settings file (JSON)"),
    ("priors.txt", '[rabi_splitting]\nprior = "uniform"\n', "settings file (TOML)"),
    ("manifest.csv", "file,x [mm],y [mm]\nmaps/a.nc,0,0\n", "survey manifest"),
])
def test_inspect_on_a_file_that_is_not_data_says_what_it_is(tmp_path, capsys, name, text, words):
    # common practice, no published source
    path = tmp_path / name
    path.write_text(text)
    assert main(["inspect", str(path), "--out", str(tmp_path / "o")]) == EXIT_INPUT
    err = capsys.readouterr().err
    assert words in err and "decimal commas" not in err and "expected a column" not in err
