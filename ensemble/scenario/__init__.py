"""Scenario files: the expression language, the validated dataclasses, and the loader."""

from ensemble.errors import ScenarioError, ScenarioErrors
from ensemble.scenario.load import load_scenario, scenario_warnings

__all__ = ["ScenarioError", "ScenarioErrors", "load_scenario", "scenario_warnings"]
