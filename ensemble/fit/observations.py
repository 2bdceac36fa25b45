"""The ``[[observations]]`` of a scenario with their counts: observed series that
``ensemble fit`` conditions the ensemble on, each tied to a measure (``[[observations]]``
in the project's reference, ``ensemble/scenario/reference.md``).

The tables themselves are read and checked with the scenario
(:mod:`ensemble.scenario.observations`, so that ``--set`` reaches them); here each
table's counts file is read (:mod:`ensemble.fit.counts_file`) and its dates checked
against the measure's windows. A row dated d with a reporting delay of L days counts the
measure's window that ends on day d - L after the start (a flow measure), or the measure
at that reported time (a stock). Every problem is a
:class:`~ensemble.errors.ScenarioError` naming the scenario's key or the counts file's
line.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import numpy as np

from ensemble.errors import ScenarioError
from ensemble.fit.counts_file import read_counts
from ensemble.scenario.schema import Measure, Observation, Scenario


@dataclass(frozen=True, kw_only=True)
class ObservedSeries(Observation):
    """One observed series with its counts, checked against the scenario: the table's
    :class:`~ensemble.scenario.schema.Observation` with ``file`` resolved against the
    scenario's directory, and

    Attributes
    ----------
    times : each row's time in the model, in days since the start (window ends).
    counts : each row's count, NaN where missing.
    """

    times: np.ndarray
    counts: np.ndarray

    @property
    def last_time(self) -> float:
        """The time of the last observed (not missing) count, in days since the start."""
        seen = self.times[~np.isnan(self.counts)]
        return float(seen.max()) if seen.size else math.nan


def scenario_observations(scenario: Scenario) -> tuple[ObservedSeries, ...]:
    """The scenario's ``[[observations]]`` (``Scenario.observations``, after any
    ``--set``) with their counts files read and checked against the measures' windows.

    Raises
    ------
    ScenarioError : naming the counts file's line.
    """
    return tuple(_read_series(scenario, observation)
                 for observation in scenario.observations)


def _read_series(scenario: Scenario, observation: Observation) -> ObservedSeries:
    measure = next(m for m in scenario.measures if m.name == observation.measure)
    file = Path(scenario.source.path).parent / observation.file
    counts = read_counts(file, error=ScenarioError)
    times = counts.days_since(scenario.start) - observation.delay
    grid = _grid(scenario, measure)
    for time, line, date in zip(times, counts.lines, counts.dates):
        if not 0 < time <= float(scenario.days):
            raise counts.refused(line, "date", str(date),
                                 f"outside the horizon of {observation.key} (days 0 to "
                                 f"{float(scenario.days):g} after the start, less the delay)")
        if not np.any(np.isclose(grid, time, rtol=0.0, atol=1e-9)):
            raise counts.refused(line, "date", str(date),
                                 f"not the end of a window of measure {measure.name!r} "
                                 f"(every {float(measure.window):g} days from the "
                                 "start, after the delay)")
    return ObservedSeries(**{**vars(observation), "file": str(file)}, times=times,
                          counts=counts.values)


def _grid(scenario: Scenario, measure: Measure) -> np.ndarray:
    """The times a measure has a value at: window ends of a flow, reported times of a
    stock, in days since the start."""
    step = measure.window if measure.flow is not None else scenario.solver.report_every
    count = int(Fraction(scenario.days) / Fraction(step))
    return np.array([float(step * k) for k in range(1, count + 1)])
