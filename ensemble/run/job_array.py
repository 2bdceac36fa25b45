"""A sharded run as a batch-system job array: the bash driver script that submits every
shard (:mod:`.shards`) as one task of an array, and a merge job that runs only when all
of them succeeded.

Every value that reaches the script (paths, options, the profile's lines) is quoted with
:func:`shlex.quote` or checked by the profile's loader (:mod:`.clusters`).
"""

from __future__ import annotations

import shlex
import sys
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from ensemble.run.clusters import ClusterProfile, environment_lines, header_prefix
from ensemble.run.worker_jobs import job_header
from ensemble.scenario.schema import Scenario


@dataclass(frozen=True)
class ArraySyntax:
    """How one batch system submits a job array and a job that waits for all of it.

    Attributes
    ----------
    submit : the submitting command (it reads the job script on standard input).
    directive : the header directive making a job an array of tasks ``0 .. last``.
    index : the environment variable holding a task's index.
    logs : header directives sending the logs to directory ``{logs}``.
    after : the option that holds a job until the array job (its id appended) succeeded.
    """

    submit: str
    directive: str
    index: str
    logs: tuple[str, ...]
    after: str


SYNTAX = {
    "slurm": ArraySyntax("sbatch --parsable", "--array=0-{last}", "SLURM_ARRAY_TASK_ID",
                         ("-o {logs}/%x-%A_%a.log",),
                         "--kill-on-invalid-dep=yes --dependency=afterok:"),
    "pbs": ArraySyntax("qsub", "-J 0-{last}", "PBS_ARRAY_INDEX", ("-j oe", "-o {logs}/"),
                       "-W depend=afterok:"),
}
"""SLURM (sbatch(1): ``--array``, ``SLURM_ARRAY_TASK_ID``, ``--dependency=afterok:<array
job>`` waits for every task) and PBS Pro (qsub(1B): ``-J``, ``PBS_ARRAY_INDEX``,
``-W depend=afterok:`` on the array's ``<id>[]`` waits for every subjob)."""

JOB_END = "ENSEMBLE_JOB_SCRIPT"
"""End marker of the job scripts written inline into the driver (quoted here-documents,
so the shell expands nothing in them)."""


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
    profile : the batch-system profile (header, walltime, setup lines).
    shards : number of array tasks, 1 .. members.
    run_options : command-line options carried into every shard's ``ensemble run``
        (e.g. ``["--members", "5000", "--seed", "7"]``).
    cwd : the directory the jobs work in.

    Returns
    -------
    The script's text.
    """
    syntax = SYNTAX[profile.system]
    result = (cwd / scenario.output.path).resolve()
    parts = result.with_name(f"{result.stem}.parts")
    shard_job = _shard_job(scenario, profile, syntax, shards, run_options, cwd, parts)
    merge_job = _merge_job(scenario, profile, syntax, shards, cwd, parts, result)
    lines = [
        "#!/usr/bin/env bash",
        f"# Submits {scenario.name!r} as a {profile.system.upper()} job array of {shards} "
        f"shards and a merge job that",
        "# runs only if every shard succeeds. Made by `ensemble array-script`; run it with "
        "bash on the login node.",
        f"# Result: {result}",
        f"# Parts and logs: {parts}/",
        "set -euo pipefail",
        f"mkdir -p {shlex.quote(str(parts))}",
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
    return [f"{variable}=$({submit} <<'{JOB_END}'", "#!/usr/bin/env bash", *job, JOB_END, ")"]


def _ensemble_command() -> list[str]:
    """The ``ensemble`` program as the jobs run it: this interpreter and package."""
    return [sys.executable, "-m", "ensemble"]


def _shard_job(scenario: Scenario, profile: ClusterProfile, syntax: ArraySyntax,
               shards: int, run_options: Sequence[str], cwd: Path, parts: Path) -> list[str]:
    """The script of the array job: each task runs its shard into its part file."""
    prefix = header_prefix(profile)
    index = syntax.index
    scenario_path = (cwd / scenario.source.path).resolve()
    shard_run = shlex.join([*_ensemble_command(), "run", str(scenario_path), *run_options,
                            "--workers", str(profile.processes), "--resume"])
    part = f"{shlex.quote(str(parts))}/shard-${{{index}}}-of-{shards}.nc"
    return [
        job_header(profile, f"ensemble-{scenario.name}"),
        f"{prefix} {syntax.directive.format(last=shards - 1)}",
        *(f"{prefix} {line.format(logs=parts)}" for line in syntax.logs),
        *environment_lines(profile),
        f"cd {shlex.quote(str(cwd))}",
        f'exec {shard_run} --shard "${{{index}}}/{shards}" --output {part}',
    ]


def _merge_job(scenario: Scenario, profile: ClusterProfile, syntax: ArraySyntax,
               shards: int, cwd: Path, parts: Path, result: Path) -> list[str]:
    """The script of the merge job: every part joined into the result."""
    prefix = header_prefix(profile)
    merge_run = shlex.join([*_ensemble_command(), "merge"])
    return [
        job_header(profile, f"ensemble-{scenario.name}-merge"),
        *(f"{prefix} {line.format(logs=parts).replace('%a', 'merge')}"
          for line in syntax.logs),
        *environment_lines(profile),
        f"cd {shlex.quote(str(cwd))}",
        f"exec {merge_run} {shlex.quote(str(parts))}/shard-{{0..{shards - 1}}}-of-{shards}.nc "
        f"--output {shlex.quote(str(result))}",
    ]
