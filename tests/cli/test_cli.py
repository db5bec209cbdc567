"""The command-line frame: version, help on every subcommand, error policy."""

from __future__ import annotations

import subprocess
import sys

import pytest

from cmbtools import __version__, cli


def test_version(capsys):
    with pytest.raises(SystemExit) as info:
        cli.main(["--version"])
    assert info.value.code == 0
    assert capsys.readouterr().out.strip() == f"cmbtools {__version__}"


def test_no_command_prints_help_and_exits_2(capsys):
    assert cli.main([]) == 2
    assert "usage: cmbtools" in capsys.readouterr().out


def test_unknown_option_is_one_line_exit_2(capsys):
    with pytest.raises(SystemExit) as info:
        cli.main(["--no-such-option"])
    assert info.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("cmbtools: error:")


@pytest.mark.parametrize("name", [name for name, _ in cli.COMMANDS])
def test_every_subcommand_has_help(name, capsys):
    with pytest.raises(SystemExit) as info:
        cli.main([name, "--help"])
    assert info.value.code == 0
    out = capsys.readouterr().out
    assert out.startswith(f"usage: cmbtools {name}")


def test_subcommands_are_listed():
    names = [name for name, _ in cli.COMMANDS]
    assert len(names) == len(set(names))
    # the subcommands of the README, each with its own module
    for expected in ("mask", "inspect", "spectrum", "physics", "simulate", "validate"):
        assert expected in names


def test_console_entry_point_runs():
    # `python -m cmbtools` is the same program as the `cmbtools` script
    res = subprocess.run([sys.executable, "-m", "cmbtools", "--version"], capture_output=True, text=True, check=False)
    assert res.returncode == 0 and res.stdout.strip() == f"cmbtools {__version__}"
