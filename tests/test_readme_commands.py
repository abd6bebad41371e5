"""The README's shell commands work as written after the set-up it describes."""

from __future__ import annotations

import os
import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from debtsim.cli import app

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text(encoding="utf-8")
#: Code blocks without a language (shell commands); ```yaml and ```python are other things.
BLOCKS = re.findall(r"^```\n(.*?)^```", README, flags=re.S | re.M)


def commands() -> list[str]:
    """Every `debtsim ...` command of the README's shell blocks, continuation lines joined."""
    found = []
    for block in BLOCKS:
        text = block.replace("\\\n", " ")
        for line in text.splitlines():
            line = line.split("  #", 1)[0].strip()
            if line.startswith(("debtsim ", ".venv/bin/debtsim ")):
                found.append(line)
            elif "&& .venv/bin/debtsim " in line:
                found.append(line.split("&& ", 2)[-1])
    return found


def test_readme_says_how_to_reach_debtsim_before_using_it() -> None:
    """The activation line comes before the first bare `debtsim` command."""
    activate = README.index("source .venv/bin/activate")
    first_bare = min(README.index(f"\n{c}") for c in commands() if c.startswith("debtsim "))
    assert activate < first_bare


def test_activation_puts_debtsim_on_the_path(tmp_path: Path) -> None:
    """`source .venv/bin/activate` then `debtsim --version` works in a fresh shell."""
    activate = Path(sys.prefix) / "bin" / "activate"
    if sys.prefix == sys.base_prefix or not activate.exists() or shutil.which("bash") is None:
        pytest.skip("not running from a virtual environment")
    done = subprocess.run(
        ["bash", "-c", f"source {shlex.quote(str(activate))} && debtsim --version"],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        env={"PATH": "/usr/bin:/bin", "HOME": str(tmp_path)},
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("debtsim ")


@pytest.mark.parametrize("command", commands())
def test_every_readme_command_uses_real_options(command: str) -> None:
    """Each command names a real subcommand, and each --option it uses is in that command's help."""
    words = shlex.split(command)
    sub = words[1]
    result = CliRunner().invoke(app, [sub, "--help"])
    assert result.exit_code == 0, f"no command {sub!r}"
    help_text = result.stdout
    for word in words[2:]:
        if word.startswith("--"):
            option = word.split("=", 1)[0]
            assert option in help_text, f"{option} is not an option of `debtsim {sub}`"


def test_readme_run_command_runs_as_written(tmp_path: Path) -> None:
    """The README's circuit run works as written from a copy of the repository's demos."""
    shutil.copytree(ROOT / "scenarios", tmp_path / "scenarios")
    (command,) = [c for c in commands() if "--engine circuit --out" in c]
    words = shlex.split(command)
    old = os.getcwd()
    os.chdir(tmp_path)
    try:
        result = CliRunner().invoke(app, words[1:] + ["-q"])
    finally:
        os.chdir(old)
    assert result.exit_code == 0, result.stderr
    assert (tmp_path / "reports" / "harbour_circuit" / "report.html").is_file()
