"""The validated scenario: frozen dataclasses, one per table of the scenario file.

Everything here has already been checked by :mod:`ensemble.scenario.load`; later stages
may trust it.  Times are :class:`fractions.Fraction` so that the whole-multiple rules
(``days`` a multiple of ``report_every``, schedule days on the step grid) are exact.
Mappings are read-only (:class:`types.MappingProxyType`) and keep the file's order.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import date
from fractions import Fraction
from types import MappingProxyType
from typing import Literal, Union

from ensemble.distributions import ArgumentValue
from ensemble.scenario.expressions import Node

Shape = Literal["scalar", "vector", "matrix"]
"""Kind of value an expression or parameter has: a number, a vector over groups, or a
G x G matrix."""


@dataclass(frozen=True)
class Expression:
    """An expression from the scenario file, parsed and checked.

    Attributes
    ----------
    text : the text as written.
    tree : the parsed tree (:mod:`ensemble.scenario.expressions`).
    key : key path it came from, e.g. ``model.flows[0].rate``.
    shape : what it evaluates to.
    names : every name it uses, directly.
    """

    text: str
    tree: Node
    key: str
    shape: Shape
    names: frozenset[str]


# ----------------------------------------------------------------------------- model


@dataclass(frozen=True)
class Rest:
    """Marker for the one compartment that takes what is left of the population."""


InitialValue = Union[Rest, float, tuple[float, ...], Expression]
"""An initial count: ``"rest"``, a number, one number per group, or an expression of
parameters (scalar, or a vector over groups)."""

INITIAL_SUM_RTOL = 1e-9
"""Relative tolerance (of a group's population) of the initial counts' sums: the loader
refuses given counts above the population by more, a "rest" this little below zero is
zero, and without "rest" the counts must add up to the population within it (the
project's reference, ``ensemble/scenario/reference.md``, ``initial``)."""

Matrix = tuple[tuple[float, ...], ...]
"""A G x G matrix of numbers, row-major."""


@dataclass(frozen=True)
class Flow:
    """Persons per day moved from ``source`` to ``target``.

    ``source`` is None for an inflow from outside (births), ``target`` None for an
    outflow (deaths).  ``rate`` is the total over the group or population, not per capita:
    a number without groups; with groups a vector (group g to group g), a matrix (entry
    (g, h) from group g to group h), or a number for the one group ``group`` names.
    """

    name: str
    source: str | None
    target: str | None
    rate: Expression
    group: str | None = None


@dataclass(frozen=True)
class Model:
    """The compartments, their strata, and the flows between them.

    ``population`` has one entry per group (a single entry without groups).
    ``initial`` lists every compartment in ``compartments`` order; an omitted one is 0.0.
    ``stages`` gives the compartments split into a chain of stages (an Erlang dwell
    time) their number of stages; ``infected`` names the infected compartments of the
    next-generation matrix, or is None when they are to be inferred from the flows.
    """

    compartments: tuple[str, ...]
    groups: tuple[str, ...] | None
    population: tuple[float, ...]
    initial: Mapping[str, InitialValue]
    exclude_from_N: tuple[str, ...]
    flows: tuple[Flow, ...]
    matrices: Mapping[str, Matrix]
    stages: Mapping[str, int] = field(default_factory=lambda: MappingProxyType({}))
    infected: tuple[str, ...] | None = None

    @property
    def n_groups(self) -> int:
        """Number of strata (1 for a model without groups)."""
        return len(self.groups) if self.groups else 1


# ------------------------------------------------------------------------ parameters


@dataclass(frozen=True)
class Fixed:
    """A known value: a number, or one number per group."""

    value: float | tuple[float, ...]


@dataclass(frozen=True)
class Distribution:
    """A value drawn once per member (once per member and group with ``per_group``).

    ``family`` names an entry of :data:`ensemble.distributions.FAMILIES`; ``arguments``
    holds the family's keys as written (numbers, or lists of numbers such as a
    ``choice``'s ``values`` and ``weights``); ``truncation`` the optional (low, high) of
    a family that accepts truncation (None where open).
    """

    family: str
    arguments: Mapping[str, ArgumentValue]
    truncation: tuple[float | None, float | None] = (None, None)
    per_group: bool = False


@dataclass(frozen=True)
class GroupDraws:
    """A value per group, each group's drawn from its own distribution (or given).

    Element g of ``elements`` is the distribution group g's value is drawn from once per
    member, with a column of draws of its own (keyed by the parameter's name and the
    group, so every variant draws it at the same ranks), or a number for a group whose
    value is known.
    """

    elements: tuple[Distribution | float, ...]


def element_distribution(form: "ParameterForm", element: int) -> Distribution | None:
    """The distribution element ``element`` of a parameter of form ``form`` is drawn
    from, or None when that element is not drawn."""
    if isinstance(form, Distribution):
        return form
    if isinstance(form, GroupDraws) and isinstance(form.elements[element], Distribution):
        return form.elements[element]  # type: ignore[return-value]
    return None


def is_drawn(form: "ParameterForm") -> bool:
    """Whether a parameter of form ``form`` draws any of its elements."""
    return isinstance(form, Distribution) or (isinstance(form, GroupDraws) and any(
        isinstance(element, Distribution) for element in form.elements))


@dataclass(frozen=True)
class Derived:
    """An expression of other parameters, evaluated per member after sampling."""

    expression: Expression


@dataclass(frozen=True)
class Schedule:
    """A function of time given at knots.

    ``days`` strictly increase and lie on the step grid.  ``values`` are numbers or
    expressions of parameters, one per knot.  ``between`` is ``"step"`` (a value holds on
    [day, next day)) or ``"linear"``.  Before the first day the first value holds; after
    the last, the last.
    """

    days: tuple[Fraction, ...]
    values: tuple[float | Expression, ...]
    between: Literal["step", "linear"] = "step"


ParameterForm = Union[Fixed, Distribution, GroupDraws, Derived, Schedule]


@dataclass(frozen=True)
class Parameter:
    """One named parameter: its form, shape, and the optional units and description."""

    name: str
    form: ParameterForm
    shape: Shape
    units: str | None = None
    description: str | None = None


@dataclass(frozen=True)
class Variant:
    """One scenario variant: overrides of parameters and matrices."""

    name: str
    title: str | None
    parameters: Mapping[str, Parameter]
    matrices: Mapping[str, Matrix]


# -------------------------------------------------------------------- solver and I/O


@dataclass(frozen=True)
class StepCheck:
    """The per-member step-refinement check (``[solver.check]`` in the project's reference,
    ``ensemble/scenario/reference.md``)."""

    refine: int = 2
    levels: int = 2
    rtol: float = 1e-3
    atol: float = 0.01
    enabled: bool = True


@dataclass(frozen=True)
class Newton:
    """Newton iteration settings for the implicit methods.

    ``tol`` is the max-norm of the Newton update in persons, already resolved to its
    default max(1e-3 * atol, 1e-12 * population) by the loader.
    """

    tol: float
    max_iter: int = 20


@dataclass(frozen=True)
class Solver:
    """Fixed-step integration settings.  ``step`` and ``report_every`` are days."""

    method: Literal["forward-euler", "heun", "rk4", "backward-euler", "trapezoid"]
    step: Fraction
    report_every: Fraction
    check: StepCheck
    newton: Newton

    @property
    def steps_per_report(self) -> int:
        """Whole number of steps between reports."""
        return int(self.report_every / self.step)


@dataclass(frozen=True)
class Output:
    """Where and what to write."""

    path: str
    quantiles: tuple[float, ...]
    keep_members: bool = True
    compare_to: str | None = None
    compression: int = 4
    show_stages: bool = False
    pairs: tuple[tuple[str, str], ...] = ()


MeasureGroups = Union[Literal["sum", "each"], tuple[str, ...]]
"""How a measure treats the groups: added up, one row each, or the named groups added."""


@dataclass(frozen=True)
class Measure:
    """A quantity of the briefing, computed per member from the trajectories
    (``[[measures]]`` in the project's reference, ``ensemble/scenario/reference.md``).

    ``of`` is an expression over compartments (a stock, reported at each time), or the
    name of one flow (``flow`` set: persons moved, added up over windows of ``window``
    days, a whole number of report intervals).  ``groups`` says how groups combine;
    ``threshold`` asks for the days above it; ``units`` and ``description`` become the
    result variables' attributes.
    """

    name: str
    of: Expression
    flow: str | None
    groups: MeasureGroups
    window: Fraction
    units: str
    threshold: float | None = None
    description: str | None = None


@dataclass(frozen=True)
class Observation:
    """One observed series of a measure (``[[observations]]`` in the project's
    reference, ``ensemble/scenario/reference.md``), checked against the scenario; the
    counts file itself is read where the counts are used.

    ``file`` is the counts file as written (relative to the scenario file);
    ``distribution`` a name of
    :data:`ensemble.scenario.observations.OBSERVATION_DISTRIBUTIONS`; ``dispersion`` (the
    negative binomial's k, None for a Poisson series) and ``reporting`` (the fraction
    reported) are numbers or the names of scalar parameters; ``delay`` is in days.
    """

    key: str
    file: str
    measure: str
    distribution: str
    dispersion: float | str | None
    reporting: float | str
    delay: float = 0.0


@dataclass(frozen=True)
class Compute:
    """How to distribute the work; none of it changes a single number of the result."""

    chunk: int | None = None
    workers: int | None = None
    cluster: str | None = None
    address: str | None = None


@dataclass(frozen=True)
class Source:
    """The scenario file as read: its path (as given), full text, and the ``KEY=VALUE``
    settings given on the command line that changed it (``--set``)."""

    path: str
    text: str
    overrides: tuple[str, ...] = ()


@dataclass(frozen=True)
class Scenario:
    """A validated scenario file.

    ``parameters`` are the base parameters in file order; ``variants`` is never empty
    (a file without variants has one named ``baseline``).
    """

    name: str
    title: str | None
    description: str | None
    start: date | None
    days: Fraction
    member_count: int
    seed: int
    model: Model
    parameters: Mapping[str, Parameter]
    sampling: Literal["random", "latin-hypercube", "sobol"]
    variants: tuple[Variant, ...]
    solver: Solver
    output: Output
    compute: Compute
    source: Source
    measures: tuple[Measure, ...] = ()
    observations: tuple[Observation, ...] = ()

    @property
    def n_reports(self) -> int:
        """Number of reported times, including t = 0."""
        return int(self.days / self.solver.report_every) + 1

    def report_times(self) -> list[Fraction]:
        """Reported times k * report_every, k = 0 .. days / report_every, exactly."""
        every = self.solver.report_every
        return [k * every for k in range(self.n_reports)]

    def variant_parameters(self, variant: Variant) -> Mapping[str, Parameter]:
        """The base parameters with ``variant``'s overrides applied, in file order."""
        merged = dict(self.parameters)
        merged.update(variant.parameters)
        return merged

    def variant_matrices(self, variant: Variant) -> Mapping[str, Matrix]:
        """The model's matrices with ``variant``'s overrides applied."""
        merged = dict(self.model.matrices)
        merged.update(variant.matrices)
        return merged
