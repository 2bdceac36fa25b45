"""Helpers shared by the tests: scenario files written and loaded, compiled and designed;
hand-made chunk results; the ``ensemble`` command line; and result files compared bit for
bit.

Every scenario setting here is invented and illustrative.
"""

from __future__ import annotations

import dataclasses
import os
import re
import subprocess
import sys
import textwrap
import time
from collections import defaultdict
from pathlib import Path

import numpy as np
import xarray as xr
from typer.testing import CliRunner

from ensemble.cli import app
from ensemble.examples import seir_text
from ensemble.integrate.chunk import integrate_chunk
from ensemble.methods import METHODS
from ensemble.integrate.reference import Trajectory, integrate_fixed
from ensemble.model.lower import LoweredModel, lower_model
from ensemble.output.layout import ResultLayout
from ensemble.run.layout import lowered_models, result_layout
from ensemble.records import INVALID_START, NON_FINITE, STEP_CHECK_FAILED, ChunkResult
from ensemble.sampling import Design, make_design
from ensemble.scenario.load import load_scenario
from ensemble.scenario.schema import Scenario

REPO = Path(__file__).resolve().parent.parent

IMPLICIT = tuple(name for name, method in METHODS.items() if method.implicit)
"""The methods of the registry that solve for the end of each step (theta methods)."""


def load_text(directory: Path, text: str, name: str = "scenario",
              **overrides: object) -> Scenario:
    """Write ``text`` (dedented, UTF-8) to ``directory / f"{name}.toml"`` and load it with
    ``overrides`` (as the command line's)."""
    path = directory / f"{name}.toml"
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return load_scenario(path, **overrides)


# ------------------------------------------------------------------ model tests

HEADER = """
[scenario]
name = "model-test"
days = 10
"""

SEIR = """
[model]
compartments = ["S", "E", "I", "R"]
population = 10000
initial = { S = "rest", I = 10 }

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "beta * S * I / N"

[[model.flows]]
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
from = "I"
to = "R"
rate = "I / infectious_days"

[parameters]
R0 = { dist = "uniform", low = 1.2, high = 2.0 }
latent_days = 3.0
infectious_days = { dist = "gamma", mean = 5.0, sd = 1.0 }
beta = "R0 / infectious_days"
"""

AGE_SEIR = """
[model]
compartments = ["S", "E", "I", "R", "D"]
groups = ["child", "adult", "senior", "elder"]
population = [2000, 5000, 1500, 500]
initial = { S = "rest", I = [1, 2, 1, 0] }
exclude_from_N = ["D"]

[model.matrices]
contacts = [[8.0, 3.0, 1.0, 0.0],
            [3.0, 6.0, 2.0, 0.5],
            [1.0, 2.0, 3.0, 1.0],
            [0.0, 0.5, 1.0, 2.0]]

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "beta * susceptibility * S * (contacts @ (I / N))"

[[model.flows]]
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
from = "I"
to = "R"
rate = "I * (1 - fatality) / infectious_days"

[[model.flows]]
from = "I"
to = "D"
rate = "I * fatality / infectious_days"

[parameters]
beta = { dist = "uniform", low = 0.02, high = 0.05 }
susceptibility = [0.6, 1.0, 1.0, 0.9]
fatality = { dist = "beta", mean = 0.01, sd = 0.004, per_group = true }
latent_days = 3.0
infectious_days = 5.0
"""

NONLINEAR = """
[model]
compartments = ["S", "I", "R"]
population = 1000
initial = { S = "rest", I = 5 }

[[model.flows]]
name = "infection"
from = "S"
to = "I"
rate = "beta * S ** 0.9 * I ** alpha / N + sqrt(S * I) * abs(I - R) / 1000 + exp(-I / 100) * log(1 + S)"

[[model.flows]]
name = "recovery"
from = "I"
to = "R"
rate = "min(I, capacity) * gamma + max(I - capacity, R / 10) * 0.01 + I ** (R / N) + 1.5 ** (I / 200)"

[[model.flows]]
name = "waning"
from = "R"
to = "S"
rate = "R * omega * (1 + sin(2 * pi * t / 365) * cos(R / 500) + 0.5 * sin(R / 300))"

[parameters]
beta = 0.4
alpha = 1.1
gamma = 0.2
capacity = 200
omega = 0.01
"""

VITAL = """
[model]
compartments = ["S", "E", "I", "R"]
population = 50000
initial = { S = "rest", I = 20 }

[[model.flows]]
name = "births"
to = "S"
rate = "birth_rate * N"

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "beta * seasonal * S * I / N"

[[model.flows]]
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
from = "I"
to = "R"
rate = "I / infectious_days"

[[model.flows]]
from = "R"
to = "S"
rate = "R / immunity_days"

[[model.flows]]
name = "deaths_S"
from = "S"
rate = "death_rate * S"

[[model.flows]]
name = "deaths_E"
from = "E"
rate = "death_rate * E"

[[model.flows]]
name = "deaths_I"
from = "I"
rate = "(death_rate + disease_death) * I"

[[model.flows]]
name = "deaths_R"
from = "R"
rate = "death_rate * R"

[parameters]
beta = 0.5
amplitude = { dist = "uniform", low = 0.1, high = 0.3 }
seasonal = "1 + amplitude * cos(2 * pi * t / 365)"
latent_days = 2.0
infectious_days = 5.0
immunity_days = 300.0
birth_rate = 0.00004
death_rate = 0.00004
disease_death = 0.001
"""


def load(tmp_path: Path, body: str) -> Scenario:
    """The scenario of ``HEADER + body``, written to ``tmp_path`` and loaded."""
    return load_text(tmp_path, HEADER + body)


def compiled(tmp_path: Path, body: str, variant: int = 0) -> LoweredModel:
    """The compiled model of ``HEADER + body`` for its ``variant``-th variant."""
    scenario = load(tmp_path, body)
    return lower_model(scenario, scenario.variants[variant])


def random_inputs(model: LoweredModel, members: int, seed: int = 1):
    """Positive random states (persons), parameters and schedule values for ``members``."""
    rng = np.random.default_rng(seed)
    population = np.repeat(model.population[None, :], len(model.compartments), axis=0)
    y = rng.uniform(0.05, 0.5, size=(model.n_states, members)) * population.reshape(-1, 1)
    p = rng.uniform(0.05, 1.0, size=(len(model.parameter_slots), members))
    s = rng.uniform(0.5, 1.5, size=(len(model.schedule_slots), members))
    return y, p, s


# ------------------------------------------------------------ integration tests


@dataclasses.dataclass(frozen=True)
class Case:
    """A loaded scenario with its first variant compiled and every member designed."""

    scenario: Scenario
    model: LoweredModel
    design: Design

    def row(self, label: str, kind: str = "state") -> int:
        """Index of a state label (``"I"``, ``"I[old]"``) or parameter slot name."""
        labels = self.model.state_labels if kind == "state" else self.model.parameter_slots
        return labels.index(label)

    def with_parameter(self, name: str, values) -> "Case":
        """The same case with parameter slot ``name`` set to ``values`` per member."""
        parameters = self.design.parameters.copy()
        parameters[self.row(name, "parameter")] = values
        return dataclasses.replace(self, design=dataclasses.replace(self.design,
                                                                    parameters=parameters))

    def run(self, method: str, step: float | None = None,
            steps_per_report: int | None = None, n_reports: int | None = None) -> Trajectory:
        """integrate_fixed (defaults from the scenario's horizon and [solver])."""
        solver = self.scenario.solver
        return integrate_fixed(self.model, self.design, METHODS[method],
                               float(solver.step) if step is None else step,
                               solver.steps_per_report if steps_per_report is None
                               else steps_per_report,
                               self.scenario.n_reports if n_reports is None else n_reports,
                               solver.newton, solver.check.atol)

    def chunk(self, method: str, **check: object) -> ChunkResult:
        """integrate_chunk with the scenario's solver, ``method`` and ``check`` overrides."""
        solver = self.scenario.solver
        solver = dataclasses.replace(solver, method=method,
                                     check=dataclasses.replace(solver.check, **check))
        return integrate_chunk(self.model, self.design, solver, self.scenario.n_reports)

    def times(self) -> np.ndarray:
        """Reported times, days."""
        return np.array([float(t) for t in self.scenario.report_times()])


def one_compartment(*, name: str, rate: str, k: float, days: float, step: float,
                    report_every: float, solver_extra: str = "") -> str:
    """Scenario text of one compartment X of 1,000 persons lost at ``rate`` (in X and the
    parameter k), a single member: the test models with a known solution."""
    return f"""
[scenario]
name = "{name}"
days = {days}
members = 1

[model]
compartments = ["X"]
population = 1000
initial = {{ X = "rest" }}

[[model.flows]]
name = "loss"
from = "X"
rate = "{rate}"

[parameters]
k = {k}

[solver]
step = {step}
report_every = {report_every}
{solver_extra}
"""


def model_and_design(scenario: Scenario, variant: int = 0) -> tuple[LoweredModel, Design]:
    """The compiled model of ``scenario``'s ``variant``-th variant and the design of all
    its members."""
    chosen = scenario.variants[variant]
    model = lower_model(scenario, chosen)
    return model, make_design(scenario, chosen, model, np.arange(scenario.member_count))


def integrate_members(scenario: Scenario, backend: str = "numpy"
                      ) -> tuple[LoweredModel, ChunkResult]:
    """The compiled first variant of ``scenario`` and every member integrated in one chunk
    with the scenario's solver."""
    model, design = model_and_design(scenario)
    return model, integrate_chunk(model, design, scenario.solver, scenario.n_reports, backend)


def load_case(tmp_path: Path, toml: str, name: str = "case") -> Case:
    """Write ``toml`` to ``tmp_path`` and load, compile and design all its members."""
    scenario = load_text(tmp_path, toml, name)
    return Case(scenario, *model_and_design(scenario))


def subset(design: Design, members: np.ndarray) -> Design:
    """The design of some of the members (positions into ``design``), in the given order."""
    members = np.asarray(members)
    return dataclasses.replace(
        design,
        member_index=design.member_index[members],
        parameters=design.parameters[:, members],
        schedule_values=tuple(v[:, members] for v in design.schedule_values),
        initial=design.initial[:, members],
        invalid_start=design.invalid_start[members],
        reported={k: v[..., members] for k, v in design.reported.items()},
        basic_reproduction_number=design.basic_reproduction_number[members],
    )


# ----------------------------------------------------------------- output tests

GROUPED_TOML = """\
# Illustrative only: an invented village (a coined name) of two age groups.
[scenario]
name = "two-groups"
title = "Vemmaroth (invented village): two-group SIR"
{start}
days = 12
members = {members}
seed = 5

[model]
compartments = ["S", "I", "R"]
groups = ["young", "old"]
population = [600, 400]
initial = {{ S = "rest", I = [3, 1] }}

[model.matrices]
contacts = [[3.0, 1.0], [1.0, 2.0]]

[[model.flows]]
name = "infection"
from = "S"
to = "I"
rate = "transmissibility * susceptibility * S * (contacts @ (I / N))"

[[model.flows]]
name = "recovery"
from = "I"
to = "R"
rate = "I / infectious_days"

[parameters]
transmissibility = {{ dist = "uniform", low = 0.05, high = 0.12, units = "1", description = "chance of infection per contact" }}
susceptibility = {{ dist = "uniform", low = 0.6, high = 1.0, per_group = true }}
infectious_days = {{ dist = "gamma", mean = 4.0, sd = 1.0, units = "day" }}

[[variants]]
name = "usual"

[[variants]]
name = "fewer-contacts"
matrices = {{ contacts = [[2.0, 0.5], [0.5, 1.5]] }}

[solver]
method = "heun"
step = 0.5
report_every = 1

[output]
quantiles = [0.05, 0.25, 0.5, 0.75, 0.95]
compare_to = "usual"
keep_members = {keep_members}
compression = {compression}
"""


def grouped_scenario(directory: Path, *, members: int = 6, start: bool = True,
                     keep_members: bool = True, compression: int = 4) -> Scenario:
    """The two-group SIR scenario, written into ``directory`` and loaded."""
    return load_text(directory, GROUPED_TOML.format(
        start="start = 2027-02-01" if start else "", members=members,
        keep_members=str(keep_members).lower(), compression=compression), "two-groups")


def layout_of(scenario: Scenario, fingerprint: str = "f" * 64) -> ResultLayout:
    """The result layout of ``scenario`` (lowered for real: labels come from the model)."""
    return result_layout(scenario, lowered_models(scenario), fingerprint, "test history")


def made_up_members(layout: ResultLayout, variant: int, first: int, end: int
                    ) -> tuple[ChunkResult, dict[str, np.ndarray]]:
    """A chunk of hand-made members: each state row a triangle whose apex (value
    ``100 + 10 * member + row + variant``) sits at report ``(member + row) % n_reports``
    and repeats at the last report when the apex is earlier (so "first time of the max"
    is tested); flows constant ``member + 1 + row / 10`` per interval with NaN first.
    Member 1 gets the non-finite bit, member 2 the invalid-start bit, member 3 the step
    check bit (which does not exclude it from the quantiles).
    """
    members = np.arange(first, end)
    n_reports = layout.n_reports
    reports = np.arange(n_reports)
    state = np.empty((members.size, layout.n_states, n_reports))
    for i, member in enumerate(members):
        for row in range(layout.n_states):
            apex = (member + row) % n_reports
            top = 100.0 + 10 * member + row + variant
            state[i, row] = top - np.abs(reports - apex)
            if apex < n_reports - 1:
                state[i, row, -1] = top
    flow = np.empty((members.size, layout.n_flow_elements, n_reports))
    flow[:] = (members[:, None, None] + 1 + np.arange(layout.n_flow_elements)[None, :, None]
               / 10 + 0.0 * reports)
    flow[:, :, 0] = np.nan
    status = np.zeros(members.size, dtype=np.uint8)
    status[members == 1] = NON_FINITE
    status[members == 2] = INVALID_START
    status[members == 3] = STEP_CHECK_FAILED
    result = ChunkResult(members=members.astype(np.int64), state=state, flow_count=flow,
                         step_error=members / 10.0, observed_order=np.full(members.size, 2.0),
                         basic_reproduction_number=1.5 + members / 100.0, status=status)
    reported = {}
    for name, info in layout.parameters.items():
        base = 0.5 * members + variant
        reported[name] = (np.vstack([base + g for g in range(layout.n_groups)])
                          if info.shape == "vector" else base)
    return result, reported


def fill(store, layout: ResultLayout, chunk: int) -> None:
    """Save made-up members of every variant into ``store`` in chunks of ``chunk``."""
    for variant in range(len(layout.variants)):
        for first in range(0, layout.member_count, chunk):
            end = min(first + chunk, layout.member_count)
            store.save((variant, first, end), *made_up_members(layout, variant, first, end))


# ------------------------------------------------------------ run and cluster tests


def write_scenario(directory: Path, *, members: int = 40, days: int = 30,
                   method: str = "rk4", step: float = 0.25, output: str = "result.nc",
                   keep_members: bool = True) -> Path:
    """Write the illustrative SEIR town of :func:`ensemble.examples.seir_text`, with its
    ``no-change`` and ``distancing`` variants, into ``directory`` and return its path."""
    path = directory / "testtown.toml"
    path.write_text(seir_text(members=members, days=days, method=method, step=step,
                              output=output, distancing=True, name="testtown",
                              keep_members=keep_members,
                              title="Illustrative town, invented numbers"))
    return path


def saved_chunks(work: Path) -> list[Path]:
    """The chunk directories saved so far in a run's ``<result>.partial`` directory (each
    renamed into place only when complete)."""
    return sorted(work.glob("chunk-*")) if work.is_dir() else []


def wait_for_saved_chunks(process: subprocess.Popen, work: Path, count: int) -> None:
    """Barrier: return once the running ``ensemble run`` ``process`` has saved ``count``
    chunks in ``work``; fail if it ends first.  (A run that hangs is stopped by the
    suite's per-test timeout.)"""
    while len(saved_chunks(work)) < count:
        if process.poll() is not None:
            raise AssertionError(f"the run ended with {len(saved_chunks(work))} chunks "
                                 f"saved; stderr: {process.stderr.read()}")
        time.sleep(0.01)


def ensemble_command(*arguments: str | os.PathLike[str]) -> list[str]:
    """The command line of the ``ensemble`` program with ``arguments``."""
    return [sys.executable, "-c", "from ensemble.cli import main; main()",
            *map(os.fspath, arguments)]


def run_cli(*arguments: str | os.PathLike[str], cwd: Path,
            timeout: float = 120) -> subprocess.CompletedProcess:
    """Run ``ensemble`` with ``arguments`` in ``cwd`` and wait for it."""
    return subprocess.run(ensemble_command(*arguments), cwd=cwd, capture_output=True,
                          text=True, timeout=timeout)


@dataclasses.dataclass(frozen=True)
class CompletedCommand:
    """Exit status and output of a command line run in this process."""

    returncode: int
    stdout: str
    stderr: str


def invoke_cli(*arguments: str | os.PathLike[str], cwd: Path) -> CompletedCommand:
    """Run the ``ensemble`` command line in this process (faster than a new interpreter
    for checks of exit status and messages), in directory ``cwd``."""
    previous = Path.cwd()
    os.chdir(cwd)
    try:
        outcome = CliRunner().invoke(app, [os.fspath(a) for a in arguments])
    finally:
        os.chdir(previous)
    return CompletedCommand(outcome.exit_code, outcome.stdout, outcome.stderr)


NUMERIC_VARIABLES = ("state", "flow_count", "state_quantile", "flow_count_quantile",
                     "step_error", "observed_order", "status", "peak_value", "peak_time",
                     "total_flow", "param_R0", "param_beta")
"""Variables compared bit for bit between two runs of the same scenario."""


def assert_same_values(name: str, left: np.ndarray, right: np.ndarray, first: Path,
                       second: Path) -> None:
    """Variable ``name`` has the same shape and dtype in two result files and, if numeric,
    the same bytes (so NaN matches NaN and -0.0 differs from 0.0); otherwise equal values."""
    assert left.shape == right.shape, name
    assert left.dtype == right.dtype, name
    if left.dtype.kind in "fiub":
        assert left.tobytes() == right.tobytes(), (
            f"{name} differs between {first.name} and {second.name}")
    else:
        assert np.array_equal(left, right), name


def assert_same_numbers(first: Path, second: Path) -> None:
    """Every variable of :data:`NUMERIC_VARIABLES` that either result file has is
    identical bit for bit in both."""
    with xr.open_dataset(first, decode_times=False) as a, \
            xr.open_dataset(second, decode_times=False) as b:
        for name in NUMERIC_VARIABLES:
            if name not in a.variables and name not in b.variables:
                continue
            assert_same_values(name, a[name].values, b[name].values, first, second)


def assert_identical_numbers(first: Path, second: Path) -> None:
    """Every variable of two result files -- data and coordinates -- is identical (see
    :func:`assert_same_values`), and so are the run's identifying attributes."""
    with xr.open_dataset(first, decode_times=False) as a, \
            xr.open_dataset(second, decode_times=False) as b:
        assert sorted(a.variables) == sorted(b.variables)
        compared = 0
        for name in a.variables:
            assert_same_values(name, a[name].values, b[name].values, first, second)
            compared += a[name].dtype.kind in "fiub"
        assert compared > 10  # the trajectories, quantiles and metrics were all there
        for attribute in ("fingerprint", "members", "seed", "scenario"):
            assert str(a.attrs[attribute]) == str(b.attrs[attribute]), attribute


# ------------------------------------------------------------ the project's documents


@dataclasses.dataclass(frozen=True)
class MarkdownTables:
    """The tables of a Markdown document: heading name -> first header cell -> rows.

    A heading's name is the first text in backticks in it (``[solver.check]``,
    ``ensemble run SCENARIO``), or its whole text when it has none (``Functions``); a
    row is the list of its cells, stripped."""

    tables: dict[str, dict[str, list[list[str]]]]

    def rows(self, heading: str, header: str) -> list[list[str]]:
        return self.tables.get(heading, {}).get(header, [])

    def names(self, heading: str, header: str) -> list[str]:
        """The texts in backticks in the first cell of each row of a table."""
        return [name for row in self.rows(heading, header) for name in ticked(row[0])]

    def headings(self) -> set[str]:
        return set(self.tables)


def ticked(cell: str) -> list[str]:
    """The texts in backticks in a cell of a Markdown table."""
    return re.findall(r"`([^`]+)`", cell)


def markdown_tables(text: str) -> MarkdownTables:
    """The tables of a Markdown text, by heading and first header cell."""
    tables: dict[str, dict[str, list[list[str]]]] = defaultdict(lambda: defaultdict(list))
    heading, header = "", None
    for line in text.splitlines():
        if line.startswith("#"):
            title = line.lstrip("#").strip()
            heading = (ticked(title) or [title])[0]
            header = None
        elif line.startswith("|"):
            cells = [cell.strip()    # an escaped \| is part of its cell
                     for cell in re.split(r"(?<!\\)\|", line.strip().strip("|"))]
            if header is None:
                header = cells[0]
            elif not set(line) <= set("|-: "):
                tables[heading][header].append(cells)
        else:
            header = None
    return MarkdownTables(tables)
