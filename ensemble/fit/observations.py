"""The ``[[observations]]`` tables of a scenario: observed series that ``ensemble fit``
conditions the ensemble on, each tied to a measure (``[[observations]]`` in the
project's reference, ``ensemble/scenario/reference.md``).

Each table names a counts file (:mod:`ensemble.fit.counts_file`), a measure of the
scenario, a distribution (:mod:`ensemble.fit.likelihood`), and the dispersion and the
fraction reported, each a number or the name of a parameter (so that it can be drawn and
fitted). A row dated d with a reporting delay of L days counts the measure's window that
ends on day d - L after the start (a flow measure), or the measure at that reported time
(a stock). Every problem is a :class:`~ensemble.errors.ScenarioError` naming the
scenario's key or the counts file's line.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import numpy as np

from ensemble.errors import ScenarioError
from ensemble.fit.counts_file import read_counts
from ensemble.fit.likelihood import DISTRIBUTIONS
from ensemble.scenario.reader import Reader
from ensemble.scenario.schema import Scenario

KEYS = ("file", "measure", "distribution", "dispersion", "reporting", "delay")
"""The keys of an ``[[observations]]`` table."""


@dataclass(frozen=True)
class ObservedSeries:
    """One observed series, checked against the scenario.

    Attributes
    ----------
    key : the table's key path (``observations[0]``).
    file : the counts file, resolved against the scenario's directory.
    measure : the measure observed.
    distribution : ``"poisson"`` or ``"negative-binomial"``.
    dispersion : k of the negative binomial (a number or a parameter's name); None for
        a Poisson series.
    reporting : the fraction reported (a number or a parameter's name).
    delay : days between the end of a window and the date its count carries.
    times : each row's time in the model, in days since the start (window ends).
    counts : each row's count, NaN where missing.
    """

    key: str
    file: str
    measure: str
    distribution: str
    dispersion: float | str | None
    reporting: float | str
    delay: float
    times: np.ndarray
    counts: np.ndarray

    @property
    def last_time(self) -> float:
        """The time of the last observed (not missing) count, in days since the start."""
        seen = self.times[~np.isnan(self.counts)]
        return float(seen.max()) if seen.size else math.nan


def scenario_observations(scenario: Scenario) -> tuple[ObservedSeries, ...]:
    """The ``[[observations]]`` of the scenario, read from its text and checked.

    Raises
    ------
    ScenarioError : (or several collected) naming the key or the counts file's line.
    """
    data = tomllib.loads(scenario.source.text) if scenario.source.text else {}
    reader = Reader(scenario.source.path)
    tables = data.get("observations", [])
    if not isinstance(tables, list) or not all(isinstance(t, dict) for t in tables):
        raise reader.error("observations", tables,
                           "must be an array of tables [[observations]]")
    found = [reader.attempt(_read_series, reader, scenario, table, f"observations[{i}]")
             for i, table in enumerate(tables)]
    reader.raise_collected()
    return tuple(series for series in found if series is not None)


def _read_series(reader: Reader, scenario: Scenario, value: object,
                 path: str) -> ObservedSeries:
    table = reader.table(value, path, KEYS)
    for key in ("file", "measure"):
        if key not in table:
            raise reader.error(f"{path}.{key}", None, f"missing required key {key!r}")
    measures = {m.name: m for m in scenario.measures}
    name = table["measure"]
    if name not in measures:
        raise reader.error(f"{path}.measure", name, "no measure of that name",
                           f"measures: {', '.join(measures) or 'none ([[measures]])'}")
    distribution = table.get("distribution", "poisson")
    if distribution not in DISTRIBUTIONS:
        raise reader.error(f"{path}.distribution", distribution,
                           f"must be one of {', '.join(DISTRIBUTIONS)}")
    dispersion = None
    if distribution == "negative-binomial":
        if "dispersion" not in table:
            raise reader.error(f"{path}.dispersion", None,
                               "a negative-binomial series needs a dispersion")
        dispersion = _number_or_parameter(reader, scenario, table["dispersion"],
                                          f"{path}.dispersion", upper=math.inf)
    elif "dispersion" in table:
        raise reader.error(f"{path}.dispersion", table["dispersion"],
                           "only a negative-binomial series has a dispersion")
    reporting = _number_or_parameter(reader, scenario, table.get("reporting", 1.0),
                                     f"{path}.reporting", upper=1.0)
    delay = table.get("delay", 0)
    if isinstance(delay, bool) or not isinstance(delay, (int, float)) or not (
            0 <= delay < float(scenario.days)):
        raise reader.error(f"{path}.delay", delay,
                           "a delay is a number of days at least 0, less than the horizon")
    file = Path(scenario.source.path).parent / str(table["file"])
    counts = read_counts(file, error=ScenarioError)
    times = counts.days_since(scenario.start) - float(delay)
    grid = _grid(scenario, measures[name])
    for time, line, date in zip(times, counts.lines, counts.dates):
        if not 0 < time <= float(scenario.days):
            raise counts.refused(line, "date", str(date),
                                 f"outside the horizon of {path} (days 0 to "
                                 f"{float(scenario.days):g} after the start, less the delay)")
        if not np.any(np.isclose(grid, time, rtol=0.0, atol=1e-9)):
            raise counts.refused(line, "date", str(date),
                                 f"not the end of a window of measure {name!r} "
                                 f"(every {float(measures[name].window):g} days from the "
                                 "start, after the delay)")
    return ObservedSeries(path, str(file), name, distribution, dispersion, reporting,
                          float(delay), times, counts.values)


def _grid(scenario: Scenario, measure) -> np.ndarray:
    """The times a measure has a value at: window ends of a flow, reported times of a
    stock, in days since the start."""
    step = measure.window if measure.flow is not None else scenario.solver.report_every
    count = int(Fraction(scenario.days) / Fraction(step))
    return np.array([float(step * k) for k in range(1, count + 1)])


def _number_or_parameter(reader: Reader, scenario: Scenario, value: object, path: str,
                         upper: float) -> float | str:
    """A positive number at most ``upper``, or the name of a scalar parameter."""
    if isinstance(value, str):
        parameter = scenario.parameters.get(value)
        if parameter is None:
            raise reader.error(path, value, "neither a number nor a parameter's name",
                               f"parameters: {', '.join(scenario.parameters)}")
        if parameter.shape != "scalar":
            raise reader.error(path, value, "the parameter must be one number, not per group")
        return value
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not (
            0 < value <= upper):
        raise reader.error(path, value, f"must be a number in (0, {upper:g}] or a "
                           "parameter's name")
    return float(value)
