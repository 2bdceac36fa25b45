"""The text ``ensemble check`` prints: a validated scenario, as a modeller reads it."""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence

from ensemble.methods import METHODS
from ensemble.scenario.reader import time_text
from ensemble.scenario.schema import (
    Derived, Distribution, Expression, Fixed, GroupDraws, InitialValue, Matrix, Parameter, Rest,
    Scenario, Schedule, Variant,
)

_INDENT = "  "


def describe(scenario: Scenario, warnings: Iterable[str] = (),
             findings: Iterable[str] = ()) -> str:
    """Everything ``scenario`` sets, one section per table, then ``findings`` (sections
    computed from it, such as :func:`reproduction_section`) and ``warnings``."""
    sections = [
        _heading(scenario),
        _model(scenario),
        _flows(scenario),
        _section("parameters", _parameter_rows(scenario.parameters)),
        _section("sampling", [("method", scenario.sampling)]),
        _variants(scenario.variants),
        _solver(scenario),
        _output(scenario),
        _compute(scenario),
        *findings,
    ]
    warnings = list(warnings)
    if warnings:
        sections.append("warnings\n" + "\n".join(f"{_INDENT}- {w}" for w in warnings))
    return "\n\n".join(s for s in sections if s) + "\n"


def number_text(value: float) -> str:
    """A number as short as it is exact: ``52000``, ``0.7``, ``1e-05``."""
    if value.is_integer() and abs(value) < 1e15:
        return str(int(value))
    return repr(value)


def _numbers_text(values: Iterable[float]) -> str:
    return "[" + ", ".join(number_text(v) for v in values) + "]"


def _table(rows: Iterable[tuple[str, ...]], indent: str = _INDENT) -> str:
    """Rows of cells, every column but the last padded to its widest cell."""
    rows = list(rows)
    widths = [max(len(cell) for cell in column) for column in zip(*rows)]
    return "\n".join(
        (indent + "  ".join(cell.ljust(w) for cell, w in zip(row[:-1], widths))
         + "  " + row[-1]).rstrip() for row in rows)


def _section(title: str, rows: Iterable[tuple[str, ...]]) -> str:
    rows = list(rows)
    return f"{title}\n{_table(rows)}" if rows else ""


def _heading(scenario: Scenario) -> str:
    lines = [f"scenario {scenario.name}" + (f": {scenario.title}" if scenario.title else "")]
    if scenario.description:
        lines.append(_INDENT + scenario.description)
    start = f"from {scenario.start.isoformat()}, " if scenario.start else ""
    lines.append(f"{_INDENT}{start}{time_text(scenario.days)} days, {scenario.member_count} "
                 f"member(s) per variant, seed {scenario.seed}")
    lines.append(f"{_INDENT}file {scenario.source.path}")
    if scenario.source.overrides:
        lines.append(f"{_INDENT}set on the command line: "
                     + ", ".join(scenario.source.overrides))
    return "\n".join(lines)


def _model(scenario: Scenario) -> str:
    model = scenario.model
    rows = [("compartments", " ".join(model.compartments))]
    if model.groups:
        rows.append(("groups", " ".join(model.groups)))
        rows.append(("population", _numbers_text(model.population)
                     + f" (total {number_text(sum(model.population))})"))
    else:
        rows.append(("population", number_text(model.population[0])))
    rows.append(("initial", ", ".join(f"{name} = {_initial_text(value)}"
                                      for name, value in model.initial.items())))
    if model.exclude_from_N:
        rows.append(("not in N", " ".join(model.exclude_from_N)))
    if model.stages:
        rows.append(("stages", ", ".join(f"{name} {count} (Erlang dwell time)"
                                          for name, count in model.stages.items())))
    if model.infected:
        rows.append(("infected", " ".join(model.infected)))
    text = _section("model", rows)
    if model.matrices:
        text += "\n" + _INDENT + "matrices\n" + _matrices(model.matrices, model.groups)
    return text


def _initial_text(value: InitialValue) -> str:
    if isinstance(value, Rest):
        return "rest"
    if isinstance(value, Expression):
        return value.text
    if isinstance(value, tuple):
        return _numbers_text(value)
    return number_text(value)


def _matrices(matrices: Mapping[str, Matrix], groups: tuple[str, ...] | None) -> str:
    labels = list(groups or ())
    blocks = []
    for name, rows in matrices.items():
        cells = [[number_text(v) for v in row] for row in rows]
        width = max(len(c) for c in [*labels, *(c for row in cells for c in row)])
        label_width = max(len(g) for g in labels)
        indent = _INDENT * 3
        header = indent + " " * label_width + "  " + " ".join(g.rjust(width) for g in labels)
        body = [indent + g.ljust(label_width) + "  " + " ".join(c.rjust(width) for c in row)
                for g, row in zip(labels, cells)]
        blocks.append(f"{_INDENT * 2}{name}\n" + "\n".join([header, *body]))
    return "\n".join(blocks)


def _flows(scenario: Scenario) -> str:
    rows = []
    for flow in scenario.model.flows:
        route = f"{flow.source or '(outside)'} -> {flow.target or '(outside)'}"
        if flow.group is not None:
            route += f" in group {flow.group}"
        elif flow.rate.shape == "matrix":
            route += " between groups"
        rows.append((flow.name, route, flow.rate.text))
    return _section("flows (persons per day)", rows)


def _parameter_rows(parameters: Mapping[str, Parameter]) -> list[tuple[str, str]]:
    return [(name, parameter_text(p)) for name, p in parameters.items()]


def parameter_text(parameter: Parameter) -> str:
    """One parameter's form, shape, units and description on one line."""
    form = parameter.form
    if isinstance(form, Fixed):
        text = (_numbers_text(form.value) if isinstance(form.value, tuple)
                else number_text(form.value))
    elif isinstance(form, Distribution):
        text = _distribution_text(form)
    elif isinstance(form, GroupDraws):
        text = "[" + ", ".join(_distribution_text(e) if isinstance(e, Distribution)
                               else number_text(e) for e in form.elements) + "]"
    elif isinstance(form, Derived):
        text = f"= {form.expression.text}"
    else:
        text = _schedule_text(form)
    if parameter.shape == "vector":
        text += " (per group)"
    if parameter.units:
        text += f" [{parameter.units}]"
    if parameter.description:
        text += f"  -- {parameter.description}"
    return text


def _distribution_text(form: Distribution) -> str:
    arguments = ", ".join(f"{k}={_numbers_text(v) if isinstance(v, tuple) else number_text(v)}"
                          for k, v in form.arguments.items())
    text = f"{form.family}({arguments})"
    low, high = form.truncation
    if low is not None or high is not None:
        text += (f" truncated to [{number_text(low) if low is not None else '-inf'}, "
                 f"{number_text(high) if high is not None else 'inf'}]")
    return text


def _schedule_text(form: Schedule) -> str:
    knots = []
    for day, value in zip(form.days, form.values):
        if isinstance(value, Expression):
            shown = value.text
        elif isinstance(value, tuple):
            shown = _numbers_text(value)
        else:
            shown = number_text(value)
        knots.append(f"day {time_text(day)}: {shown}")
    return f"schedule ({form.between}) " + "; ".join(knots)


def _variants(variants: tuple[Variant, ...]) -> str:
    lines = [f"variants ({len(variants)})"]
    for variant in variants:
        title = f": {variant.title}" if variant.title else ""
        overrides = _parameter_rows(variant.parameters)
        overrides += [(name, f"{len(rows)} x {len(rows)} matrix "
                             + "; ".join(_numbers_text(r) for r in rows))
                      for name, rows in variant.matrices.items()]
        if not overrides:
            lines.append(f"{_INDENT}{variant.name}{title} (no overrides)")
            continue
        lines.append(f"{_INDENT}{variant.name}{title}")
        lines.append(_table(overrides, _INDENT * 2))
    return "\n".join(lines)


def _solver(scenario: Scenario) -> str:
    solver = scenario.solver
    check = solver.check
    rows = [
        ("method", f"{solver.method} (order {METHODS[solver.method].order})"),
        ("step", f"{time_text(solver.step)} days"),
        ("report_every", f"{time_text(solver.report_every)} days "
                         f"({solver.steps_per_report} steps; {scenario.n_reports} reported "
                         "times)"),
        ("check", (f"refine {check.refine}, levels {check.levels}, rtol "
                   f"{number_text(check.rtol)}, atol {number_text(check.atol)} persons")
         if check.enabled else "off"),
    ]
    used = "" if METHODS[solver.method].implicit else " (used by implicit methods only)"
    rows.append(("newton", f"tol {number_text(solver.newton.tol)} persons, max_iter "
                           f"{solver.newton.max_iter}{used}"))
    return _section("solver", rows)


def _output(scenario: Scenario) -> str:
    output = scenario.output
    rows = [
        ("path", output.path),
        ("quantiles", _numbers_text(output.quantiles)),
        ("keep_members", "yes (state and flow_count)" if output.keep_members
         else "left out (summaries only)"),
        ("compression", str(output.compression)),
    ]
    if output.show_stages:
        rows.append(("show_stages", "every stage and transfer of a chain too"))
    if output.compare_to:
        rows.append(("compare_to", output.compare_to))
    return _section("output", rows)


def _compute(scenario: Scenario) -> str:
    compute = scenario.compute
    rows = [(name, str(getattr(compute, name))) for name in ("chunk", "workers", "cluster",
                                                              "address")
            if getattr(compute, name) is not None]
    return _section("compute", rows)


def reproduction_section(infected: tuple[str, ...] | None, note: str,
                         rows: Iterable[tuple[str, float, Sequence[float]]]) -> str:
    """The basic reproduction number R0 by the next-generation matrix: the infected
    compartments and how they were found, then per variant R0 at the parameters'
    medians and its range over the first members (``rows`` of (variant, median, values))."""
    if infected is None:
        return f"basic reproduction number R0\n{_INDENT}not computed: {note}"
    lines = [f"{_INDENT}infected compartments {' '.join(infected)} ({note})"]
    table = []
    for name, median, values in rows:
        finite = [v for v in values if v == v]
        spread = (f"{_short(min(finite))} to {_short(max(finite))} over members 0-"
                  f"{len(values) - 1}" if finite else "not finite for the first members")
        table.append((name, f"{_short(median)} at the parameters' medians", spread))
    return "basic reproduction number R0 (next-generation matrix, at the start)\n" + \
        "\n".join(lines) + "\n" + _table(table)


def _short(value: float) -> str:
    return f"{value:.4g}" if value == value else "NaN"
