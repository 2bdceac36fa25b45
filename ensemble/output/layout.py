"""What a result file looks like apart from its numbers: labels, times, parameters,
provenance (:class:`ResultLayout`).

The layout takes the model's labels as given (the run layer lowers the model and reads
them off), so this layer needs nothing of how trajectories are computed.
"""

from __future__ import annotations

from collections.abc import Collection, Mapping
from dataclasses import dataclass
from types import MappingProxyType
from typing import Literal

import numpy as np

from ensemble.about import PROGRAM, VERSION
from ensemble.output.variables import TrajectoryVariable
from ensemble.scenario.schema import (Derived, Fixed, GroupDraws, Parameter, Scenario,
                                      is_drawn)


@dataclass(frozen=True)
class ParameterInfo:
    """A parameter reported as ``param_<name>``.

    Attributes
    ----------
    shape : ``"scalar"`` -> (variant, member); ``"vector"`` -> (variant, member, group).
    units, description : as given in the scenario file (None where absent).
    constant : the same for every member of a variant (in every variant given as a
        number or a number per group, or derived from such parameters and the model's
        matrices alone), so stored once per variant, without the member dimension.
    """

    shape: Literal["scalar", "vector"]
    units: str | None = None
    description: str | None = None
    constant: bool = False


@dataclass(frozen=True)
class ResultLayout:
    """Everything about a result file except the numbers.

    Attributes
    ----------
    scenario : the validated scenario (title, start, quantiles, compression, whether
        every member's trajectories are kept, ``compare_to``, the file's text for the
        ``scenario`` attribute).
    variants : variant names, in file order (index = the variant index of a chunk key).
    compartments, groups, flows : labels (``groups`` None without strata).
    times : (n_reports,) float64 reported times in days since the start.
    member_count : members per variant.
    parameters : name -> :class:`ParameterInfo` for every parameter constant in time in
        every variant (reported as ``param_<name>``), in file order.
    time_varying_parameters : names of the parameters that change with time in some
        variant: schedules and what is derived from them (global attribute
        ``time_varying_parameters``).
    fingerprint : digest of everything that changes the numbers (checked on resume).
    history : the command and time that made the file (global attribute ``history``).
    source : program and version (global attribute ``source``).
    """

    scenario: Scenario
    variants: tuple[str, ...]
    compartments: tuple[str, ...]
    groups: tuple[str, ...] | None
    flows: tuple[str, ...]
    times: np.ndarray
    member_count: int
    parameters: Mapping[str, ParameterInfo]
    time_varying_parameters: tuple[str, ...]
    fingerprint: str
    history: str
    source: str = f"{PROGRAM} {VERSION}"

    @property
    def n_groups(self) -> int:
        """Number of strata (1 without groups)."""
        return len(self.groups) if self.groups else 1

    @property
    def n_states(self) -> int:
        """Rows of a chunk's ``state``: compartment-major, ``c * n_groups + g``."""
        return len(self.compartments) * self.n_groups

    @property
    def n_flow_elements(self) -> int:
        """Rows of a chunk's ``flow_count``: flow-major, ``f * n_groups + g``."""
        return len(self.flows) * self.n_groups

    @property
    def n_reports(self) -> int:
        """Number of reported times, including t = 0."""
        return len(self.times)

    @property
    def keep_members(self) -> bool:
        """Whether the result holds every member's trajectories (else their quantiles
        only)."""
        return bool(self.scenario.output.keep_members)

    def labels(self, dim: str) -> tuple[str, ...]:
        """The labels of the rows dimension ``dim`` of trajectory variables."""
        return {"compartment": self.compartments, "flow": self.flows}[dim]

    def row_count(self, variable: TrajectoryVariable) -> int:
        """Flat rows of ``variable`` in a chunk: its labels times the groups (a
        measure's own rows)."""
        if variable.row_total is not None:
            return variable.row_total
        return len(self.labels(variable.rows)) * self.n_groups

    def time_count(self, variable: TrajectoryVariable) -> int:
        """Times of ``variable``: the reported times (a measure's own windows)."""
        return self.n_reports if variable.time_total is None else variable.time_total

    def cell_count(self, variable: TrajectoryVariable) -> int:
        """Times times rows of ``variable``: the cells of one member."""
        return self.row_count(variable) * self.time_count(variable)

    @property
    def compare_index(self) -> int | None:
        """Index of the ``output.compare_to`` variant (None when not set)."""
        other = self.scenario.output.compare_to
        return self.variants.index(other) if other else None

    @classmethod
    def from_scenario(cls, scenario: Scenario, *, compartments: tuple[str, ...],
                      groups: tuple[str, ...] | None, flows: tuple[str, ...],
                      varying: Collection[str], fingerprint: str,
                      history: str) -> ResultLayout:
        """The layout of ``scenario``'s result.

        Parameters
        ----------
        scenario : the validated scenario, with command-line overrides applied.
        compartments, groups, flows : the model's labels (the same in every variant).
        varying : names of the parameters that change with time in some variant
            (schedules and what is derived from them); they are not reported per member.
        fingerprint, history : see the class attributes.
        """
        per_variant = [scenario.variant_parameters(v) for v in scenario.variants]
        names: list[str] = []
        for merged in per_variant:
            names.extend(n for n in merged if n not in names)
        time_varying = tuple(n for n in names if n in varying)
        parameters: dict[str, ParameterInfo] = {}
        for name in names:
            if name in varying or any(name not in m for m in per_variant):
                continue
            defined = [m[name] for m in per_variant if name in m]
            shapes = {p.shape for p in defined}
            if shapes - {"scalar", "vector"} or len(shapes) != 1:
                continue
            units = next((p.units for p in defined if p.units), None)
            description = next((p.description for p in defined if p.description), None)
            constant = all(_given(name, merged, set(scenario.variant_matrices(variant)))
                           for merged, variant in zip(per_variant, scenario.variants))
            parameters[name] = ParameterInfo(shapes.pop(), units, description, constant)
        times = np.array([float(t) for t in scenario.report_times()], dtype=np.float64)
        return cls(scenario=scenario,
                   variants=tuple(v.name for v in scenario.variants),
                   compartments=tuple(compartments), groups=groups,
                   flows=tuple(flows), times=times, member_count=scenario.member_count,
                   parameters=MappingProxyType(parameters),
                   time_varying_parameters=time_varying,
                   fingerprint=fingerprint, history=history)


def _given(name: str, parameters: Mapping[str, Parameter], matrices: Collection[str],
           seen: frozenset[str] = frozenset()) -> bool:
    """Whether parameter ``name`` of a variant (its ``parameters``, with the model's
    ``matrices``) is the same for every member: a number, a number per group, or derived
    from such parameters and the matrices alone."""
    form = parameters[name].form
    if isinstance(form, Fixed):
        return True
    if isinstance(form, GroupDraws):
        return not is_drawn(form)
    if not isinstance(form, Derived) or name in seen:
        return False
    return all(used in matrices or (used in parameters and _given(
        used, parameters, matrices, seen | {name})) for used in form.expression.names)
