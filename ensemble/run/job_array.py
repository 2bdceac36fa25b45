"""A sharded run as a batch-system job array: the bash driver script that submits every
shard (:mod:`.shards`) as one task of an array, and a merge job that runs only when all
of them succeeded.

Nothing the user gives can run as a command of its own on the login node or in a job:

- every path and option is quoted with :func:`shlex.quote`, comment lines included, and
  refused if it holds a control character (a newline would end a comment or a quoted
  word's line, :func:`checked`);
- no path is written into a header directive, which the batch system reads without any
  quoting: the driver submits from the parts directory, and the logs go there under
  names made of the job's name and ids;
- each job script is inline in a quoted here-document whose end word is derived from
  the script's own text (:func:`end_word`), so no line of it ends the document early;
- the profile's values are checked by what they are when it is loaded (:mod:`.clusters`).

The jobs run the Python the profile chooses (:func:`~ensemble.run.clusters.job_python`),
and each job script says which in a comment.
"""

from __future__ import annotations

import hashlib
import shlex
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from ensemble.errors import UsageError
from ensemble.run.clusters import (ClusterProfile, environment_lines, header_prefix,
                                   job_python, python_note)
from ensemble.run.worker_jobs import job_header
from ensemble.scenario.reader import CONTROL_CHARACTERS
from ensemble.scenario.schema import Scenario


@dataclass(frozen=True)
class ArraySyntax:
    """How one batch system submits a job array and a job that waits for all of it.

    Attributes
    ----------
    submit : the submitting command (it reads the job script on standard input).
    directive : the header directive making a job an array of tasks ``0 .. last``.
    index : the environment variable holding a task's index.
    array_logs : header directives naming an array task's log, relative to the directory
        the job was submitted from.
    job_logs : the same for a single job.
    after : the option that holds a job until the array job (its id appended) succeeded.
    """

    submit: str
    directive: str
    index: str
    array_logs: tuple[str, ...]
    job_logs: tuple[str, ...]
    after: str


SYNTAX = {
    "slurm": ArraySyntax("sbatch --parsable", "--array=0-{last}", "SLURM_ARRAY_TASK_ID",
                         ("-o %x-%A_%a.log",), ("-o %x-%j.log",),
                         "--kill-on-invalid-dep=yes --dependency=afterok:"),
    "pbs": ArraySyntax("qsub", "-J 0-{last}", "PBS_ARRAY_INDEX", ("-j oe",), ("-j oe",),
                       "-W depend=afterok:"),
}
"""SLURM (sbatch(1): ``--array``, ``SLURM_ARRAY_TASK_ID``, ``--dependency=afterok:<array
job>`` waits for every task; ``-o`` with ``%x`` job name, ``%A`` array job id, ``%a`` task
index, ``%j`` job id, relative to the submitting directory) and PBS Pro (qsub(1B): ``-J``,
``PBS_ARRAY_INDEX``, ``-W depend=afterok:`` on the array's ``<id>[]`` waits for every
subjob; ``-j oe`` joins the error log to the output log, which goes to the submitting
directory by default)."""


def checked(value: str, what: str) -> str:
    """``value`` (a path or an option) for a job script, refused if it holds a control
    character.

    Raises
    ------
    UsageError
        Naming ``what`` (the option or the place the value comes from) and the value.
    """
    if CONTROL_CHARACTERS.search(value):
        raise UsageError(what, "", value, "a value written into a job script must not "
                         "contain control characters (newline, carriage return, tab, ...)")
    return value


def end_word(lines: Sequence[str]) -> str:
    """The end word of the here-document holding ``lines``: derived from their text, so
    that no line equals it (a line would have to contain the digest of itself)."""
    digest = hashlib.sha256("\n".join(lines).encode()).hexdigest()[:24]
    word = f"ENSEMBLE_JOB_{digest}"
    assert word not in "\n".join(lines).splitlines()
    return word


def array_script(scenario: Scenario, profile: ClusterProfile, shards: int, *,
                 run_options: Sequence[str], cwd: Path) -> str:
    """A bash driver that submits ``shards`` shards as one job array and a merge job.

    The merge job starts only if every array task succeeded, and writes the result to
    ``scenario.output.path``; the parts go to the directory ``<result stem>.parts`` beside
    it, with one log per task.  Each array task runs ``ensemble run --shard I/N --resume``
    on the job's own cores, so resubmitting the driver after a failure recomputes only the
    shards whose part is missing.

    Parameters
    ----------
    scenario : the validated scenario (overrides applied), whose file the jobs read.
    profile : the batch-system profile (header, walltime, setup lines, Python).
    shards : number of array tasks, 1 .. members.
    run_options : command-line options carried into every shard's ``ensemble run``
        (e.g. ``["--members", "5000", "--seed", "7"]``).
    cwd : the directory the jobs work in.

    Returns
    -------
    The script's text.

    Raises
    ------
    UsageError
        A path or option holds a control character.
    """
    syntax = SYNTAX[profile.system]
    checked(str(cwd), "the working directory")
    result = Path(checked(str((cwd / scenario.output.path).resolve()), "--output"))
    parts = result.with_name(f"{result.stem}.parts")
    for option in run_options:
        checked(option, "the options carried into the jobs")
    shard_job = _shard_job(scenario, profile, syntax, shards, run_options, cwd, parts)
    merge_job = _merge_job(scenario, profile, syntax, shards, cwd, parts, result)
    lines = [
        "#!/usr/bin/env bash",
        f"# Submits {scenario.name!r} as a {profile.system.upper()} job array of {shards} "
        f"shards and a merge job that",
        "# runs only if every shard succeeds. Made by `ensemble array-script`; run it with "
        "bash on the login node.",
        f"# Result: {shlex.quote(str(result))}",
        f"# Parts and logs: {shlex.quote(str(parts))}",
        "set -euo pipefail",
        f"mkdir -p {shlex.quote(str(parts))}",
        f"cd {shlex.quote(str(parts))}     # the jobs' logs are written here",
        *_submission("shards", syntax.submit, shard_job),
        'shards=${shards%%;*}',
        *_submission("merge", f'{syntax.submit} {syntax.after}"$shards"', merge_job),
        'merge=${merge%%;*}',
        'echo "submitted the shards as job array $shards and the merge as job $merge"',
        f'echo "result, when job $merge has ended: "{shlex.quote(str(result))}',
    ]
    return "\n".join(lines) + "\n"


def _submission(variable: str, submit: str, job: list[str]) -> list[str]:
    """Lines that submit ``job`` (its script inline) and keep its id in ``variable``."""
    script = ["#!/usr/bin/env bash", *job]
    end = end_word(script)
    return [f"{variable}=$({submit} <<'{end}'", *script, end, ")"]


def _ensemble_command(profile: ClusterProfile) -> list[str]:
    """The ``ensemble`` program as the jobs run it: the package in the profile's
    Python."""
    return [job_python(profile), "-m", "ensemble"]


def _shard_job(scenario: Scenario, profile: ClusterProfile, syntax: ArraySyntax,
               shards: int, run_options: Sequence[str], cwd: Path, parts: Path) -> list[str]:
    """The script of the array job: each task runs its shard into its part file."""
    prefix = header_prefix(profile)
    index = syntax.index
    scenario_path = checked(str((cwd / scenario.source.path).resolve()), "the scenario file")
    shard_run = shlex.join([*_ensemble_command(profile), "run", scenario_path, *run_options,
                            "--workers", str(profile.processes), "--resume"])
    part = f"{shlex.quote(str(parts))}/shard-${{{index}}}-of-{shards}.nc"
    return [
        job_header(profile, f"ensemble-{scenario.name}"),
        f"{prefix} {syntax.directive.format(last=shards - 1)}",
        *(f"{prefix} {line}" for line in syntax.array_logs),
        *environment_lines(profile),
        python_note(profile),
        f"cd {shlex.quote(str(cwd))}",
        f'exec {shard_run} --shard "${{{index}}}/{shards}" --output {part}',
    ]


def _merge_job(scenario: Scenario, profile: ClusterProfile, syntax: ArraySyntax,
               shards: int, cwd: Path, parts: Path, result: Path) -> list[str]:
    """The script of the merge job: every part joined into the result."""
    prefix = header_prefix(profile)
    merge_run = shlex.join([*_ensemble_command(profile), "merge"])
    return [
        job_header(profile, f"ensemble-{scenario.name}-merge"),
        *(f"{prefix} {line}" for line in syntax.job_logs),
        *environment_lines(profile),
        python_note(profile),
        f"cd {shlex.quote(str(cwd))}",
        f"exec {merge_run} {shlex.quote(str(parts))}/shard-{{0..{shards - 1}}}-of-{shards}.nc "
        f"--output {shlex.quote(str(result))}",
    ]
