"""Small scenarios for the integration tests: TOML text -> compiled model and design."""

from __future__ import annotations

import dataclasses
import textwrap
from pathlib import Path

import numpy as np

from ensemble.integrate.check import ChunkResult, integrate_chunk
from ensemble.integrate.methods import METHODS
from ensemble.integrate.stepper import Trajectory, integrate_fixed
from ensemble.model.compile import CompiledModel, compile_model
from ensemble.sampling import Design, make_design
from ensemble.scenario.load import load_scenario
from ensemble.scenario.schema import Scenario

IMPLICIT = ("backward-euler", "trapezoid")


@dataclasses.dataclass(frozen=True)
class Case:
    """A loaded scenario with its first variant compiled and every member designed."""

    scenario: Scenario
    model: CompiledModel
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


def load_case(tmp_path: Path, toml: str, name: str = "case") -> Case:
    """Write ``toml`` to ``tmp_path`` and load, compile and design all its members."""
    path = tmp_path / f"{name}.toml"
    path.write_text(textwrap.dedent(toml))
    scenario = load_scenario(path)
    variant = scenario.variants[0]
    model = compile_model(scenario, variant)
    design = make_design(scenario, variant, model, np.arange(scenario.members))
    return Case(scenario, model, design)


def subset(design: Design, members: np.ndarray) -> Design:
    """The design of some of the members (positions into ``design``), in the given order."""
    members = np.asarray(members)
    return dataclasses.replace(
        design,
        members=design.members[members],
        parameters=design.parameters[:, members],
        schedule_values=tuple(v[:, members] for v in design.schedule_values),
        initial=design.initial[:, members],
        invalid_start=design.invalid_start[members],
        reported={k: v[..., members] for k, v in design.reported.items()},
    )
