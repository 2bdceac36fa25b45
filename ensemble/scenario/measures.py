"""The ``[[measures]]`` tables of a scenario: the quantities a briefing reports, each an
expression over compartments or one flow, combined over groups and, for a flow, added
up over windows of whole report intervals (the project's reference,
``ensemble/scenario/reference.md``, ``[[measures]]``)."""

from __future__ import annotations

from fractions import Fraction
from typing import Any

from ensemble.scenario import expressions
from ensemble.scenario.reader import Reader, key_path, time_text
from ensemble.scenario.schema import Flow, Measure, MeasureGroups

MEASURE_KEYS = ("name", "of", "groups", "window", "units", "threshold", "description")

DEFAULT_UNITS = "1"
"""Units of a measure that gives none: a count of persons (CF conventions 1.10, sec. 3.1:
``"1"`` for counts)."""

_NOT_IN_MEASURES = ("sum", "diag", "spectral_radius")
"""Functions a measure may not call: its groups are combined by its ``groups`` key."""


def read_measures(reader: Reader, value: object, compartments: list[str],
                  groups: tuple[str, ...] | None, flows: tuple[Flow, ...],
                  report_every: Fraction, days: Fraction) -> tuple[Measure, ...]:
    """Every ``[[measures]]`` table, checked against the model's compartments, groups
    and flows and the report grid.

    Raises
    ------
    ScenarioError
        (or :class:`~ensemble.errors.ScenarioErrors`) naming the key and value.
    """
    if not isinstance(value, list):
        raise reader.error("measures", value, "must be an array of tables [[measures]]")
    mark = len(reader.errors)
    measures = [reader.attempt(_read_measure, reader, table, f"measures[{i}]", compartments,
                               groups, flows, report_every, days)
                for i, table in enumerate(value)]
    reader.abandon_if_failed(mark)
    reader.unique([m.name for m in measures if m is not None], "measures", "measure name")
    return tuple(m for m in measures if m is not None)


def _read_measure(reader: Reader, value: object, path: str, compartments: list[str],
                  groups: tuple[str, ...] | None, flows: tuple[Flow, ...],
                  report_every: Fraction, days: Fraction) -> Measure:
    table: dict[str, Any] = reader.table(value, path, MEASURE_KEYS)
    name = reader.get(table, path, "name", reader.identifier)
    text = reader.parse(reader.get(table, path, "of", reader.string),
                        key_path(path, "of"))
    flow_names = {flow.name for flow in flows}
    flow = text.text.strip() if text.text.strip() in flow_names else None
    if flow is not None:
        shapes = {flow: "vector" if groups else "scalar"}
    else:
        shapes = {c: "vector" if groups else "scalar" for c in compartments}
        called = sorted(expressions.functions_in(text.tree) & set(_NOT_IN_MEASURES))
        if called:
            raise reader.error(text.path, text.text,
                               f"a measure cannot call {called[0]}()",
                               "its groups are combined by the measure's groups key")
        if "@" in text.text:
            raise reader.error(text.path, text.text, "a measure cannot use @",
                               "its groups are combined by the measure's groups key")
    reason = ("is not a compartment or a flow: a measure is an expression over "
              "compartments, or one flow's name")
    forbidden = {n: reason for n in text.names if n not in shapes}
    of = reader.check(text, shapes, forbidden)
    window = reader.get(table, path, "window", reader.positive_time, report_every)
    where = key_path(path, "window")
    if flow is None and "window" in table:
        raise reader.error(where, table["window"], "only a flow's measure has windows",
                           "a compartment is reported at each time; name a flow in "
                           "'of' to count persons over windows")
    if window % report_every:
        raise reader.error(where, table["window"], "must be a whole number of report "
                           f"intervals of {time_text(report_every)} day(s)")
    if window > days:
        raise reader.error(where, table["window"],
                           f"is longer than the horizon of {time_text(days)} days")
    return Measure(
        name=name, of=of, flow=flow,
        groups=reader.get(table, path, "groups",
                          lambda v, p: _groups(reader, v, p, groups), "sum"),
        window=window,
        units=reader.get(table, path, "units", _text(reader), DEFAULT_UNITS),
        threshold=reader.get(table, path, "threshold", reader.number, None),
        description=reader.get(table, path, "description", _text(reader), None))


def _groups(reader: Reader, value: object, path: str,
            groups: tuple[str, ...] | None) -> MeasureGroups:
    """``"sum"``, ``"each"`` or a list of group names (with model groups only)."""
    if isinstance(value, str) and value in ("sum", "each"):
        return value  # type: ignore[return-value]
    if not isinstance(value, list) or not value:
        raise reader.error(path, value, "must be \"sum\", \"each\" or a list of group "
                                        "names")
    if groups is None:
        raise reader.error(path, value, "a list of groups needs model.groups")
    names = [reader.known(item, groups, f"{path}[{i}]", "group")
             for i, item in enumerate(value)]
    reader.unique(names, path, "group")
    return tuple(names)


def _text(reader: Reader):
    """A reader of a non-empty string without control characters."""
    def read(value: object, path: str) -> str:
        text = reader.string(value, path)
        if not text.strip() or any(ord(c) < 32 or 127 <= ord(c) < 160 for c in text):
            raise reader.error(path, value, "must be non-empty text without control "
                                            "characters")
        return text
    return read
