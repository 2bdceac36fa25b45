"""Bad input and failures end in one clear line, never a traceback (the README's
"Commands": exit status 1 for a failed run with finished work kept, 2 for invalid input
or usage, nothing written).

Damaged files are made here by hand from real results of the illustrative SEIR town of
``support.write_scenario`` (invented numbers): cut short, bytes flipped, variables or
attributes removed or changed.  A failing chunk or a full disk is a stand-in failure put
into the real code (a patched function), since neither happens on demand.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import textwrap
from pathlib import Path
from types import SimpleNamespace

import netCDF4
import numpy as np
import pytest
import xarray as xr
from typer.testing import CliRunner

from ensemble import api
from ensemble.cli import app
from ensemble.output import writer
from ensemble.run import tasks
from support import ensemble_command, run_cli, write_scenario


def one_error_line(stderr: str) -> str:
    """The single ``error:`` line of a command's standard error (warnings and notes of
    the run aside), which must hold no traceback."""
    assert "Traceback" not in stderr and "Compute Failed" not in stderr, stderr
    errors = [line for line in stderr.splitlines() if line.startswith("error: ")]
    others = [line for line in stderr.splitlines()
              if not line.startswith(("error: ", "warning: ", "ensemble: ", "note: "))]
    assert len(errors) == 1 and not others, stderr
    return errors[0]


def cut_short(path: Path) -> None:
    data = path.read_bytes()
    path.write_bytes(data[:len(data) // 2])


def flip_bytes(path: Path) -> None:
    data = bytearray(path.read_bytes())
    middle = len(data) // 3
    data[middle:middle + 4000] = bytes(b ^ 0xFF for b in data[middle:middle + 4000])
    path.write_bytes(bytes(data))


def test_check_refuses_an_endless_file(tmp_path: Path) -> None:
    done = run_cli("check", "/dev/zero", cwd=tmp_path)
    assert done.returncode == 2
    assert "/dev/zero: larger than 4 MiB" in one_error_line(done.stderr)


@pytest.fixture(scope="module")
def result(tmp_path_factory: pytest.TempPathFactory) -> Path:
    directory = tmp_path_factory.mktemp("result")
    scenario = write_scenario(directory, members=8)
    return api.run(scenario, output=directory / "result.nc", workers=0, backend="numpy",
                   progress=False)


def rewritten(source: Path, target: Path, change) -> None:
    """``source`` rewritten by xarray into ``target`` after ``change(dataset)``."""
    with xr.open_dataset(source, decode_times=False) as dataset:
        change(dataset.load()).to_netcdf(target)


def flipped_copy(source: Path, target: Path) -> None:
    shutil.copyfile(source, target)
    target.chmod(0o644)
    flip_bytes(target)


@pytest.mark.parametrize("doctor", [
    flipped_copy,
    lambda source, target: rewritten(source, target,
                                     lambda d: d.drop_vars("peak_value_quantile")),
    lambda source, target: rewritten(source, target,
                                     lambda d: d.rename({"quantile": "probability"})),
    lambda source, target: rewritten(source, target, lambda d: d.assign(
        members_in_summary=d.members_in_summary * np.nan)),
], ids=["flipped-bytes", "variable-removed", "dimension-renamed", "count-not-a-number"])
def test_summary_of_a_doctored_file_is_one_line(result: Path, tmp_path: Path,
                                                doctor) -> None:
    doctored = tmp_path / "doctored.nc"
    doctor(result, doctored)
    done = run_cli("summary", doctored, cwd=tmp_path)
    assert done.returncode == 2
    assert "doctored.nc" in one_error_line(done.stderr)


@pytest.fixture(scope="module")
def parts(tmp_path_factory: pytest.TempPathFactory) -> list[Path]:
    directory = tmp_path_factory.mktemp("parts")
    scenario = write_scenario(directory, members=6)
    return [api.run(scenario, output=directory / f"part{i}.nc", shard=f"{i}/2", workers=0,
                    backend="numpy", progress=False) for i in range(2)]


def set_scenario(path: Path, text: str | None) -> None:
    with netCDF4.Dataset(path, "a") as nc:
        if text is None:
            nc.delncattr("scenario")
        else:
            nc.scenario = text


@pytest.mark.parametrize("doctor", [
    cut_short, flip_bytes, lambda path: set_scenario(path, "this is [not toml"),
    lambda path: set_scenario(path, None),
], ids=["cut-short", "flipped-bytes", "scenario-not-toml", "scenario-missing"])
def test_merge_of_a_damaged_part_is_one_line(parts: list[Path], tmp_path: Path,
                                             doctor) -> None:
    damaged = tmp_path / "damaged.nc"
    shutil.copyfile(parts[1], damaged)
    damaged.chmod(0o644)
    doctor(damaged)
    done = run_cli("merge", parts[0], damaged, "-o", "merged.nc", cwd=tmp_path)
    assert done.returncode == 2
    assert "damaged.nc" in one_error_line(done.stderr)
    assert not (tmp_path / "merged.nc").exists()


def test_a_profile_memory_beyond_floats_is_one_line(tmp_path: Path) -> None:
    profile = tmp_path / "huge.toml"
    profile.write_text(textwrap.dedent("""
        [cluster]
        system = "slurm"
        queue = "compute"
        walltime = "01:00:00"
        cores = 2
        memory = "1e400GB"
        jobs = 1
    """))
    scenario = write_scenario(tmp_path, members=4)
    done = run_cli("array-script", scenario, "--cluster", profile, "--shards", "2",
                   cwd=tmp_path)
    assert done.returncode == 2
    assert "cluster.memory" in one_error_line(done.stderr)


FAILING_CHUNK = '''
import ensemble.run.tasks as tasks

original = tasks.make_design


def failing_make_design(scenario, variant, model, members):
    if {member} in members:
        raise FloatingPointError("an illustrative failure")
    return original(scenario, variant, model, members)


tasks.make_design = failing_make_design
'''
"""A ``sitecustomize`` module that makes the chunk holding one member fail, in the
program and in every worker process it starts (each Python process imports it)."""


@pytest.mark.parametrize("options", [("--workers", "2"), ("--workers", "2", "--processes")],
                         ids=["threads", "processes"])
def test_a_failed_chunk_is_one_line_without_the_workers_log(tmp_path: Path,
                                                            options: tuple[str, ...]) -> None:
    """dask's worker prints a block for a failed task; the run reports it once."""
    site = tmp_path / "site"
    site.mkdir()
    (site / "sitecustomize.py").write_text(FAILING_CHUNK.format(member=5))
    scenario = write_scenario(tmp_path, members=8)
    done = subprocess.run(
        ensemble_command("run", scenario, "--chunk", "2", "--backend", "numpy", *options),
        cwd=tmp_path, capture_output=True, text=True, timeout=300,
        env={**os.environ, "PYTHONPATH": str(site)})
    assert done.returncode == 1
    line = one_error_line(done.stderr)
    assert "members 4..5 of variant" in line and "an illustrative failure" in line


def test_resume_is_promised_only_when_chunks_were_kept(tmp_path: Path,
                                                       monkeypatch: pytest.MonkeyPatch
                                                       ) -> None:
    """The first chunk failing leaves nothing to resume and says nothing of it; a later
    one says how many finished chunks wait."""
    monkeypatch.chdir(tmp_path)
    original = tasks.make_design
    scenario = write_scenario(tmp_path, members=8)
    for member, promised in ((0, None), (5, "(2 finished chunks are kept in result.nc"
                                            ".partial; continue with --resume)")):
        def failing(scenario, variant, model, members, member=member):
            if member in members:
                raise FloatingPointError("an illustrative failure")
            return original(scenario, variant, model, members)

        monkeypatch.setattr(tasks, "make_design", failing)
        done = CliRunner().invoke(app, ["run", str(scenario), "--workers", "0", "--chunk",
                                        "2", "--backend", "numpy", "--force"])
        assert done.exit_code == 1
        line = one_error_line(done.stderr)
        if promised is None:
            assert "--resume" not in line and "kept" not in line
        else:
            assert line.endswith(promised)
        shutil.rmtree(tmp_path / "result.nc.partial")


def test_a_full_disk_says_so(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The netCDF library reports a full disk as "NetCDF: HDF error"; with (almost) no
    space left the message says "No space left on device", the system's words."""
    monkeypatch.chdir(tmp_path)
    scenario = write_scenario(tmp_path, members=4)

    def disk_full(target, finisher):
        raise RuntimeError("NetCDF: HDF error")

    usage = type(shutil.disk_usage(tmp_path))(10 ** 9, 10 ** 9, 0)
    monkeypatch.setattr(writer, "_write_file", disk_full)
    monkeypatch.setattr(writer, "shutil", SimpleNamespace(disk_usage=lambda path: usage))
    done = CliRunner().invoke(app, ["run", str(scenario), "--workers", "0", "--chunk", "1",
                                    "--backend", "numpy"])
    assert done.exit_code == 1
    line = one_error_line(done.stderr)
    assert "cannot write result.nc: No space left on device" in line
    assert line.endswith("(8 finished chunks are kept in result.nc.partial; continue with "
                         "--resume)")
