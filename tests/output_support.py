"""Scenarios and hand-made chunk results shared by the output-layer tests
(tests/test_output_*.py).

Every setting is invented and illustrative.  The hand-made trajectories have known peaks,
peak times and totals, so the store's arithmetic is checked against values worked out by
hand, independently of the integrators.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ensemble.integrate.check import INVALID_START, NON_FINITE, STEP_CHECK_FAILED, ChunkResult
from ensemble.model.compile import compile_model
from ensemble.output.layout import ResultLayout
from ensemble.scenario.load import load_scenario
from ensemble.scenario.schema import Scenario

GROUPED_TOML = """\
# Illustrative only: an invented village of two age groups.
[scenario]
name = "two-groups"
title = "Hollow Ford (invented): two-group SIR"
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
members = {keep_members}
compression = {compression}
"""


def grouped_scenario(directory: Path, *, members: int = 6, start: bool = True,
                     keep_members: bool = True, compression: int = 4) -> Scenario:
    """The two-group SIR scenario, written into ``directory`` and loaded."""
    path = directory / "two-groups.toml"
    path.write_text(GROUPED_TOML.format(
        start="start = 2027-02-01" if start else "", members=members,
        keep_members=str(keep_members).lower(), compression=compression))
    return load_scenario(path)


def layout_of(scenario: Scenario, fingerprint: str = "f" * 64) -> ResultLayout:
    """The result layout of ``scenario`` (compiled for real: labels come from compile)."""
    models = [compile_model(scenario, variant) for variant in scenario.variants]
    return ResultLayout.from_scenario(scenario, models, fingerprint, "test history")


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
                         status=status)
    reported = {}
    for name, info in layout.parameters.items():
        base = 0.5 * members + variant
        reported[name] = (np.vstack([base + g for g in range(layout.n_groups)])
                          if info.shape == "vector" else base)
    return result, reported


def fill(store, layout: ResultLayout, chunk: int) -> None:
    """Save made-up members of every variant into ``store`` in chunks of ``chunk``."""
    for variant in range(len(layout.variants)):
        for first in range(0, layout.members, chunk):
            end = min(first + chunk, layout.members)
            store.save((variant, first, end), *made_up_members(layout, variant, first, end))
