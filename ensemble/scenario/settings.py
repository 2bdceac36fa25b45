"""The settings tables of a scenario file: ``[scenario]``, ``[solver]``, ``[sampling]``,
``[output]`` and ``[compute]``, with their defaults (the project's reference,
``ensemble/scenario/reference.md``, lists them)."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date
from fractions import Fraction
from typing import Any

from ensemble.methods import METHODS
from ensemble.scenario.reader import CONTROL_CHARACTERS, MISSING, Reader, key_path, time_text
from ensemble.scenario.schema import Compute, Newton, Output, Solver, StepCheck

SAMPLING_METHODS = ("random", "latin-hypercube", "sobol")

DEFAULT_QUANTILES = (0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975)

MAX_SEED = 2 ** 63 - 1
"""Largest seed: the result file stores it as a 64-bit signed integer."""

MAX_MEMBERS = 2 ** 31 - 1
"""Most members per variant: the result file numbers them with 32-bit integers."""


@dataclass(frozen=True)
class Head:
    """The ``[scenario]`` table."""

    name: str
    title: str | None
    description: str | None
    start: date | None
    days: Fraction
    member_count: int
    seed: int


@dataclass(frozen=True)
class SolverTable:
    """The ``[solver]`` table; ``newton_tol`` is None where the default applies."""

    method: str
    step: Fraction
    report_every: Fraction
    check: StepCheck
    newton_tol: float | None
    newton_max_iter: int

    def solver(self, population: tuple[float, ...]) -> Solver:
        """The settings with the Newton tolerance resolved to its default
        max(1e-3 * atol, 1e-12 * total population) where the file gives none."""
        tol = self.newton_tol
        if tol is None:
            tol = max(1e-3 * self.check.atol, 1e-12 * sum(population))
        return Solver(method=self.method, step=self.step,  # type: ignore[arg-type]
                      report_every=self.report_every, check=self.check,
                      newton=Newton(tol, self.newton_max_iter))


def read_head(reader: Reader, value: object) -> Head:
    if value is MISSING:
        raise reader.error("scenario", None, "missing required table [scenario]")
    path = "scenario"
    table = reader.table(value, path, ("name", "title", "description", "start", "days",
                                       "members", "seed"))
    return Head(
        name=reader.get(table, path, "name", reader.label),
        title=reader.get(table, path, "title", reader.string, None),
        description=reader.get(table, path, "description", reader.string, None),
        start=reader.get(table, path, "start", reader.date, None),
        days=reader.get(table, path, "days", reader.positive_time),
        member_count=reader.get(table, path, "members",
                                lambda v, p: read_member_count(reader, v, p), 1),
        seed=reader.get(table, path, "seed", lambda v, p: read_seed(reader, v, p), 0))


def read_member_count(reader: Reader, value: object, path: str) -> int:
    """Members per variant: a whole number from 1 to :data:`MAX_MEMBERS`."""
    if (isinstance(value, int) and not isinstance(value, bool)
            and value > MAX_MEMBERS):
        raise reader.error(path, value, f"must be at most {MAX_MEMBERS:,} (2^31 - 1: the "
                           "result file numbers members with 32-bit integers)")
    return reader.integer(value, path, minimum=1)


def read_seed(reader: Reader, value: object, path: str) -> int:
    """A seed: a whole number from 0 to :data:`MAX_SEED`."""
    if (isinstance(value, int) and not isinstance(value, bool)
            and not 0 <= value <= MAX_SEED):
        raise reader.error(path, value, f"must be a whole number from 0 to {MAX_SEED} "
                           "(2^63 - 1: the result file stores it as a 64-bit integer)")
    return reader.integer(value, path)


def check_whole_days(reader: Reader, days: Fraction, report_every: Fraction) -> None:
    if (days / report_every).denominator != 1:
        raise reader.error("scenario.days", days, f"must be a whole multiple of "
                           f"solver.report_every ({time_text(report_every)})")


def read_solver(reader: Reader, value: object) -> SolverTable:
    path = "solver"
    table = reader.table(value, path, ("method", "step", "report_every", "check", "newton"))
    method = reader.get(table, path, "method",
                        lambda v, p: reader.known(v, METHODS, p, "solver method"), "rk4")
    step = reader.get(table, path, "step", reader.positive_time, Fraction(1, 4))
    report_every = reader.get(table, path, "report_every", reader.positive_time, Fraction(1))
    if (report_every / step).denominator != 1:
        raise reader.error("solver.report_every", report_every,
                           f"must be a whole multiple of solver.step ({time_text(step)})")
    check = _read_check(reader, table.get("check", {}))
    newton_path = "solver.newton"
    newton = reader.table(table.get("newton", {}), newton_path, ("tol", "max_iter"))
    return SolverTable(
        method=method, step=step, report_every=report_every, check=check,
        newton_tol=reader.get(newton, newton_path, "tol", reader.positive, None),
        newton_max_iter=reader.get(newton, newton_path, "max_iter",
                                   lambda v, p: reader.integer(v, p, minimum=1), 20))


def _read_check(reader: Reader, value: object) -> StepCheck:
    path = "solver.check"
    table = reader.table(value, path, ("refine", "levels", "rtol", "atol", "enabled"))
    return StepCheck(
        refine=reader.get(table, path, "refine",
                          lambda v, p: reader.integer(v, p, minimum=2), 2),
        levels=reader.get(table, path, "levels", lambda v, p: _levels(reader, v, p), 2),
        rtol=reader.get(table, path, "rtol", reader.positive, 1e-3),
        atol=reader.get(table, path, "atol", reader.positive, 0.01),
        enabled=reader.get(table, path, "enabled", reader.boolean, True))


def _levels(reader: Reader, value: object, path: str) -> int:
    result = reader.integer(value, path)
    if result not in (2, 3):
        raise reader.error(path, value, "must be 2 or 3")
    return result


def read_sampling(reader: Reader, value: object) -> str:
    table = reader.table(value, "sampling", ("method",))
    return reader.get(table, "sampling", "method",
                      lambda v, p: reader.known(v, SAMPLING_METHODS, p, "sampling method"),
                      "random")


def read_output(reader: Reader, value: object, name: str,
                variant_names: list[str] | None) -> Output:
    """The ``[output]`` table; ``compare_to`` is checked once the variants are known."""
    path = "output"
    table = reader.table(value, path, ("path", "quantiles", "keep_members", "compare_to",
                                       "compression", "show_stages", "pairs"))
    compare_to = None
    pairs: tuple[tuple[str, str], ...] = ()
    if "compare_to" in table and variant_names is not None:
        compare_to = reader.known(table["compare_to"], variant_names,
                                  key_path(path, "compare_to"), "variant")
    if "pairs" in table and variant_names is not None:
        pairs = _pairs(reader, table["pairs"], key_path(path, "pairs"), variant_names)
    return Output(
        path=reader.get(table, path, "path", lambda v, p: _path(reader, v, p),
                        f"results/{name}.nc"),
        quantiles=reader.get(table, path, "quantiles", lambda v, p: _quantiles(reader, v, p),
                             DEFAULT_QUANTILES),
        keep_members=reader.get(table, path, "keep_members", reader.boolean, True),
        compare_to=compare_to,
        compression=reader.get(table, path, "compression",
                               lambda v, p: reader.integer(v, p, minimum=0, maximum=9), 4),
        show_stages=reader.get(table, path, "show_stages", reader.boolean, False),
        pairs=pairs)


def _pairs(reader: Reader, value: object, path: str, variant_names: list[str]
           ) -> tuple[tuple[str, str], ...]:
    """``[[variant, reference], ...]``: each member's measures in the first variant minus
    the same member's in the second."""
    if not isinstance(value, list):
        raise reader.error(path, value, "must be a list of [variant, reference] pairs")
    pairs = []
    for i, pair in enumerate(value):
        where = f"{path}[{i}]"
        if not isinstance(pair, list) or len(pair) != 2:
            raise reader.error(where, pair, "must be a pair [variant, reference]")
        first, second = (reader.known(name, variant_names, f"{where}[{j}]", "variant")
                         for j, name in enumerate(pair))
        if first == second:
            raise reader.error(where, pair, "compares a variant with itself: every "
                                            "difference would be zero")
        pairs.append((first, second))
    return tuple(pairs)


def _path(reader: Reader, value: object, path: str) -> str:
    text = reader.string(value, path)
    if not text.strip():
        raise reader.error(path, value, "must not be empty")
    if CONTROL_CHARACTERS.search(text):
        raise reader.error(path, value, "must not contain control characters (newline, "
                                        "carriage return, tab, NUL, escape, DEL, ...)")
    return text


def _quantiles(reader: Reader, value: object, path: str) -> tuple[float, ...]:
    levels = reader.numbers(value, path)
    if not levels:
        raise reader.error(path, value, "must list at least one quantile")
    for i, q in enumerate(levels):
        if not 0 <= q <= 1:
            raise reader.error(f"{path}[{i}]", q, "must lie within [0, 1]")
        if i and q <= levels[i - 1]:
            raise reader.error(f"{path}[{i}]", q, "quantiles must be sorted and unique")
    return levels


def read_compute(reader: Reader, value: object) -> Compute:
    path = "compute"
    table: dict[str, Any] = reader.table(value, path, ("chunk", "workers", "cluster",
                                                       "address"))
    positive = lambda v, p: reader.integer(v, p, minimum=1)  # noqa: E731
    text = lambda v, p: _path(reader, v, p)  # noqa: E731
    compute = Compute(
        chunk=reader.get(table, path, "chunk", positive, None),
        workers=reader.get(table, path, "workers", positive, None),
        cluster=reader.get(table, path, "cluster", text, None),
        address=reader.get(table, path, "address", text, None))
    if compute.cluster is not None and compute.address is not None:
        raise reader.error("compute.address", compute.address, "an address already names "
                           "the cluster: give compute.cluster or compute.address, not both")
    return compute
