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
from pathlib import Path

import pytest

from ensemble.examples import seir_text
from support import invoke_cli

CONTROL_CHARACTERS = ["\n", "\r", "\x00", "\t", "\x1b", "\x7f", "\x85", "\x9b"]
"""C0 controls (newline, carriage return, NUL, tab, escape), DEL and C1 controls (next
line, control sequence introducer): Unicode's category Cc."""


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
    done = invoke_cli("check", path, cwd=tmp_path)
    assert done.returncode == 2, done.stdout
    assert f"{path.name}: {key}:" in done.stderr
    assert repr(value) in done.stderr          # the value is shown, escaped
    assert sorted(tmp_path.iterdir()) == before


def test_paths_with_spaces_and_quotes_are_accepted(tmp_path: Path) -> None:
    path = scenario_file(tmp_path, output="my results/it's $(touch pwned).nc")
    done = invoke_cli("check", path, cwd=tmp_path)
    assert done.returncode == 0, done.stderr


# ----------------------------------------------------------------------------- job arrays

HOSTILE_DIRECTORY = "run dir $(touch pwned-1) `touch pwned-2`; touch pwned-3 'q\" &"
"""A working directory whose name is a shell payload in every quoting context."""

HOSTILE_OUTPUT = "out $(touch pwned-4)/it's; touch pwned-5.nc"
HOSTILE_TITLE = "$(touch pwned-6)'; touch pwned-7; echo '"

PROFILE = """\
[cluster]
system = "{system}"
queue = "short"
walltime = "01:00:00"
cores = 2
memory = "1GB"
jobs = 1
setup = ["ENSEMBLE_JOB_SCRIPT", "touch setup-ran-in-the-job", "export TITLE='$(touch pwned-8)'"]
"""
"""A profile whose setup lines include the old fixed end word of the inline job
scripts: with it, the lines after it ran on the login node."""

RECORDER = """#!/usr/bin/env bash
# records its arguments (NUL-separated) and standard input, then answers like {name}
record={records}/{name}-$(date +%s%N)
: > "$record.args"
[ $# -eq 0 ] || printf '%s\\0' "$@" > "$record.args"
cat > "$record.stdin"
printf '{reply}'
"""


def stand_ins(directory: Path) -> tuple[Path, Path]:
    """A directory of stand-ins for sbatch, qsub and python3 that record what they are
    given, and the directory of their records."""
    bin_directory, records = directory / "bin", directory / "records"
    bin_directory.mkdir()
    records.mkdir()
    for name, reply in (("sbatch", "4242"), ("qsub", "4242[].pbs-server"), ("python3", "")):
        program = bin_directory / name
        program.write_text(RECORDER.format(name=name, reply=reply,
                                           records=shlex.quote(str(records))))
        program.chmod(program.stat().st_mode | stat.S_IXUSR)
    return bin_directory, records


def recorded(records: Path, name: str) -> list[tuple[list[str], str]]:
    """What the stand-in ``name`` was given, in order: (arguments, standard input)."""
    paths = sorted(records.glob(f"{name}-*.args"))
    return [(path.read_text().split("\0")[:-1], path.with_suffix(".stdin").read_text())
            for path in paths]


def pwned(directory: Path) -> list[Path]:
    """Files a payload ``touch pwned-N`` made anywhere under ``directory``."""
    return list(directory.rglob("pwned-[0-9]"))


@pytest.mark.parametrize("system", ["slurm", "pbs"])
def test_array_script_with_hostile_values_runs_only_what_it_should(tmp_path: Path,
                                                                    system: str) -> None:
    work = tmp_path / HOSTILE_DIRECTORY
    work.mkdir()
    (work / "out $(touch pwned-4)").mkdir()
    scenario = scenario_file(work, output=HOSTILE_OUTPUT)
    profile = work / "site.toml"
    profile.write_text(PROFILE.format(system=system))
    done = invoke_cli("array-script", scenario.name, "--cluster", profile.name, "--shards",
                      "4", "--set", f"scenario.title={HOSTILE_TITLE}", cwd=work)
    assert done.returncode == 0, done.stderr
    driver = tmp_path / "submit.sh"
    driver.write_text(done.stdout)

    elsewhere = tmp_path / "login"
    elsewhere.mkdir()
    bin_directory, records = stand_ins(tmp_path)
    environment = dict(os.environ, PATH=f"{bin_directory}:{os.environ['PATH']}")
    ran = subprocess.run(["bash", str(driver)], capture_output=True, text=True,
                         env=environment, cwd=elsewhere)
    assert ran.returncode == 0, ran.stderr
    assert pwned(tmp_path) == []
    assert not any(tmp_path.rglob("setup-ran-in-the-job"))   # setup lines stay in the jobs

    submit = "sbatch" if system == "slurm" else "qsub"
    (array_options, array), (merge_options, merge) = recorded(records, submit)
    result = (work / HOSTILE_OUTPUT).resolve()
    parts = result.with_name(f"{result.stem}.parts")
    assert parts.is_dir()
    if system == "slurm":
        assert array_options == ["--parsable"]
        assert merge_options == ["--parsable", "--kill-on-invalid-dep=yes",
                                 "--dependency=afterok:4242"]
    else:
        assert array_options == []
        assert merge_options == ["-W", "depend=afterok:4242[].pbs-server"]
    for script in (array, merge):
        lines = script.splitlines()
        assert lines[0] == "#!/usr/bin/env bash"
        assert "ENSEMBLE_JOB_SCRIPT" in lines and "touch setup-ran-in-the-job" in lines
        # no path in a header directive: the batch system reads them unquoted
        directives = [line for line in lines if line.startswith(("#SBATCH", "#PBS"))]
        assert directives and not any("/" in line or "pwned" in line for line in directives)
        assert "# Python: python3 from the PATH the setup lines above make" in lines

    # each job, run as the batch system would, runs the profile's python3 with every
    # argument intact and nothing else
    index = "SLURM_ARRAY_TASK_ID" if system == "slurm" else "PBS_ARRAY_INDEX"
    for script, extra in ((array, {index: "2"}), (merge, {})):
        job = tmp_path / "job.sh"
        job.write_text(script)
        ran = subprocess.run(["bash", str(job)], capture_output=True, text=True,
                             env=environment | extra, cwd=elsewhere)
        assert ran.returncode == 0, ran.stderr
    (shard_run, _), (merge_run, _) = recorded(records, "python3")
    assert shard_run == ["-m", "ensemble", "run", str(scenario.resolve()), "--set",
                         f"scenario.title={HOSTILE_TITLE}", "--workers", "2", "--resume",
                         "--shard", "2/4", "--output", str(parts / "shard-2-of-4.nc")]
    assert merge_run == ["-m", "ensemble", "merge",
                         *(str(parts / f"shard-{i}-of-4.nc") for i in range(4)),
                         "--output", str(result)]
    assert list(tmp_path.rglob("setup-ran-in-the-job"))
    assert pwned(tmp_path) == []


def test_array_script_refuses_control_characters_from_the_command_line(tmp_path: Path
                                                                       ) -> None:
    scenario = scenario_file(tmp_path)
    profile = tmp_path / "site.toml"
    profile.write_text(PROFILE.format(system="slurm"))
    done = invoke_cli("array-script", scenario.name, "--cluster", profile.name, "--shards",
                      "2", "--output", "a\ntouch pwned.nc", cwd=tmp_path)
    assert done.returncode == 2
    assert "--output" in done.stderr and "control characters" in done.stderr
    assert done.stdout == ""


def test_array_script_refuses_a_working_directory_with_a_newline(tmp_path: Path) -> None:
    work = tmp_path / "a\ntouch pwned"
    work.mkdir()
    scenario = scenario_file(work)
    profile = work / "site.toml"
    profile.write_text(PROFILE.format(system="pbs"))
    done = invoke_cli("array-script", scenario.name, "--cluster", profile.name, "--shards",
                      "2", cwd=work)
    assert done.returncode == 2
    assert "working directory" in done.stderr and done.stdout == ""
