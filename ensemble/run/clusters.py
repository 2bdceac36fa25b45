"""Cluster profiles (TOML): what the batch jobs of a run ask for and run first.

A profile describes the worker jobs of one batch system (SLURM or PBS): queue, account,
walltime, cores and memory per job, a fixed number of jobs or adaptive bounds, extra header
directives, environment set-up lines and the Python the jobs run. ``--cluster NAME`` names
a profile by path, or as ``NAME.toml`` in ``./configs/`` and then in
``$XDG_CONFIG_HOME/ensemble/clusters/`` (``~/.config/ensemble/clusters/``); ``local`` is
reserved for this machine.

Every value is checked by what it is before it can reach a job script: queue and account
are names of a restricted alphabet, ``interface`` a network interface name, ``directives``
and ``setup`` single lines without control characters (a directive starting with ``-``),
and ``memory`` a size in the batch systems' own units (:func:`parse_memory`).  The
dask-jobqueue workers started from a profile are :mod:`ensemble.run.worker_jobs`; job
arrays are :mod:`ensemble.run.job_array`.
"""

from __future__ import annotations

import os
import re
import sys
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from decimal import Decimal
from pathlib import Path
from typing import Any, Literal

from ensemble.errors import ProfileError, ProfileErrors, did_you_mean
from ensemble.scenario.reader import CONTROL_CHARACTERS

LOCAL = "local"
"""The reserved profile name for this machine (a dask LocalCluster)."""

SYSTEMS = ("slurm", "pbs")

THREAD_LIMITS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS")
"""Environment variables set to 1 in every worker job: each dask worker process runs one
task at a time, so numerical libraries must not start threads of their own."""

_KEYS = ("system", "queue", "account", "walltime", "cores", "memory", "processes", "jobs",
         "adapt", "interface", "directives", "setup", "python")
_WALLTIME = re.compile(r"([0-9]{1,4}):([0-5][0-9]):([0-5][0-9])")
_QUEUE_NAME = re.compile(r"[A-Za-z0-9_][A-Za-z0-9_.,@+:-]{0,127}")
"""A partition, queue or account name: letters, digits and ``_ . , @ + : -``, not starting
with ``-`` (it would read as an option); SLURM's comma separates partitions, PBS's ``@``
names a server."""
_INTERFACE = re.compile(r"[A-Za-z0-9_][A-Za-z0-9_.:-]{0,14}")
"""A network interface name (at most 15 characters, as Linux allows), not starting with
``-``."""

MEMORY_UNITS = {"": 1, "K": 2**10, "M": 2**20, "G": 2**30, "T": 2**40}
"""Memory units of a profile: powers of 1024, as SLURM (``--mem``) and PBS (``mem=``)
read K, M, G and T; ``16GB``, ``16G`` and ``16GiB`` all mean 16 x 2^30 bytes."""
_MEMORY = re.compile(r"([0-9]{1,15}(?:\.[0-9]{1,6})?) ?(?:([KMGT])(?:i?B)?|B)", re.IGNORECASE)
MEMORY_LIMITS = (2**20, 2**50)
"""Smallest and largest memory per job a profile may ask for (1 MiB, 1 PiB)."""


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
    memory : memory per job, as written (e.g. ``"16GB"``); its bytes are
        :attr:`memory_bytes`.
    processes : dask worker processes per job (default: one per core, one thread each).
    jobs : a fixed number of worker jobs, or None when ``adapt`` is given.
    adapt : ``(minimum, maximum)`` worker jobs for adaptive scaling, or None.
    interface : network interface the workers and scheduler talk on (e.g. ``ib0``), or None.
    directives : extra header lines, given without the ``#SBATCH``/``#PBS`` prefix.
    setup : shell lines run before the work in every job (e.g. activating the environment).
    python : the Python the jobs run, or None for the default (:func:`job_python`).
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
    python: str | None = None

    @property
    def memory_bytes(self) -> int:
        """The memory per job in bytes (:func:`parse_memory`)."""
        return parse_memory(self.memory)

    @property
    def max_workers(self) -> int:
        """Most dask worker processes the profile runs at once."""
        return self.processes * (self.adapt[1] if self.adapt else self.jobs)

    @property
    def max_threads(self) -> int:
        """Most worker threads the profile runs at once (every core of every job)."""
        return self.cores * (self.adapt[1] if self.adapt else self.jobs)

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
        self.file, self.profile_name, self.path = file, name, path
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
        queue = self.name(table, "queue", _QUEUE_NAME, "a partition or queue name")
        account = self.name(table, "account", _QUEUE_NAME, "an account or project name")
        interface = self.name(table, "interface", _INTERFACE,
                              "a network interface name (at most 15 letters, digits, "
                              "'_', '.', ':' or '-'), e.g. \"ib0\"")
        python = self.text(table, "python", required=False)
        walltime = self.text(table, "walltime", required=True)
        if walltime is not None and not _WALLTIME.fullmatch(walltime):
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
        for index, directive in enumerate(directives):
            if not directive.startswith("-"):
                self.error(f"cluster.directives[{index}]", directive,
                           "a directive is an option of sbatch or qsub, starting with '-'",
                           'e.g. "--constraint=avx2" or "-l place=free"')
        setup = self.lines(table, "setup")
        if self.errors:
            raise ProfileErrors(self.errors)
        return ClusterProfile(
            name=self.profile_name, path=self.path, system=system, queue=queue,
            account=account, walltime=walltime, cores=cores, memory=memory,
            processes=processes or cores, jobs=jobs, adapt=adapt, interface=interface,
            directives=directives, setup=setup, python=python)

    def text(self, table: Mapping[str, Any], key: str, *, required: bool) -> str | None:
        value = table.get(key)
        if value is None:
            if required:
                self.error(f"cluster.{key}", None, "missing")
            return None
        if not isinstance(value, str) or not value.strip() or CONTROL_CHARACTERS.search(value):
            self.error(f"cluster.{key}", value, "expected a non-empty one-line string "
                       "without control characters")
            return None
        return value.strip()

    def name(self, table: Mapping[str, Any], key: str, pattern: re.Pattern[str],
             what: str) -> str | None:
        """An optional ``key`` that must match ``pattern`` entirely (``what`` it is)."""
        value = self.text(table, key, required=False)
        if value is not None and not pattern.fullmatch(value):
            self.error(f"cluster.{key}", value, f"expected {what}")
            return None
        return value

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
            parse_memory(value)
        except ValueError as error:
            self.error("cluster.memory", value, str(error))
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
            if not isinstance(line, str) or CONTROL_CHARACTERS.search(line):
                self.error(f"cluster.{key}[{index}]", line,
                           "expected a one-line string without control characters")
        return tuple(line for line in value
                     if isinstance(line, str) and not CONTROL_CHARACTERS.search(line))


def _seconds(walltime: str) -> int:
    hours, minutes, seconds = (int(x) for x in _WALLTIME.fullmatch(walltime).groups())
    return 3600 * hours + 60 * minutes + seconds


# ----------------------------------------------------------------------------- memory


def parse_memory(text: str) -> int:
    """Bytes of a profile's memory size, in units of 1024 (:data:`MEMORY_UNITS`).

    ``"16GB"`` is 16 x 2^30 bytes, as SLURM and PBS read it; fractions are rounded up to
    whole bytes.

    Raises
    ------
    ValueError
        Not a number with a unit, or outside :data:`MEMORY_LIMITS`.
    """
    found = _MEMORY.fullmatch(text.strip())
    if found is None:
        raise ValueError('expected a size with a unit, such as "16GB" or "4000M" (K, M, G '
                         "and T are powers of 1024, as SLURM and PBS read them)")
    exact = Decimal(found[1]) * MEMORY_UNITS[(found[2] or "").upper()]
    size = int(exact.to_integral_value(rounding="ROUND_CEILING"))
    low, high = MEMORY_LIMITS
    if not low <= size <= high:
        raise ValueError(f"expected between 1M and 1024T per job, not {size:,} bytes")
    return size


def memory_request(size: int, system: str) -> str:
    """``size`` bytes as the batch system's memory request: SLURM's ``--mem`` value
    (``16G``) or PBS's ``mem=`` value (``16gb``), in the largest unit of 1024 that gives a
    whole number (rounded up to whole KiB), so both systems get the same bytes."""
    kib = -(-size // 1024)
    for unit in ("T", "G", "M", "K"):
        factor = MEMORY_UNITS[unit] // 1024
        if kib % factor == 0:
            count = kib // factor
            return f"{count}{unit}" if system == "slurm" else f"{count}{unit.lower()}b"
    raise AssertionError("K divides every whole number of KiB")


# ----------------------------------------------------------------------------- jobs


def header_prefix(profile: ClusterProfile) -> str:
    """The job-header prefix of the profile's batch system."""
    return "#SBATCH" if profile.system == "slurm" else "#PBS"


def job_python(profile: ClusterProfile) -> str:
    """The Python a job runs: the profile's ``python``; else, when it has setup lines,
    ``python3`` from the PATH they make (the environment they choose); else this
    interpreter (a cluster sharing this machine's file system and software)."""
    if profile.python is not None:
        return profile.python
    return "python3" if profile.setup else sys.executable


def python_note(profile: ClusterProfile) -> str:
    """A comment line of a job script saying which Python environment the job uses."""
    python = job_python(profile)
    if profile.python is not None:
        return f"# Python: {python} (the profile's python)"
    if profile.setup:
        return f"# Python: {python} from the PATH the setup lines above make"
    return f"# Python: {python} (this machine's; the profile has no setup lines)"


def environment_lines(profile: ClusterProfile) -> list[str]:
    """Shell lines run at the start of every job: the profile's setup, then thread
    limits."""
    return [*profile.setup, *(f"export {name}=1" for name in THREAD_LIMITS)]


def job_name(profile: ClusterProfile) -> str:
    """A batch job name from the profile's file name: characters other than letters,
    digits, ``-`` and ``_`` become ``_`` (the name goes into a header directive, which
    cannot be quoted)."""
    return re.sub(r"[^A-Za-z0-9_-]", "_", f"ensemble-{profile.name}")
