"""Small scenario files and helpers shared by the run-layer tests (tests/test_run_*.py).

The settings are invented and illustrative: a town of 10,000 and an SEIR model with two
variants, small enough that a run takes a second.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import xarray as xr

SEIR_TOML = """\
[scenario]
name = "testtown"
title = "Illustrative town, invented numbers"
days = {days}
members = {members}
seed = 11

[model]
compartments = ["S", "E", "I", "R"]
population = 10000
initial = {{ S = "rest", E = 10, I = "seed_infectious" }}

[[model.flows]]
from = "S"
to = "E"
rate = "beta * contact_scale * S * I / N"

[[model.flows]]
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
from = "I"
to = "R"
rate = "I / infectious_days"

[parameters]
R0 = {{ dist = "uniform", low = 1.3, high = 2.5 }}
latent_days = {{ dist = "gamma", mean = 3.0, sd = 0.8 }}
infectious_days = {{ dist = "lognormal", mean = 5.0, sd = 1.2 }}
seed_infectious = {{ dist = "uniform", low = 2, high = 20 }}
beta = "R0 / infectious_days"
contact_scale = 1.0

[sampling]
method = "latin-hypercube"

[[variants]]
name = "no-change"

[[variants]]
name = "distancing"
parameters = {{ contact_scale = {{ schedule = [[0, 1.0], [10, 0.6]], between = "step" }} }}

[solver]
method = "{method}"
step = 0.25

[output]
path = "{output}"
"""

NUMERIC_VARIABLES = ("state", "flow_count", "state_quantile", "flow_count_quantile",
                     "step_error", "observed_order", "status", "peak_value", "peak_time",
                     "total_flow", "param_R0", "param_beta")
"""Variables compared bit for bit between two runs of the same scenario."""


def write_scenario(directory: Path, *, members: int = 40, days: int = 30,
                   method: str = "rk4", output: str = "result.nc") -> Path:
    """Write the illustrative SEIR scenario into ``directory`` and return its path."""
    path = directory / "testtown.toml"
    path.write_text(SEIR_TOML.format(members=members, days=days, method=method,
                                     output=output))
    return path


def ensemble_command(*arguments: str | os.PathLike[str]) -> list[str]:
    """The command line of the ``ensemble`` program with ``arguments``."""
    return [sys.executable, "-c", "from ensemble.cli import main; main()",
            *map(os.fspath, arguments)]


def run_cli(*arguments: str | os.PathLike[str], cwd: Path,
            timeout: float = 120) -> subprocess.CompletedProcess:
    """Run ``ensemble`` with ``arguments`` in ``cwd`` and wait for it."""
    return subprocess.run(ensemble_command(*arguments), cwd=cwd, capture_output=True,
                          text=True, timeout=timeout)


def assert_same_numbers(first: Path, second: Path) -> None:
    """Every compared variable of two result files is identical bit for bit (NaN where
    the other has NaN)."""
    with xr.open_dataset(first, decode_times=False) as a, \
            xr.open_dataset(second, decode_times=False) as b:
        for name in NUMERIC_VARIABLES:
            if name not in a.variables and name not in b.variables:
                continue
            left, right = a[name].values, b[name].values
            assert left.shape == right.shape, name
            assert left.dtype == right.dtype, name
            assert np.array_equal(left.view(np.uint8), right.view(np.uint8)), (
                f"{name} differs between {first.name} and {second.name}")
