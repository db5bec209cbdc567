"""Run the README's example commands and write what they print below each of them.

Each fenced block of README.md that starts with ``$ cmbtools ...`` holds one or more commands, each followed by
the lines it prints (``tests/cli/test_readme_examples.py`` checks them).  This script runs the commands of every
block, in order, in a scratch directory holding the demo ``maps/`` and an empty ``demo_output/``, and replaces the
shown lines by the actual output.  A block whose shown output ends with ``...`` keeps that many lines.  A figure
written into ``demo_output/NAME.png`` that the README shows as ``docs/NAME.png`` is copied there.

    python scripts/update_readme_examples.py            # rewrite README.md
    python scripts/update_readme_examples.py --skip validate   # leave the slow example alone
"""

from __future__ import annotations

import argparse
import os
import re
import shlex
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _run_block(block, skip, env, figures=()):
    lines = block.rstrip("\n").split("\n")
    out_lines = []
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        (tmp / "maps").symlink_to(ROOT / "maps", target_is_directory=True)
        (tmp / "demo_output").mkdir()
        while lines:
            first = lines.pop(0)
            command_lines = [first]
            command = first[2:]
            while command.endswith("\\"):
                nxt = lines.pop(0)
                command_lines.append(nxt)
                command = command[:-1] + " " + nxt.strip()
            shown = []
            while lines and not lines[0].startswith("$ "):
                shown.append(lines.pop(0))
            out_lines += command_lines
            argv = shlex.split(command)
            if argv[1] in skip:
                out_lines += shown
                continue
            done = subprocess.run([sys.executable, "-m", "cmbtools", *argv[1:]], cwd=tmp, env=env,
                                  capture_output=True, text=True)
            if done.returncode != 0:
                raise SystemExit(f"{command}: exit status {done.returncode}\n{done.stderr}")
            printed = done.stdout.rstrip("\n").split("\n") if done.stdout else []
            if shown and shown[-1] == "...":
                printed = printed[: len(shown) - 1] + ["..."]
            out_lines += printed
        for name in figures:  # the README's pictures that these commands drew: copied to docs/
            made = tmp / "demo_output" / name
            if made.exists() and argv[1] not in skip:
                shutil.copyfile(made, ROOT / "docs" / name)
                print(f"docs/{name}: updated")
    return "\n".join(out_lines) + "\n"


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--skip", nargs="*", default=[], metavar="COMMAND", help="subcommands not to run")
    args = parser.parse_args(argv)
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    readme = ROOT / "README.md"
    text = readme.read_text()
    figures = re.findall(r"!\[[^\]]*\]\(docs/([^)/]+\.png)\)", text)
    new = re.sub(r"```\n(\$ cmbtools .*?)```",
                 lambda m: "```\n" + _run_block(m.group(1), set(args.skip), env, figures) + "```", text, flags=re.S)
    if new != text:
        readme.write_text(new)
        print("README.md: example outputs updated")
    else:
        print("README.md: example outputs unchanged")


if __name__ == "__main__":
    main()
