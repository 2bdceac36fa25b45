"""Hostile names, paths and profile values never reach a shell unquoted.

* Names and paths with control characters are refused when the scenario is checked
  (exit 2, naming the key), and by ``array-script`` when they come from the command line
  or the directories involved.
* Job scripts generated with hostile values (spaces, quotes, ``$(...)``, a line that ends
  the old here-document) are run against stand-in ``sbatch``/``qsub`` programs that
  record their arguments and standard input: no payload runs, and the arguments arrive
  intact.
* Cluster profiles are checked by what each value is (a network interface name, a queue
  name, one directive or setup line).

The shell's rules (quoting, here-documents ending at a line equal to their word) are
those of the POSIX shell command language (IEEE Std 1003.1, "Shell Command Language",
sections 2.2 and 2.7.4); the stand-ins play sbatch(1) and qsub(1B) as their manuals
describe the job id they print.
"""

from __future__ import annotations

import os
import re
import shlex
import stat
import subprocess
from dataclasses import dataclass
from pathlib import Path

import pytest
from typer.testing import CliRunner

from ensemble.cli import app
from ensemble.examples import seir_text

CONTROL_CHARACTERS = ["\n", "\r", "\x00", "\t", "\x1b", "\x7f", "\x85", "\x9b"]
"""C0 controls (newline, carriage return, NUL, tab, escape), DEL and C1 controls (next
line, control sequence introducer): Unicode's category Cc."""


@dataclass(frozen=True)
class Outcome:
    returncode: int
    stdout: str
    stderr: str


def ensemble(*arguments: str | os.PathLike[str], cwd: Path) -> Outcome:
    """The ``ensemble`` command line, run in this process in directory ``cwd``."""
    previous = Path.cwd()
    os.chdir(cwd)
    try:
        outcome = CliRunner().invoke(app, [os.fspath(a) for a in arguments])
    finally:
        os.chdir(previous)
    return Outcome(outcome.exit_code, outcome.stdout, outcome.stderr)


def scenario_file(directory: Path, *, name: str = "testtown", output: str = "result.nc",
                  variant: str = "distancing", members: int = 8) -> Path:
    """The illustrative SEIR town (invented numbers) with the given scenario name, result
    path and second variant's name, written as TOML basic strings (so control characters
    are written as escapes, as a hostile file would)."""
    text = seir_text(members=members, days=5, method="rk4", step=0.25, output="result.nc",
                     distancing=True, name="testtown", keep_members=True,
                     title="Illustrative town, invented numbers")
    text = (text.replace('name = "testtown"', f"name = {toml_string(name)}")
            .replace('path = "result.nc"', f"path = {toml_string(output)}")
            .replace('name = "distancing"', f"name = {toml_string(variant)}"))
    path = directory / "town.toml"
    path.write_text(text, encoding="utf-8")
    return path


def toml_string(value: str) -> str:
    """``value`` as a TOML basic string, every control character as a ``\\uXXXX`` escape
    (TOML 1.0, "String")."""
    escaped = "".join(f"\\u{ord(c):04x}" if not c.isprintable() or c in '"\\' else c
                      for c in value)
    return f'"{escaped}"'


# ----------------------------------------------------------------------------- check


@pytest.mark.parametrize("character", CONTROL_CHARACTERS, ids=repr)
@pytest.mark.parametrize(("field", "key"), [("output", "output.path"),
                                            ("name", "scenario.name"),
                                            ("variant", "variants[1].name")])
def test_check_refuses_control_characters_naming_the_key(tmp_path: Path, character: str,
                                                         field: str, key: str) -> None:
    value = {"output": f"results/x{character}touch pwned.nc",
             "name": f"town{character}x", "variant": f"distancing{character}x"}[field]
    path = scenario_file(tmp_path, **{field: value})
    before = sorted(tmp_path.iterdir())
    done = ensemble("check", path, cwd=tmp_path)
    assert done.returncode == 2, done.stdout
    assert f"{path.name}: {key}:" in done.stderr
    assert repr(value) in done.stderr          # the value is shown, escaped
    assert sorted(tmp_path.iterdir()) == before


def test_paths_with_spaces_and_quotes_are_accepted(tmp_path: Path) -> None:
    path = scenario_file(tmp_path, output="my results/it's $(touch pwned).nc")
    done = ensemble("check", path, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
