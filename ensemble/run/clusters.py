"""Cluster profiles (TOML) and the dask-jobqueue clusters started from them.

A profile describes the worker jobs of one batch system (SLURM or PBS): queue, account,
walltime, cores and memory per job, a fixed number of jobs or adaptive bounds, extra header
directives and environment set-up lines. ``--cluster NAME`` names a profile by path, or as
``NAME.toml`` in ``./configs/`` and then in ``$XDG_CONFIG_HOME/ensemble/clusters/``
(``~/.config/ensemble/clusters/``); ``local`` is reserved for this machine.

Workers are started with dask-jobqueue (``SLURMCluster``/``PBSCluster``; see the
dask-jobqueue documentation, "How this works" and "Dealing with walltime"): every worker
gets a ``--lifetime`` a little shorter than the walltime, so it retires cleanly and hands its
data back before the batch system kills it, and the cluster always runs under
``adapt`` -- even a fixed ``jobs = N`` is ``adapt(minimum_jobs=N, maximum_jobs=N)`` -- because
the adaptive loop is what resubmits a job that died or ended. Tasks that were running on a
lost worker are recomputed by the dask scheduler; every task is a pure function of its
arguments, so the numbers do not change.
"""

from __future__ import annotations

import os
import re
import sys
import tomllib
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

from dask.utils import parse_bytes

from ensemble.errors import ProfileError, ProfileErrors, did_you_mean

LOCAL = "local"
"""The reserved profile name for this machine (a dask LocalCluster)."""

SYSTEMS = ("slurm", "pbs")

THREAD_LIMITS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS")
"""Environment variables set to 1 in every worker job: each dask worker process runs one
task at a time, so numerical libraries must not start threads of their own."""

_KEYS = ("system", "queue", "account", "walltime", "cores", "memory", "processes", "jobs",
         "adapt", "interface", "directives", "setup")
_WALLTIME = re.compile(r"^(\d+):([0-5]\d):([0-5]\d)$")


@dataclass(frozen=True)
class ClusterProfile:
    """A validated cluster profile.

    Attributes
    ----------
    name : the profile's name (file stem).
    path : absolute path of the profile file.
    system : ``"slurm"`` or ``"pbs"``.
    queue : partition (SLURM) or queue (PBS); None for the site default.
    account : account or project to charge; None for the user's default.
    walltime : ``HH:MM:SS`` per worker job or array task.
    cores : cores per job.
    memory : memory per job, as written (e.g. ``"16GB"``).
    processes : dask worker processes per job (default: one per core, one thread each).
    jobs : a fixed number of worker jobs, or None when ``adapt`` is given.
    adapt : ``(minimum, maximum)`` worker jobs for adaptive scaling, or None.
    interface : network interface the workers and scheduler talk on (e.g. ``ib0``), or None.
    directives : extra header lines, given without the ``#SBATCH``/``#PBS`` prefix.
    setup : shell lines run before the work in every job (e.g. activating the environment).
    """

    name: str
    path: Path
    system: Literal["slurm", "pbs"]
    queue: str | None
    account: str | None
    walltime: str
    cores: int
    memory: str
    processes: int
    jobs: int | None
    adapt: tuple[int, int] | None
    interface: str | None
    directives: tuple[str, ...]
    setup: tuple[str, ...]

    @property
    def max_workers(self) -> int:
        """Most dask worker processes the profile runs at once."""
        return self.processes * (self.adapt[1] if self.adapt else self.jobs)

    @property
    def walltime_seconds(self) -> int:
        """The walltime in seconds."""
        return _seconds(self.walltime)


# ----------------------------------------------------------------------------- lookup


def profile_directories(cwd: Path | None = None) -> list[Path]:
    """The directories searched for ``NAME.toml``, in order: ``./configs``, then the user's."""
    config_home = os.environ.get("XDG_CONFIG_HOME") or str(Path.home() / ".config")
    return [(cwd or Path.cwd()) / "configs", Path(config_home) / "ensemble" / "clusters"]


def find_profile(name: str, *, cwd: Path | None = None) -> Path | None:
    """Where the profile ``name`` lives; None for the reserved name ``local``.

    ``name`` is a path when it ends in ``.toml`` or contains a path separator; otherwise it is
    looked up as ``NAME.toml`` in :func:`profile_directories`.

    Raises
    ------
    ProfileError
        No such profile (the message lists the places looked in and, if one is close, a
        "did you mean" hint).
    """
    if name == LOCAL:
        return None
    if name.endswith(".toml") or os.sep in name or "/" in name:
        path = Path(name) if Path(name).is_absolute() else (cwd or Path.cwd()) / name
        if not path.is_file():
            raise ProfileError(name, "", None, "no such cluster profile file")
        return path.resolve()
    directories = profile_directories(cwd)
    for directory in directories:
        candidate = directory / f"{name}.toml"
        if candidate.is_file():
            return candidate.resolve()
    known = sorted({p.stem for d in directories if d.is_dir() for p in d.glob("*.toml")})
    places = " or ".join(str(d / f"{name}.toml") for d in directories)
    hint = did_you_mean(name, [*known, LOCAL])
    if hint is None and known:
        hint = "known profiles: " + ", ".join(known)
    raise ProfileError("--cluster", "", name, f"no cluster profile of that name (looked for {places})",
                        hint)


def resolve_profile(name: str | None, *, cwd: Path | None = None) -> ClusterProfile | None:
    """Find and load the profile ``name``; None for no name or ``local``."""
    if name is None:
        return None
    path = find_profile(name, cwd=cwd)
    return None if path is None else load_profile(path)


# ----------------------------------------------------------------------------- validation


def load_profile(path: str | Path) -> ClusterProfile:
    """Read and validate a cluster profile file.

    Raises
    ------
    ProfileError
        The file cannot be read or is not TOML; or, as :class:`ProfileErrors`, every problem
        found in its keys, each naming the file, the key path and the value.
    """
    path = Path(path)
    file = str(path)
    try:
        document = tomllib.loads(path.read_text(encoding="utf-8"))
    except OSError as error:
        raise ProfileError(file, "", None, f"cannot read the cluster profile: {error.strerror}")
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as error:
        raise ProfileError(file, "", None, f"not valid TOML: {error}")
    return _Validator(file, path.stem, path.resolve()).profile(document)


class _Validator:
    """Checks one profile document, collecting every problem before raising."""

    def __init__(self, file: str, name: str, path: Path):
        self.file, self.name, self.path = file, name, path
        self.errors: list[ProfileError] = []

    def error(self, key: str, value: object, message: str, hint: str | None = None) -> None:
        self.errors.append(ProfileError(self.file, key, value, message, hint))

    def profile(self, document: Mapping[str, Any]) -> ClusterProfile:
        for key in document:
            if key != "cluster":
                self.error(key, None, "unknown table; a profile has only [cluster]",
                           did_you_mean(key, ["cluster"]))
        table = document.get("cluster")
        if not isinstance(table, dict):
            self.error("cluster", None, "missing [cluster] table")
            raise ProfileErrors(self.errors)
        for key in table:
            if key not in _KEYS:
                self.error(f"cluster.{key}", table[key], "unknown key", did_you_mean(key, _KEYS))

        system = self.choice(table, "system", SYSTEMS)
        queue = self.text(table, "queue", required=False)
        account = self.text(table, "account", required=False)
        interface = self.text(table, "interface", required=False)
        walltime = self.text(table, "walltime", required=True)
        if walltime is not None and not _WALLTIME.match(walltime):
            self.error("cluster.walltime", walltime, "expected HH:MM:SS", 'e.g. "04:00:00"')
            walltime = None
        elif walltime is not None and _seconds(walltime) < 120:
            self.error("cluster.walltime", walltime, "a worker job needs at least two minutes")
        cores = self.count(table, "cores", minimum=1, required=True)
        processes = self.count(table, "processes", minimum=1, required=False)
        if cores is not None and processes is not None and cores % processes:
            self.error("cluster.processes", processes,
                       f"must divide cores ({cores}) so every process gets whole cores")
        memory = self.memory(table)
        jobs, adapt = self.scaling(table)
        directives = self.lines(table, "directives")
        setup = self.lines(table, "setup")
        if self.errors:
            raise ProfileErrors(self.errors)
        return ClusterProfile(
            name=self.name, path=self.path, system=system, queue=queue, account=account,
            walltime=walltime, cores=cores, memory=memory, processes=processes or cores,
            jobs=jobs, adapt=adapt, interface=interface, directives=directives, setup=setup)

    def text(self, table: Mapping[str, Any], key: str, *, required: bool) -> str | None:
        value = table.get(key)
        if value is None:
            if required:
                self.error(f"cluster.{key}", None, "missing")
            return None
        if not isinstance(value, str) or not value.strip() or "\n" in value:
            self.error(f"cluster.{key}", value, "expected a non-empty one-line string")
            return None
        return value.strip()

    def choice(self, table: Mapping[str, Any], key: str, choices: tuple[str, ...]) -> str | None:
        value = self.text(table, key, required=True)
        if value is not None and value not in choices:
            self.error(f"cluster.{key}", value, "expected one of " + ", ".join(choices),
                       did_you_mean(value, choices))
            return None
        return value

    def count(self, table: Mapping[str, Any], key: str, *, minimum: int, required: bool,
              prefix: str = "cluster") -> int | None:
        value = table.get(key)
        if value is None:
            if required:
                self.error(f"{prefix}.{key}", None, "missing")
            return None
        if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
            self.error(f"{prefix}.{key}", value, f"expected a whole number >= {minimum}")
            return None
        return value

    def memory(self, table: Mapping[str, Any]) -> str | None:
        value = self.text(table, "memory", required=True)
        if value is None:
            return None
        try:
            size = parse_bytes(value)
        except ValueError:
            size = 0
        if size <= 0:
            self.error("cluster.memory", value, "expected a size such as \"16GB\" or \"4000MiB\"")
            return None
        return value

    def scaling(self, table: Mapping[str, Any]) -> tuple[int | None, tuple[int, int] | None]:
        if ("jobs" in table) == ("adapt" in table):
            self.error("cluster", None, "give either jobs (a fixed number of worker jobs) or "
                       "adapt = { minimum = ..., maximum = ... }, not both and not neither")
            return None, None
        if "jobs" in table:
            return self.count(table, "jobs", minimum=1, required=True), None
        bounds = table["adapt"]
        if not isinstance(bounds, dict):
            self.error("cluster.adapt", bounds, "expected { minimum = ..., maximum = ... }")
            return None, None
        for key in bounds:
            if key not in ("minimum", "maximum"):
                self.error(f"cluster.adapt.{key}", bounds[key], "unknown key",
                           did_you_mean(key, ("minimum", "maximum")))
        minimum = self.count(bounds, "minimum", minimum=0, required=True, prefix="cluster.adapt")
        maximum = self.count(bounds, "maximum", minimum=1, required=True, prefix="cluster.adapt")
        if minimum is None or maximum is None:
            return None, None
        if maximum < minimum:
            self.error("cluster.adapt.maximum", maximum, f"smaller than minimum ({minimum})")
            return None, None
        return None, (minimum, maximum)

    def lines(self, table: Mapping[str, Any], key: str) -> tuple[str, ...]:
        value = table.get(key, [])
        if not isinstance(value, list):
            self.error(f"cluster.{key}", value, "expected a list of strings")
            return ()
        for index, line in enumerate(value):
            if not isinstance(line, str) or "\n" in line:
                self.error(f"cluster.{key}[{index}]", line, "expected a one-line string")
        return tuple(line for line in value if isinstance(line, str))


def _seconds(walltime: str) -> int:
    hours, minutes, seconds = (int(x) for x in _WALLTIME.match(walltime).groups())
    return 3600 * hours + 60 * minutes + seconds


# ----------------------------------------------------------------------------- clusters


def header_prefix(profile: ClusterProfile) -> str:
    """The job-header prefix of the profile's batch system."""
    return "#SBATCH" if profile.system == "slurm" else "#PBS"


def environment_lines(profile: ClusterProfile) -> list[str]:
    """Shell lines run at the start of every job: the profile's setup, then thread limits."""
    return [*profile.setup, *(f"export {name}=1" for name in THREAD_LIMITS)]


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
    """Keyword arguments for ``SLURMCluster``/``PBSCluster`` from a profile."""
    lifetime, stagger = worker_lifetime(profile)
    arguments: dict[str, Any] = {
        "cores": profile.cores,
        "memory": profile.memory,
        "processes": profile.processes,
        "walltime": profile.walltime,
        "queue": profile.queue,
        "account": profile.account,
        "interface": profile.interface,
        "job_extra_directives": list(profile.directives),
        "job_script_prologue": environment_lines(profile),
        "worker_extra_args": ["--lifetime", f"{lifetime}s", "--lifetime-stagger", f"{stagger}s"],
        "python": sys.executable,
        "job_name": f"ensemble-{profile.name}",
    }
    return {key: value for key, value in arguments.items() if value is not None}


def _cluster_class(profile: ClusterProfile):
    from dask_jobqueue import PBSCluster, SLURMCluster

    return SLURMCluster if profile.system == "slurm" else PBSCluster


def job_header(profile: ClusterProfile, job_name: str) -> str:
    """The batch header (``#SBATCH``/``#PBS`` lines) dask-jobqueue writes for this profile.

    Built by the jobqueue job class itself, without starting anything, so a job array
    asks for exactly what a worker job asks for: queue, account, cores, memory, walltime and
    the profile's directives.
    """
    arguments = jobqueue_arguments(profile) | {"job_name": job_name}
    job = _cluster_class(profile).job_cls(scheduler="tcp://unused:0", name=job_name, **arguments)
    return job.job_header


def make_jobqueue_cluster(profile: ClusterProfile):
    """A started (but not yet scaled) dask-jobqueue cluster for the profile."""
    return _cluster_class(profile)(**jobqueue_arguments(profile),
                                   scheduler_options={"dashboard_address": ":0"})


def scale(cluster, profile: ClusterProfile) -> None:
    """Keep the profile's number of worker jobs running, replacing any that end.

    A fixed ``jobs = N`` runs as ``adapt(minimum_jobs=N, maximum_jobs=N)``: dask's adaptive
    loop notices a worker that is gone and submits a new job in its place, which a plain
    ``scale(jobs=N)`` does not.
    """
    minimum, maximum = profile.adapt if profile.adapt else (profile.jobs, profile.jobs)
    cluster.adapt(minimum_jobs=minimum, maximum_jobs=maximum)


@contextmanager
def jobqueue_cluster(profile: ClusterProfile) -> Iterator[Any]:
    """Start the profile's worker jobs, yield the cluster, and cancel every job afterwards."""
    cluster = make_jobqueue_cluster(profile)
    try:
        scale(cluster, profile)
        yield cluster
    finally:
        cluster.close()
