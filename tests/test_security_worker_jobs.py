"""The route that submits its own worker jobs (dask-jobqueue) never waits for a job the
batch system refused, and its job script can be read without submitting anything.

Stand-in ``sbatch``/``qsub`` programs on PATH play the batch system: one refuses as
sbatch(1) and qsub(1B) do (a message on standard error, a non-zero exit status), one
accepts a first job (running its script on this machine, as a node would) and refuses
the next.
"""

from __future__ import annotations

import os
import shlex
import stat
import subprocess
import sys
from pathlib import Path

import pytest

from support import ensemble_command, run_cli, write_scenario

PROFILE = """\
[cluster]
system = "{system}"
queue = "short"
walltime = "01:00:00"
cores = 1
memory = "1GB"
jobs = 1
"""

REFUSAL = "Batch job submission failed: Invalid account or account/partition combination"


def stand_in(directory: Path, name: str, body: str) -> None:
    program = directory / name
    program.write_text("#!/usr/bin/env bash\n" + body)
    program.chmod(program.stat().st_mode | stat.S_IXUSR)


def site(tmp_path: Path, system: str = "slurm") -> tuple[Path, dict[str, str]]:
    """A working directory with the illustrative town and a profile ``site`` in
    ./configs, and an environment whose PATH starts with an empty directory of stand-ins."""
    write_scenario(tmp_path, members=8, days=5)
    (tmp_path / "configs").mkdir()
    (tmp_path / "configs" / "site.toml").write_text(PROFILE.format(system=system))
    bin_directory = tmp_path / "bin"
    bin_directory.mkdir()
    return bin_directory, dict(os.environ, PATH=f"{bin_directory}:{os.environ['PATH']}")


@pytest.mark.parametrize("system", ["slurm", "pbs"])
def test_a_refused_submission_ends_the_run_with_the_batch_systems_message(
        tmp_path: Path, system: str) -> None:
    bin_directory, environment = site(tmp_path, system)
    command = "sbatch" if system == "slurm" else "qsub"
    stand_in(bin_directory, command, f"echo '{command}: error: {REFUSAL}' >&2\nexit 1\n")
    done = subprocess.run(ensemble_command("run", "testtown.toml", "--cluster", "site",
                                           "--backend", "numpy"),
                          cwd=tmp_path, env=environment, capture_output=True, text=True,
                          timeout=300)          # a hang fails here instead of blocking
    assert done.returncode == 1, done.stderr
    assert (f"error: the batch system refused a worker job: {command} exited with status 1: "
            f"{command}: error: {REFUSAL}") in done.stderr
    assert "Traceback" not in done.stderr
    assert not (tmp_path / "result.nc").exists()


def test_a_missing_submitting_command_ends_the_run(tmp_path: Path) -> None:
    write_scenario(tmp_path, members=4, days=5)
    (tmp_path / "configs").mkdir()
    (tmp_path / "configs" / "site.toml").write_text(PROFILE.format(system="slurm"))
    environment = dict(os.environ, PATH=str(Path(sys.executable).parent))   # no sbatch
    done = subprocess.run(ensemble_command("run", "testtown.toml", "--cluster", "site",
                                           "--backend", "numpy"),
                          cwd=tmp_path, env=environment, capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 1, done.stderr
    assert "refused a worker job: cannot run sbatch" in done.stderr


ACCEPT_ONCE = """\
# accepts the first job: runs its script here, as a node would, and stops it once its
# worker has registered with the scheduler; refuses every later job
records={records}
if [ ! -e "$records/accepted" ]; then
  touch "$records/accepted"
  cp "$1" "$records/job.sh"          # sbatch reads the script when it is submitted
  setsid bash "$records/job.sh" > "$records/worker.log" 2>&1 < /dev/null &
  worker=$!
  ( for _ in $(seq 600); do
      grep -q "Registered to" "$records/worker.log" && break
      sleep 0.2
    done
    kill -TERM -- "-$worker" ) > /dev/null 2>&1 < /dev/null &
  echo "Submitted batch job 4242"
  exit 0
fi
echo "sbatch: error: QOSMaxSubmitJobPerUserLimit" >&2
exit 1
"""


@pytest.mark.slow
def test_a_refused_replacement_job_ends_the_run(tmp_path: Path) -> None:
    """A worker job ends mid-run; the job submitted in its place is refused: the run ends
    with the message instead of waiting for workers that never come."""
    bin_directory, environment = site(tmp_path)
    records = tmp_path / "records"
    records.mkdir()
    stand_in(bin_directory, "sbatch", ACCEPT_ONCE.format(records=shlex.quote(str(records))))
    stand_in(bin_directory, "scancel", "exit 0\n")
    (tmp_path / "testtown.toml").write_text(
        (tmp_path / "testtown.toml").read_text().replace("days = 5", "days = 300"))
    done = subprocess.run(ensemble_command("run", "testtown.toml", "--cluster", "site",
                                           "--backend", "numpy", "--members", "200",
                                           "--chunk", "2"),
                          cwd=tmp_path, env=environment, capture_output=True, text=True,
                          timeout=300)
    assert "Registered to" in (records / "worker.log").read_text()
    assert done.returncode == 1, done.stderr
    assert ("the batch system refused a worker job: sbatch exited with status 1: "
            "sbatch: error: QOSMaxSubmitJobPerUserLimit") in done.stderr


def test_worker_script_is_printed_without_submitting(tmp_path: Path) -> None:
    bin_directory, environment = site(tmp_path)
    (tmp_path / "configs" / "site.toml").write_text(
        PROFILE.format(system="slurm") + 'interface = "ib0"\nsetup = ["source env/bin/activate"]\n')
    stand_in(bin_directory, "sbatch", f"touch {shlex.quote(str(tmp_path))}/submitted\n")
    done = subprocess.run(ensemble_command("worker-script", "--cluster", "site"),
                          cwd=tmp_path, env=environment, capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 0, done.stderr
    lines = done.stdout.splitlines()
    assert lines[0] == "#!/usr/bin/env bash"
    for expected in ("#SBATCH -J ensemble-site", "#SBATCH -p short", "#SBATCH --mem=1G",
                     "#SBATCH -t 01:00:00", "source env/bin/activate",
                     "# Python: python3 from the PATH the setup lines above make"):
        assert expected in lines, expected
    worker = lines[-1]
    assert worker.startswith("python3 -m distributed.cli.dask_worker "
                             "tcp://SCHEDULER-ADDRESS:8786 ")
    assert "--interface ib0" in worker and "--no-dashboard" in worker
    assert not (tmp_path / "submitted").exists()


def test_worker_script_needs_a_batch_profile(tmp_path: Path) -> None:
    done = run_cli("worker-script", "--cluster", "local", cwd=tmp_path)
    assert done.returncode == 2 and "batch-system profile" in done.stderr


def test_a_profile_name_reaches_the_job_name_as_a_safe_word(tmp_path: Path) -> None:
    """The job name goes into a header directive, which cannot be quoted."""
    profile = tmp_path / "my site $(touch pwned).toml"
    profile.write_text(PROFILE.format(system="pbs"))
    done = run_cli("worker-script", "--cluster", profile, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "#PBS -N ensemble-my_site___touch_pwned_" in done.stdout.splitlines()
