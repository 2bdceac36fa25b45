"""Cluster profiles: loading, validation, lookup order, and the worker job scripts that
dask-jobqueue writes from them.

The expected header lines follow the sbatch(1) and qsub(1B) manuals (SLURM: ``-p``
partition, ``-A`` account, ``-t`` time limit, ``--cpus-per-task``, ``--mem``; PBS: ``-q``,
``-A``, ``-l select=...:ncpus=...``, ``-l walltime=``).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from ensemble.run.clusters import ClusterProfile, find_profile, load_profile, resolve_profile
from ensemble.run.worker_jobs import jobqueue_arguments, make_jobqueue_cluster, worker_lifetime
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
    assert profile.max_workers == 12


def test_adaptive_profile(tmp_path: Path) -> None:
    text = SLURM_PROFILE.replace("jobs = 3", "adapt = { minimum = 1, maximum = 10 }")
    profile = load_profile(write(tmp_path, "site.toml", text))
    assert profile.jobs is None and profile.adapt == (1, 10)
    assert profile.max_workers == 40


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
