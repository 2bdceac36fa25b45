"""The layout of a run's result, read off its scenario and the scenario's lowered models
(the labels of compartments, groups and flows, and which parameters vary in time)."""

from __future__ import annotations

from collections.abc import Sequence

from ensemble.model import LoweredModel, lower_model, time_varying_parameters
from ensemble.model.constant_parts import refuse_non_finite_constants
from ensemble.output.layout import ResultLayout
from ensemble.scenario.schema import Scenario


def lowered_models(scenario: Scenario) -> list[LoweredModel]:
    """The lowered model of every variant of ``scenario``, in its order.

    Raises
    ------
    ensemble.errors.ScenarioError : a part of an expression made of numbers alone is not
        a finite number (:mod:`ensemble.model.constant_parts`).
    """
    refuse_non_finite_constants(scenario)
    return [lower_model(scenario, variant) for variant in scenario.variants]


def result_layout(scenario: Scenario, models: Sequence[LoweredModel], fingerprint: str,
                  history: str) -> ResultLayout:
    """The layout of ``scenario``'s result.

    Parameters
    ----------
    scenario : the validated scenario, with command-line overrides applied.
    models : the lowered model of every variant (:func:`lowered_models`).
    fingerprint, history : see :class:`~ensemble.output.layout.ResultLayout`.

    Raises
    ------
    ValueError : one model a variant is not given, or the models disagree on labels.
    """
    if len(models) != len(scenario.variants):
        raise ValueError(f"{len(models)} lowered models for {len(scenario.variants)} "
                         "variants")
    first = models[0]
    for model in models[1:]:
        if (model.compartments, model.groups, model.flows) != (
                first.compartments, first.groups, first.flows):
            raise ValueError("the lowered models of the variants disagree on labels")
    varying = set().union(*(time_varying_parameters(scenario.variant_parameters(variant))
                            for variant in scenario.variants))
    return ResultLayout.from_scenario(
        scenario, compartments=tuple(first.compartments), groups=first.groups,
        flows=tuple(first.flows), varying=varying, fingerprint=fingerprint,
        history=history)
