"""``ensemble fit`` on the run's engine: each round's likelihood and the projection of the
posterior computed by dask workers (threads, processes, or SLURM worker jobs through a
cluster profile) give the file the fit computed in this process gives, bit for bit; bad
engine options stop the command with exit status 2 before anything is written.

The in-process fit these are compared with is itself checked against a posterior
computed on a fine grid from scipy's ``solve_ivp`` by quadrature
(``tests/test_fit_run.py``); here the check is that the place of the work changes no bit
(the README's fit section: "the same file, bit for bit, wherever").
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
import xarray as xr

from ensemble import api
from support import REPO, assert_same_values, invoke_cli, run_cli
from test_fit_run import COUNTS, SCENARIO

PARTICLES = 60
"""Few particles: the test is of where the numbers are computed, not of the posterior."""

ARGUMENTS = dict(particles=PARTICLES, chunk=16, seed=11)
"""Four chunks of a round's 60 particles (the last one short), and two variants
projected."""


def assert_same_file(first: Path, second: Path) -> None:
    """Every variable of two fit results is identical bit for bit (NaN matching NaN),
    and so is every attribute but ``history``."""
    with xr.open_dataset(first, decode_times=False) as a, \
            xr.open_dataset(second, decode_times=False) as b:
        assert sorted(a.variables) == sorted(b.variables)
        for name in a.variables:
            assert_same_values(name, a[name].values, b[name].values, first, second)
        assert {k: str(v) for k, v in a.attrs.items() if k != "history"} == \
            {k: str(v) for k, v in b.attrs.items() if k != "history"}
        assert a.sizes["member"] == PARTICLES and a.sizes["fit_round"] >= 1


@pytest.fixture(scope="module")
def in_this_process(tmp_path_factory) -> Path:
    """The scenario of ``tests/test_fit_run.py`` (an invented town, invented counts) and
    its fit computed in this process, without dask (``workers=0``)."""
    directory = tmp_path_factory.mktemp("fit-engine")
    (directory / "cases.csv").write_text(COUNTS)
    (directory / "fitted.toml").write_text(SCENARIO)
    api.fit(directory / "fitted.toml", output=directory / "here.nc", workers=0,
            backend="compiled", **ARGUMENTS)
    return directory


@pytest.mark.parametrize("processes", [False, True], ids=["threads", "processes"])
def test_two_local_workers_give_the_file_of_this_process(in_this_process, tmp_path,
                                                          processes):
    target = tmp_path / "workers.nc"
    api.fit(in_this_process / "fitted.toml", output=target, workers=2,
            processes=processes, backend="compiled", **ARGUMENTS)
    assert_same_file(in_this_process / "here.nc", target)
    assert not (tmp_path / "workers.nc.fit-partial").exists()


def test_the_command_line_takes_the_engine_options_of_run(in_this_process, tmp_path):
    for name in ("cases.csv", "fitted.toml"):
        shutil.copy(in_this_process / name, tmp_path)
    done = run_cli("fit", "fitted.toml", "--particles", str(PARTICLES), "--chunk", "16",
                   "--seed", "11", "--workers", "1", "--dashboard", "-o", "one.nc",
                   cwd=tmp_path, timeout=300)
    assert done.returncode == 0, done.stderr
    assert "dask dashboard at http://127.0.0.1:" in done.stderr
    assert "round 1: temperature" in done.stdout
    assert_same_file(in_this_process / "here.nc", tmp_path / "one.nc")


@pytest.mark.parametrize("options, message", [
    (["--workers", "-1"], "--workers"),
    (["--cluster", "no-such-profile"], "no-such-profile"),
    (["--cluster", "testbed-slurm", "--address", "tcp://127.0.0.1:8786"],
     "--cluster and --address"),
    (["--dashboard-address", "not an address"], "not an address"),
])
def test_bad_engine_options_exit_2_and_write_nothing(in_this_process, tmp_path, options,
                                                     message):
    for name in ("cases.csv", "fitted.toml"):
        shutil.copy(in_this_process / name, tmp_path)
    (tmp_path / "configs").mkdir()
    shutil.copy(REPO / "configs" / "testbed-slurm.toml", tmp_path / "configs")
    done = invoke_cli("fit", "fitted.toml", "--particles", "20", "-o", "bad.nc", *options,
                      cwd=tmp_path)
    assert done.returncode == 2, (done.stdout, done.stderr)
    assert message in done.stderr
    assert sorted(path.name for path in tmp_path.iterdir()) == [
        "cases.csv", "configs", "fitted.toml"]


def _why_no_slurm() -> str | None:
    from test_cluster_slurm import why_no_slurm

    return why_no_slurm()


@pytest.mark.slurm
def test_a_fit_on_slurm_worker_jobs_gives_the_file_of_this_process(in_this_process,
                                                                   tmp_path):
    reason = _why_no_slurm()
    if reason is not None:
        pytest.skip(reason)
    for name in ("cases.csv", "fitted.toml"):
        shutil.copy(in_this_process / name, tmp_path)
    (tmp_path / "configs").mkdir()
    shutil.copy(REPO / "configs" / "testbed-slurm.toml", tmp_path / "configs")
    done = run_cli("fit", "fitted.toml", "--particles", str(PARTICLES), "--chunk", "16",
                   "--seed", "11", "--backend", "compiled", "--cluster", "testbed-slurm",
                   "-o", "slurm.nc", cwd=tmp_path, timeout=400)
    assert done.returncode == 0, done.stderr
    assert_same_file(in_this_process / "here.nc", tmp_path / "slurm.nc")
