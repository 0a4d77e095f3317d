"""README.md: every ``bigprune`` line of its fenced blocks runs as written on a small demo.

The README's commands use the demo's folder ``/tmp/bigprune-demo``; the test builds the demo
(its ``bigprune demo`` line, with ``--nodes 6000``) in a temporary folder instead and puts that
folder in place of ``/tmp/bigprune-demo`` in every other command.
"""
import os
import re
import shlex
import subprocess
import sys
from pathlib import Path

from bigprune.cli import _parser

ROOT = Path(__file__).resolve().parents[1]
DEMO_FOLDER = "/tmp/bigprune-demo"
DEMO_NODES = "6000"


def readme_commands(text):
    """Argument lists of the lines starting with ``bigprune `` in ```-fenced blocks (a line
    ending in a backslash continues on the next)."""
    commands = []
    for block in re.findall(r"^```[^\n]*\n(.*?)^```", text, flags=re.M | re.S):
        for line in re.sub(r"\\\n\s*", " ", block).splitlines():
            if line.startswith("bigprune "):
                commands.append(shlex.split(line)[1:])
    return commands


def test_readme_blocks_are_found():
    text = "x\n```\nbigprune a --b c \\\n   --d e\nnot this\n```\nbigprune outside\n```toml\nbigprune f\n```\n"
    # reference: the commands written above, by hand
    assert readme_commands(text) == [["a", "--b", "c", "--d", "e"], ["f"]]


def test_every_readme_command_runs_on_the_demo(tmp_path):
    commands = readme_commands((ROOT / "README.md").read_text())
    # every command of the command line appears (reference: argparse's own list of them)
    names = set(_parser()._subparsers._group_actions[0].choices)
    assert {c[0] for c in commands} == names
    demo = [c for c in commands if c[0] == "demo"]
    assert len(demo) == 1 and demo[0][demo[0].index("--workdir") + 1] == DEMO_FOLDER
    folder = str(tmp_path / "demo")
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    first = list(demo[0])
    if "--nodes" in first:  # the README's own size gives way to the test's
        del first[first.index("--nodes"):first.index("--nodes") + 2]
    first += ["--nodes", DEMO_NODES]
    for args in [first] + [c for c in commands if c[0] != "demo"]:
        args = [a.replace(DEMO_FOLDER, folder) for a in args]
        done = subprocess.run([sys.executable, "-m", "bigprune", *args], cwd=tmp_path, env=env,
                              capture_output=True, text=True, timeout=900)
        assert done.returncode == 0, f"bigprune {shlex.join(args)}: exit {done.returncode}\n{done.stderr[-2000:]}"
        assert "Traceback" not in done.stderr
