"""Dask workers in batch jobs, started from a cluster profile with dask-jobqueue.

Workers are started with dask-jobqueue (``SLURMCluster``/``PBSCluster``; see the
dask-jobqueue documentation, "How this works" and "Dealing with walltime"): every worker
gets a ``--lifetime`` a little shorter than the walltime, so it retires cleanly and hands its
data back before the batch system kills it, and the cluster always runs under
``adapt`` -- even a fixed ``jobs = N`` is ``adapt(minimum_jobs=N, maximum_jobs=N)`` -- because
the adaptive loop is what resubmits a job that died or ended. Tasks that were running on a
lost worker are recomputed by the dask scheduler; every task is a pure function of its
arguments, so the numbers do not change.

A submission the batch system refuses (``sbatch``/``qsub`` exiting with an error) ends the
run with :class:`~ensemble.errors.RunFailed` and the batch system's own message: the first
job is submitted before any work is handed out, and a later refusal cancels the work
waiting for workers (:class:`SubmissionWatch`).  :func:`worker_script` shows the job
script without submitting anything.
"""

from __future__ import annotations

import asyncio
import shlex
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

import dask
from distributed.core import Status

from ensemble.errors import RunFailed
from ensemble.run.clusters import (ClusterProfile, environment_lines, job_name, job_python,
                                   memory_request, python_note)
from ensemble.run.listening import LOOPBACK_ANY_PORT, NO_PAGES, NO_PAGES_ENVIRONMENT

SCHEDULER_PLACEHOLDER = "tcp://SCHEDULER-ADDRESS:8786"
"""The scheduler address :func:`worker_script` shows (a run fills in its own)."""


def worker_lifetime(profile: ClusterProfile) -> tuple[int, int]:
    """A worker's ``--lifetime`` and ``--lifetime-stagger``, in seconds.

    The worker retires a margin before the walltime (a tenth of it, at least one minute
    and at most five) so it can hand its results back before the batch system kills the job;
    the stagger (a fortieth, at most two minutes) keeps all workers from leaving at once.
    The margins are common practice (dask-jobqueue documentation), no source for the values.
    """
    walltime = profile.walltime_seconds
    margin = min(300, max(60, walltime // 10))
    stagger = min(120, walltime // 40)
    return walltime - margin - stagger, stagger


def jobqueue_arguments(profile: ClusterProfile) -> dict[str, Any]:
    """Keyword arguments for ``SLURMCluster``/``PBSCluster`` from a profile.

    The memory request is written by :func:`~ensemble.run.clusters.memory_request`, so
    SLURM and PBS are asked for the same bytes; the Python is
    :func:`~ensemble.run.clusters.job_python`, quoted for the shell; each worker's web
    server listens on its node's loopback address and serves no page.
    """
    lifetime, stagger = worker_lifetime(profile)
    memory = profile.memory_bytes
    arguments: dict[str, Any] = {
        "cores": profile.cores,
        "memory": memory,
        "processes": profile.processes,
        "walltime": profile.walltime,
        "queue": profile.queue,
        "account": profile.account,
        "interface": profile.interface,
        "job_extra_directives": list(profile.directives),
        "job_script_prologue": [*environment_lines(profile), python_note(profile),
                                f"export {NO_PAGES_ENVIRONMENT}"],
        "worker_extra_args": ["--lifetime", f"{lifetime}s", "--lifetime-stagger",
                              f"{stagger}s", "--no-dashboard", "--dashboard-address",
                              LOOPBACK_ANY_PORT],
        "python": shlex.quote(job_python(profile)),
        "job_name": job_name(profile),
    }
    if profile.system == "slurm":
        arguments["job_mem"] = memory_request(memory, "slurm")
    else:
        arguments["resource_spec"] = (f"select=1:ncpus={profile.cores}:"
                                      f"mem={memory_request(memory, 'pbs')}")
    return {key: value for key, value in arguments.items() if value is not None}


# ----------------------------------------------------------------------------- refusals


class SubmissionRefused(Exception):
    """The batch system's submitting command failed; the message is its own."""


class SubmissionWatch:
    """What became of the worker jobs' submissions.

    Attributes
    ----------
    refusal : the first refusal's message, or None.
    on_refusal : called (on dask's event loop) at the first refusal.
    """

    def __init__(self) -> None:
        self.refusal: str | None = None
        self.on_refusal: Callable[[], None] = lambda: None
        self._answers = 0
        self._answered = threading.Condition()

    def answered(self, refusal: str | None) -> None:
        """Note one submission's answer: accepted (None) or refused (its message)."""
        with self._answered:
            first = refusal is not None and self.refusal is None
            if first:
                self.refusal = refusal
            self._answers += 1
            self._answered.notify_all()
        if first:
            self.on_refusal()

    def wait_for_answers(self, count: int) -> None:
        """Wait until ``count`` submissions were answered (in short waits, so an interrupt
        gets through)."""
        with self._answered:
            while self._answers < count:
                self._answered.wait(0.1)

    def failure(self) -> RunFailed:
        """The run's error after a refusal."""
        return RunFailed(f"the batch system refused a worker job: {self.refusal}")


class _ReportsSubmissions:
    """Mixed into a dask-jobqueue job class: tells :attr:`watch` how each submission was
    answered, with the submitting command's own message when it failed (dask-jobqueue's
    would be a traceback in the log, and the run would wait for a worker that never
    comes)."""

    watch: SubmissionWatch
    submit_command: str

    async def start(self) -> None:
        """Submit the job (dask-jobqueue's start) and report the answer."""
        try:
            await super().start()       # writes the script, submits it, reads the job id
        except Exception as error:
            message = str(error) if isinstance(error, SubmissionRefused) else (
                f"{type(error).__name__}: {error}")
            self.watch.answered(message)
            # Reported: the job ends here, without the traceback dask would log, and is
            # closed with the cluster like any other (it has no batch job to cancel).
            self.status = Status.running
            return
        self.watch.answered(None)

    async def _submit_job(self, script_filename: str) -> str:
        """Run the submitting command with the script's path, as dask-jobqueue does."""
        command = [*shlex.split(self.submit_command), script_filename]
        try:
            process = await asyncio.create_subprocess_exec(
                *command, stdout=asyncio.subprocess.PIPE, stderr=asyncio.subprocess.PIPE)
            out, err = await process.communicate()
        except OSError as error:
            raise SubmissionRefused(f"cannot run {command[0]}: {error.strerror or error}")
        if process.returncode != 0:
            said = (err or out).decode(errors="replace").strip() or "no message"
            raise SubmissionRefused(f"{command[0]} exited with status {process.returncode}: "
                                    f"{said}")
        return out.decode(errors="replace")


def _cluster_class(profile: ClusterProfile):
    from dask_jobqueue import PBSCluster, SLURMCluster

    return SLURMCluster if profile.system == "slurm" else PBSCluster


def _watched_job_class(profile: ClusterProfile, watch: SubmissionWatch) -> type:
    """The profile's dask-jobqueue job class, reporting its submissions to ``watch``."""
    base = _cluster_class(profile).job_cls
    return type(f"Watched{base.__name__}", (_ReportsSubmissions, base), {"watch": watch})


def _cancel_every_task(scheduler, message: str) -> None:
    """Cancel every task of ``scheduler`` (in this process, on its event loop), so that
    the driver waiting for them stops and reports ``message``."""
    for client in list(scheduler.clients):
        scheduler.stimulus_cancel(list(scheduler.tasks), client, force=True,
                                  reason="worker job refused", msg=message)


# ----------------------------------------------------------------------------- clusters


def job_header(profile: ClusterProfile, name: str) -> str:
    """The batch header (``#SBATCH``/``#PBS`` lines) dask-jobqueue writes for this profile.

    Built by the jobqueue job class itself, without starting anything, so a job array
    asks for exactly what a worker job asks for: queue, account, cores, memory, walltime and
    the profile's directives.
    """
    arguments = jobqueue_arguments(profile) | {"job_name": name}
    job = _cluster_class(profile).job_cls(scheduler=SCHEDULER_PLACEHOLDER, name=name,
                                          **arguments)
    return job.job_header


def worker_script(profile: ClusterProfile) -> str:
    """The job script of one worker job, as ``ensemble run --cluster`` submits it (with
    :data:`SCHEDULER_PLACEHOLDER` for the scheduler's address), without submitting or
    starting anything."""
    job = _cluster_class(profile).job_cls(scheduler=SCHEDULER_PLACEHOLDER, name="worker",
                                          **jobqueue_arguments(profile))
    return job.job_script().rstrip("\n") + "\n"


def make_jobqueue_cluster(profile: ClusterProfile, dashboard: str | None = None,
                          watch: SubmissionWatch | None = None):
    """A started (but not yet scaled) dask-jobqueue cluster for the profile.

    Its scheduler serves the dashboard at ``dashboard`` (``HOST:PORT``) if given, else no
    page, on the loopback address; its connection port listens where the workers can
    reach it (the profile's ``interface``, else dask's default).  Submissions are reported
    to ``watch``.
    """
    job_class = _watched_job_class(profile, watch or SubmissionWatch())
    scheduler = {"dashboard": dashboard is not None,
                 "dashboard_address": dashboard or LOOPBACK_ANY_PORT}
    with dask.config.set({} if dashboard is not None else NO_PAGES):
        return _cluster_class(profile)(**jobqueue_arguments(profile), job_cls=job_class,
                                       scheduler_options=scheduler)


def scale(cluster, profile: ClusterProfile, watch: SubmissionWatch) -> None:
    """Submit the first worker jobs (at least one) and wait for the batch system's answers,
    then keep the profile's number of worker jobs running, replacing any that end.

    A fixed ``jobs = N`` runs as ``adapt(minimum_jobs=N, maximum_jobs=N)``: dask's adaptive
    loop notices a worker that is gone and submits a new job in its place, which a plain
    ``scale(jobs=N)`` does not.

    Raises
    ------
    RunFailed
        A first submission was refused.
    """
    minimum, maximum = profile.adapt if profile.adapt else (profile.jobs, profile.jobs)
    first = max(1, minimum)
    cluster.scale(jobs=first)
    watch.wait_for_answers(first)
    if watch.refusal is not None:
        raise watch.failure()
    cluster.adapt(minimum_jobs=minimum, maximum_jobs=maximum)


@contextmanager
def jobqueue_cluster(profile: ClusterProfile, dashboard: str | None = None
                     ) -> Iterator[Any]:
    """Start the profile's worker jobs, yield the cluster, and cancel every job afterwards.

    Raises
    ------
    RunFailed
        A submission was refused (whatever else the refusal made fail), with the batch
        system's message.
    """
    watch = SubmissionWatch()
    cluster = make_jobqueue_cluster(profile, dashboard, watch)
    watch.on_refusal = lambda: _cancel_every_task(cluster.scheduler, watch.refusal)
    try:
        scale(cluster, profile, watch)
        yield cluster
    except Exception:
        if watch.refusal is not None:
            raise watch.failure() from None
        raise
    finally:
        cluster.close()
