"""The README's example commands print what the README shows (so the examples cannot drift).

Each fenced block of README.md that starts with ``$ cmbtools ...`` is one example: one or more commands (with
their backslash continuation lines), each followed by the lines it prints.  The commands of a block run as
written, in order, in a scratch directory that holds the demo ``maps/`` and an empty ``demo_output/``; the
standard output of each must equal the lines shown below it, line for line.  A last line ``...`` means the README
shows only the first lines of that output.  A figure that an example writes into ``demo_output/`` and that the README
shows from ``docs/`` under the same name must be that picture (``scripts/update_readme_examples.py`` copies it).
"""

from __future__ import annotations

import os
import re
import shlex
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent
while not ((ROOT / "maps").is_dir() and (ROOT / "cmbtools").is_dir()):  # the repository root (tests may be nested)
    ROOT = ROOT.parent

#: Examples that run many simulations take longer than the fast subset allows.
SLOW_COMMANDS = {"validate"}


def readme_examples():
    """[(commands, name)]: each README block that starts with '$ cmbtools', as a list of (command, shown lines)."""
    text = (ROOT / "README.md").read_text()
    examples = []
    for block in re.findall(r"```\n(\$ cmbtools .*?)```", text, re.S):
        lines = block.rstrip("\n").split("\n")
        commands = []
        while lines:
            command = lines.pop(0)[2:]
            while command.endswith("\\"):
                command = command[:-1] + " " + lines.pop(0).strip()
            shown = []
            while lines and not lines[0].startswith("$ "):
                shown.append(lines.pop(0))
            commands.append((command, shown))
        examples.append(commands)
    return examples


EXAMPLES = readme_examples()


def _param(commands):
    names = [c.split()[1] for c, _ in commands]
    marks = [pytest.mark.slow] if SLOW_COMMANDS & set(names) else []
    return pytest.param(commands, id="+".join(names), marks=marks)


def test_the_readme_has_an_example_for_every_subcommand():
    from cmbtools.cli import COMMANDS

    shown = {c.split()[1] for commands in EXAMPLES for c, _ in commands}
    assert shown == {name for name, _ in COMMANDS}


@pytest.mark.parametrize("commands", [_param(c) for c in EXAMPLES])
def test_a_readme_example_prints_what_the_readme_shows(tmp_path, commands):
    (tmp_path / "maps").symlink_to(ROOT / "maps", target_is_directory=True)
    (tmp_path / "demo_output").mkdir()
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    for command, shown in commands:  # the commands of one block, in order, as a user types them
        argv = shlex.split(command)
        assert argv[0] == "cmbtools"
        out = subprocess.run([sys.executable, "-m", "cmbtools", *argv[1:]], cwd=tmp_path, env=env,
                             capture_output=True, text=True, timeout=900)
        assert out.returncode == 0, out.stderr
        printed = out.stdout.rstrip("\n").split("\n") if out.stdout else []
        if shown and shown[-1] == "...":
            shown = shown[:-1]
            printed = printed[: len(shown)]
        assert printed == shown, command
    # a figure the README shows (docs/NAME.png) that the example writes (demo_output/NAME.png) is that figure
    for name in readme_figures():
        made = tmp_path / "demo_output" / name
        if made.exists():
            _assert_same_picture(made, ROOT / "docs" / name)


def readme_figures():
    """Names of the pictures the README shows from docs/ (``![...](docs/NAME.png)``)."""
    return re.findall(r"!\[[^\]]*\]\(docs/([^)/]+\.png)\)", (ROOT / "README.md").read_text())


def _assert_same_picture(made, shown):
    """Same size, and pixels equal up to font rendering: mean absolute difference below 1% of the range."""
    from matplotlib.image import imread

    a, b = imread(made), imread(shown)
    assert a.shape == b.shape, (made.name, a.shape, b.shape)
    assert float(np.mean(np.abs(a - b))) < 0.01, made.name


def test_every_readme_figure_is_in_docs():
    names = readme_figures()
    assert names, "the README shows no figure"
    for name in names:
        assert (ROOT / "docs" / name).is_file(), name
