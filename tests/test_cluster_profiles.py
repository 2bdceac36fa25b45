"""Cluster profiles: loading, validation, lookup order, and the worker job scripts that
dask-jobqueue writes from them.

The expected header lines follow the sbatch(1) and qsub(1B) manuals (SLURM: ``-p``
partition, ``-A`` account, ``-t`` time limit, ``--cpus-per-task``, ``--mem``; PBS: ``-q``,
``-A``, ``-l select=...:ncpus=...``, ``-l walltime=``).
"""

from __future__ import annotations

import re
import sys
from pathlib import Path

import pytest

from ensemble.run.clusters import (ClusterProfile, find_profile, job_python, load_profile,
                                   resolve_profile)
from ensemble.run.worker_jobs import (job_header, jobqueue_arguments, make_jobqueue_cluster,
                                      worker_lifetime, worker_script)
from ensemble.errors import ProfileError
from support import REPO, run_cli, write_scenario

SLURM_PROFILE = """\
[cluster]
system = "slurm"
queue = "short"
account = "proj-42"
walltime = "01:30:00"
cores = 4
memory = "8GB"
jobs = 3
directives = ["--constraint=skylake", "--qos=low"]
setup = ["module load python/3.11", "source /opt/venvs/ens/bin/activate"]
"""


def write(directory: Path, name: str, text: str) -> Path:
    directory.mkdir(parents=True, exist_ok=True)
    path = directory / name
    path.write_text(text)
    return path


@pytest.mark.parametrize("name", ["example-slurm", "example-pbs", "testbed-slurm"])
def test_shipped_profiles_are_valid(name: str) -> None:
    profile = load_profile(REPO / "configs" / f"{name}.toml")
    assert profile.name == name
    assert profile.system in ("slurm", "pbs")
    assert (profile.jobs is None) != (profile.adapt is None)


def test_profile_fields(tmp_path: Path) -> None:
    profile = load_profile(write(tmp_path, "site.toml", SLURM_PROFILE))
    assert profile == ClusterProfile(
        name="site", path=(tmp_path / "site.toml").resolve(), system="slurm", queue="short",
        account="proj-42", walltime="01:30:00", cores=4, memory="8GB", processes=4, jobs=3,
        adapt=None, interface=None,
        directives=("--constraint=skylake", "--qos=low"),
        setup=("module load python/3.11", "source /opt/venvs/ens/bin/activate"))
    assert profile.walltime_seconds == 5400
    assert profile.max_workers == 12 and profile.max_threads == 12


def test_adaptive_profile(tmp_path: Path) -> None:
    text = SLURM_PROFILE.replace("jobs = 3", "adapt = { minimum = 1, maximum = 10 }")
    profile = load_profile(write(tmp_path, "site.toml", text))
    assert profile.jobs is None and profile.adapt == (1, 10)
    assert profile.max_workers == 40 and profile.max_threads == 40


@pytest.mark.parametrize(("change", "key", "value", "hint"), [
    (('system = "slurm"', 'system = "slurn"'), "cluster.system", "slurn",
     "did you mean 'slurm'?"),
    (('walltime = "01:30:00"', 'walltime = "90 minutes"'), "cluster.walltime", "90 minutes",
     None),
    (("cores = 4", "cores = 0"), "cluster.cores", 0, None),
    (("cores = 4", "cores = 4\nprocesses = 3"), "cluster.processes", 3, None),
    (('memory = "8GB"', 'memory = "lots"'), "cluster.memory", "lots", None),
    (("jobs = 3", "jobs = 3\nadapt = { minimum = 0, maximum = 4 }"), "cluster", None, None),
    (("jobs = 3", "adapt = { minimum = 5, maximum = 4 }"), "cluster.adapt.maximum", 4, None),
    (("jobs = 3", "jobs = 3\nwaltime = 5"), "cluster.waltime", 5, "did you mean 'walltime'?"),
    (('directives = ["--constraint=skylake", "--qos=low"]', "directives = [1]"),
     "cluster.directives[0]", 1, None),
])
def test_invalid_profile_names_file_key_and_value(tmp_path: Path, change, key, value,
                                                   hint) -> None:
    path = write(tmp_path, "bad.toml", SLURM_PROFILE.replace(*change))
    with pytest.raises(ProfileError) as caught:
        load_profile(path)
    matching = [e for e in getattr(caught.value, "errors", [caught.value]) if e.key == key]
    assert matching, str(caught.value)
    assert matching[0].file == str(path)
    assert matching[0].value == value
    if hint:
        assert matching[0].hint == hint


def test_every_problem_is_reported_at_once(tmp_path: Path) -> None:
    text = SLURM_PROFILE.replace("cores = 4", "cores = -1").replace('"8GB"', '"x"')
    with pytest.raises(ProfileError) as caught:
        load_profile(write(tmp_path, "bad.toml", text))
    assert {e.key for e in caught.value.errors} == {"cluster.cores", "cluster.memory"}


def test_not_toml_is_reported(tmp_path: Path) -> None:
    with pytest.raises(ProfileError, match="not valid TOML"):
        load_profile(write(tmp_path, "bad.toml", "[cluster\n"))


def test_lookup_order_configs_then_user_directory(tmp_path: Path, monkeypatch) -> None:
    user = tmp_path / "xdg"
    monkeypatch.setenv("XDG_CONFIG_HOME", str(user))
    work = tmp_path / "work"
    in_user = write(user / "ensemble" / "clusters", "site.toml", SLURM_PROFILE)
    assert find_profile("site", cwd=work) == in_user.resolve()
    in_configs = write(work / "configs", "site.toml", SLURM_PROFILE)
    assert find_profile("site", cwd=work) == in_configs.resolve()
    assert find_profile(str(in_user), cwd=work) == in_user.resolve()  # a path wins
    assert find_profile("local", cwd=work) is None
    assert resolve_profile("local", cwd=work) is None
    assert resolve_profile(None, cwd=work) is None


def test_unknown_profile_lists_places_and_suggests(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.setenv("XDG_CONFIG_HOME", str(tmp_path / "xdg"))
    write(tmp_path / "configs", "site.toml", SLURM_PROFILE)
    with pytest.raises(ProfileError) as caught:
        find_profile("sight", cwd=tmp_path)
    message = str(caught.value)
    assert str(tmp_path / "configs" / "sight.toml") in message
    assert str(tmp_path / "xdg" / "ensemble" / "clusters" / "sight.toml") in message
    assert "did you mean 'site'?" in message


def test_cli_invalid_profile_exits_2_and_writes_nothing(tmp_path: Path) -> None:
    write_scenario(tmp_path, members=4, days=5)
    write(tmp_path / "configs", "broken.toml", SLURM_PROFILE.replace("cores = 4", "cores = 0"))
    before = sorted(p.name for p in tmp_path.iterdir())
    done = run_cli("run", "testtown.toml", "--cluster", "broken", cwd=tmp_path)
    assert done.returncode == 2, done.stderr
    assert "configs/broken.toml: cluster.cores" in done.stderr
    assert "(value: 0)" in done.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == before


def test_worker_lifetime_leaves_a_margin_before_the_walltime(tmp_path: Path) -> None:
    profile = load_profile(write(tmp_path, "site.toml", SLURM_PROFILE))
    lifetime, stagger = worker_lifetime(profile)
    assert lifetime + stagger < profile.walltime_seconds - 60
    assert lifetime > 0.8 * profile.walltime_seconds
    assert ["--lifetime", f"{lifetime}s", "--lifetime-stagger", f"{stagger}s"] == \
        jobqueue_arguments(profile)["worker_extra_args"][:4]


def job_script(profile: ClusterProfile) -> str:
    cluster = make_jobqueue_cluster(profile)  # a scheduler here, no job submitted
    try:
        return cluster.job_script()
    finally:
        cluster.close()


def test_slurm_job_script_carries_the_profile(tmp_path: Path) -> None:
    script = job_script(load_profile(write(tmp_path, "site.toml", SLURM_PROFILE)))
    lines = script.splitlines()
    for expected in ("#SBATCH -p short", "#SBATCH -A proj-42", "#SBATCH -t 01:30:00",
                     "#SBATCH --cpus-per-task=4", "#SBATCH --mem=8G",
                     "#SBATCH --constraint=skylake", "#SBATCH --qos=low",
                     "module load python/3.11", "source /opt/venvs/ens/bin/activate",
                     "export OMP_NUM_THREADS=1"):
        assert expected in lines, expected
    worker = next(line for line in lines if "distributed.cli.dask_worker" in line)
    assert "--nworkers 4" in worker and "--nthreads 1" in worker and "--lifetime" in worker
    # the environment is set up before the worker starts
    assert lines.index("source /opt/venvs/ens/bin/activate") < lines.index(worker)


def test_pbs_job_script_carries_the_profile(tmp_path: Path) -> None:
    text = (SLURM_PROFILE.replace('"slurm"', '"pbs"')
            .replace('["--constraint=skylake", "--qos=low"]', '["-l place=scatter"]'))
    script = job_script(load_profile(write(tmp_path, "site.toml", text)))
    lines = script.splitlines()
    for expected in ("#PBS -q short", "#PBS -A proj-42", "#PBS -l walltime=01:30:00",
                     "#PBS -l place=scatter", "module load python/3.11"):
        assert expected in lines, expected
    assert any(line.startswith("#PBS -l select=1:ncpus=4:mem=") for line in lines)


# ----------------------------------------------------------------------------- hostile values


@pytest.mark.parametrize(("line", "key"), [
    ('interface = "ib0; touch pwned"', "cluster.interface"),
    ('interface = "ib0 $(id)"', "cluster.interface"),
    ('interface = "-ib0"', "cluster.interface"),
    ('interface = "a-name-longer-than-15"', "cluster.interface"),
    ('queue = "short; touch pwned"', "cluster.queue"),
    ('queue = "-p evil"', "cluster.queue"),
    ('queue = "q`id`"', "cluster.queue"),
    ('account = "proj 42"', "cluster.account"),
    ('account = "$(id)"', "cluster.account"),
    ('directives = ["constraint=avx2"]', "cluster.directives[0]"),
    ('directives = ["--qos=low\\rtouch pwned"]', "cluster.directives[0]"),
    ('directives = ["--qos=low\\u001b[2J"]', "cluster.directives[0]"),
    ('setup = ["source a\\rtouch pwned"]', "cluster.setup[0]"),
    ('setup = ["true", "a\\u0000b"]', "cluster.setup[1]"),
    ('setup = ["echo \\u0085"]', "cluster.setup[0]"),
    ('python = "python3\\ntouch pwned"', "cluster.python"),
    ('memory = "1e400GB"', "cluster.memory"),
    ('memory = "16"', "cluster.memory"),
    ('memory = "0GB"', "cluster.memory"),
    ('memory = "2000TB"', "cluster.memory"),
    ('walltime = "\uff10\uff11:00:00"', "cluster.walltime"),    # fullwidth digits
])
def test_profile_values_are_checked_by_what_they_are(tmp_path: Path, line: str,
                                                     key: str) -> None:
    """Each value that reaches a job script is refused unless it is what its key says:
    an interface name (Linux: at most 15 characters), a queue or account name, one
    option line, one shell line, a size with a unit."""
    name = line.split(" = ")[0]
    kept = [old for old in SLURM_PROFILE.splitlines() if not old.startswith(f"{name} =")]
    path = write(tmp_path, "hostile.toml", "\n".join([*kept, line]) + "\n")
    with pytest.raises(ProfileError) as caught:
        load_profile(path)
    assert key in {e.key for e in getattr(caught.value, "errors", [caught.value])}, \
        str(caught.value)


@pytest.mark.parametrize("line", ['queue = "compute,debug"', 'queue = "workq@pbs-server"',
                                  'interface = "ib0"', 'interface = "enp3s0f1.100"',
                                  'directives = ["-l place=free"]', 'memory = "16 GB"',
                                  'memory = "1.5G"', 'python = "/opt/my envs/bin/python3"'])
def test_ordinary_profile_values_are_accepted(tmp_path: Path, line: str) -> None:
    name = line.split(" = ")[0]
    kept = [old for old in SLURM_PROFILE.splitlines() if not old.startswith(f"{name} =")]
    load_profile(write(tmp_path, "site.toml", "\n".join([*kept, line]) + "\n"))


# ----------------------------------------------------------------------------- memory units

SLURM_UNITS = {"K": 2**10, "M": 2**20, "G": 2**30, "T": 2**40}
"""sbatch(1), --mem: "Different units can be specified using the suffix [K|M|G|T]"; SLURM
counts them in powers of 1024 (a megabyte of --mem is 1,048,576 bytes)."""

PBS_UNITS = {"b": 1, "kb": 2**10, "mb": 2**20, "gb": 2**30, "tb": 2**40}
"""PBS Professional Reference Guide, "size" format: suffixes b, kb, mb, gb, tb, "1kb =
1024 bytes"."""


def slurm_bytes(header: str) -> int:
    number, unit = re.fullmatch(r"(\d+)([KMGT])", re.search(r"--mem=(\S+)", header)[1]).groups()
    return int(number) * SLURM_UNITS[unit]


def pbs_bytes(header: str) -> int:
    number, unit = re.fullmatch(r"(\d+)(b|kb|mb|gb|tb)",
                                re.search(r":mem=(\S+)", header)[1]).groups()
    return int(number) * PBS_UNITS[unit]


@pytest.mark.parametrize(("memory", "size"), [
    ("8GB", 8 * 2**30), ("8G", 8 * 2**30), ("8GiB", 8 * 2**30), ("16gb", 16 * 2**30),
    ("1.5GB", 3 * 2**29), ("4000M", 4000 * 2**20),
    ("7.45GB", 7999376589),         # 7.45 x 2^30 = 7,999,376,588.8 bytes, rounded up
    ("2T", 2 * 2**40), ("1536KB", 1536 * 2**10), ("1048577B", 1048577)])
def test_slurm_and_pbs_are_asked_for_the_same_bytes(tmp_path: Path, memory: str,
                                                     size: int) -> None:
    """One convention, K, M, G and T powers of 1024 as both batch systems read them: the
    same profile gives SLURM's --mem and PBS's mem= the same bytes (the requested size,
    rounded up to a whole KiB at most)."""
    slurm = load_profile(write(tmp_path, "slurm.toml",
                               SLURM_PROFILE.replace('"8GB"', f'"{memory}"')))
    pbs = load_profile(write(tmp_path, "pbs.toml", SLURM_PROFILE.replace(
        '"8GB"', f'"{memory}"').replace('"slurm"', '"pbs"').replace(
        '["--constraint=skylake", "--qos=low"]', "[]")))
    assert slurm.memory_bytes == pbs.memory_bytes == size
    asked = slurm_bytes(job_header(slurm, "x"))
    assert asked == pbs_bytes(job_header(pbs, "x"))
    assert size <= asked < size + 1024


def test_eight_gigabytes_is_eight_gibibytes_on_both_systems(tmp_path: Path) -> None:
    profile = load_profile(write(tmp_path, "site.toml", SLURM_PROFILE))   # memory = "8GB"
    assert "#SBATCH --mem=8G" in job_header(profile, "x").splitlines()
    pbs = load_profile(write(tmp_path, "pbs.toml", SLURM_PROFILE.replace('"slurm"', '"pbs"')))
    assert "#PBS -l select=1:ncpus=4:mem=8gb" in job_header(pbs, "x").splitlines()


# ----------------------------------------------------------------------------- the jobs' Python


def test_jobs_run_the_python_the_profile_chooses(tmp_path: Path) -> None:
    with_setup = load_profile(write(tmp_path, "a.toml", SLURM_PROFILE))
    assert job_python(with_setup) == "python3"         # from the PATH the setup makes
    without = load_profile(write(tmp_path, "b.toml", SLURM_PROFILE.replace(
        'setup = ["module load python/3.11", "source /opt/venvs/ens/bin/activate"]',
        "setup = []")))
    assert job_python(without) == sys.executable       # this machine's
    chosen = load_profile(write(tmp_path, "c.toml",
                                SLURM_PROFILE + 'python = "/opt/my envs/bin/python3"\n'))
    assert job_python(chosen) == "/opt/my envs/bin/python3"
    script = worker_script(chosen).splitlines()
    worker = next(line for line in script if "distributed.cli.dask_worker" in line)
    assert worker.startswith("'/opt/my envs/bin/python3' -m distributed.cli.dask_worker ")
    assert "# Python: /opt/my envs/bin/python3 (the profile's python)" in script
