"""The ``[[observations]]`` tables of a scenario: observed series of its measures, each
with the distribution of an observed count given a member's measure (``[[observations]]``
in the project's reference, ``ensemble/scenario/reference.md``).

Only what the scenario itself can tell is checked here (a known measure of one series,
a known distribution, numbers in range, names of scalar parameters constant in time), so
that a ``--set`` of any of these keys is checked like the file; the counts file is read
and checked against the measure's windows by ``ensemble fit`` (``ensemble.fit``).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from fractions import Fraction
from typing import Any

from ensemble.scenario.reader import Reader, is_number, key_path
from ensemble.scenario.schema import Measure, Observation, Parameter, Schedule, Variant

OBSERVATION_DISTRIBUTIONS = ("poisson", "negative-binomial")
"""The distributions an observed count may follow: Poisson with mean ``reporting`` x
the measure, or negative binomial with that mean and dispersion k (variance
mean + mean^2 / k)."""

AS_OBSERVED_SUFFIX = "_as_observed"
"""An observed measure ``<name>`` is written a second time as it would be observed, as
``measure_<name>_as_observed``, so no other measure may be named ``<name>_as_observed``."""

OBSERVATION_KEYS = ("file", "measure", "distribution", "dispersion", "reporting", "delay")
"""The keys of an ``[[observations]]`` table."""


def read_observations(reader: Reader, value: object, measures: Sequence[Measure],
                      groups: tuple[str, ...] | None, parameters: Mapping[str, Parameter],
                      variants: Sequence[Variant], days: Fraction,
                      time_varying: frozenset[str] = frozenset()
                      ) -> tuple[Observation, ...]:
    """Every ``[[observations]]`` table, checked against the scenario's measures and
    parameters (``time_varying``: the parameters that change with time).

    Raises
    ------
    ScenarioError
        (or :class:`~ensemble.errors.ScenarioErrors`) naming the key and value.
    """
    if not isinstance(value, list) or not all(isinstance(t, dict) for t in value):
        raise reader.error("observations", value,
                           "must be an array of tables [[observations]]")
    mark = len(reader.errors)
    found = [reader.attempt(_read_observation, reader, table, f"observations[{i}]",
                            measures, groups, parameters, variants, days, time_varying)
             for i, table in enumerate(value)]
    reader.abandon_if_failed(mark)
    return tuple(observation for observation in found if observation is not None)


def _read_observation(reader: Reader, value: object, path: str,
                      measures: Sequence[Measure], groups: tuple[str, ...] | None,
                      parameters: Mapping[str, Parameter], variants: Sequence[Variant],
                      days: Fraction, time_varying: frozenset[str]) -> Observation:
    table: dict[str, Any] = reader.table(value, path, OBSERVATION_KEYS)
    file = reader.get(table, path, "file", reader.string)
    if not file.strip():
        raise reader.error(key_path(path, "file"), file, "must name a counts file")
    by_name = {m.name: m for m in measures}
    measure = reader.get(table, path, "measure", reader.string)
    if measure not in by_name:
        raise reader.error(key_path(path, "measure"), measure, "no measure of that name",
                           f"measures: {', '.join(by_name) or 'none ([[measures]])'}")
    if measure + AS_OBSERVED_SUFFIX in by_name:
        raise reader.error(key_path(path, "measure"), measure,
                           f"measure {measure + AS_OBSERVED_SUFFIX!r} would have the name of "
                           "this measure as observed", "rename that measure")
    if by_name[measure].groups == "each" and groups and len(groups) > 1:
        raise reader.error(key_path(path, "measure"), measure,
                           "an observed measure must be one series, not one per group",
                           "give the measure groups = \"sum\" or a list of groups")
    distribution = reader.get(table, path, "distribution", reader.string, "poisson")
    if distribution not in OBSERVATION_DISTRIBUTIONS:
        raise reader.error(key_path(path, "distribution"), distribution,
                           f"must be one of {', '.join(OBSERVATION_DISTRIBUTIONS)}")
    dispersion = None
    where = key_path(path, "dispersion")
    if distribution == "negative-binomial":
        if "dispersion" not in table:
            raise reader.error(where, None, "a negative-binomial series needs a dispersion")
        dispersion = _number_or_parameter(reader, table["dispersion"], where, math.inf,
                                          parameters, variants, time_varying)
    elif "dispersion" in table:
        raise reader.error(where, table["dispersion"],
                           "only a negative-binomial series has a dispersion")
    reporting = _number_or_parameter(reader, table.get("reporting", 1.0),
                                     key_path(path, "reporting"), 1.0, parameters, variants,
                                     time_varying)
    delay = table.get("delay", 0)
    if not is_number(delay) or not 0 <= float(delay) < float(days):
        raise reader.error(key_path(path, "delay"), delay,
                           "a delay is a number of days at least 0, less than the horizon")
    return Observation(path, file, measure, distribution, dispersion, reporting,
                       float(delay))


def _number_or_parameter(reader: Reader, value: object, path: str, upper: float,
                         parameters: Mapping[str, Parameter], variants: Sequence[Variant],
                         time_varying: frozenset[str]) -> float | str:
    """A positive number at most ``upper``, or the name of a scalar parameter that is
    constant in time in the base scenario and every variant."""
    if isinstance(value, str):
        parameter = parameters.get(value)
        if parameter is None:
            raise reader.error(path, value, "neither a number nor a parameter's name",
                               f"parameters: {', '.join(parameters)}")
        forms = [parameter] + [v.parameters[value] for v in variants
                               if value in v.parameters]
        if any(form.shape != "scalar" for form in forms):
            raise reader.error(path, value, "the parameter must be one number, not per group")
        if value in time_varying or any(isinstance(form.form, Schedule) for form in forms):
            raise reader.error(path, value, "the parameter must be constant in time, not a "
                                            "schedule")
        return value
    if not is_number(value) or not math.isfinite(float(value)) or not (
            0 < float(value) <= upper):
        raise reader.error(path, value, f"must be a number in (0, {upper:g}] or a "
                                        "parameter's name")
    return float(value)
