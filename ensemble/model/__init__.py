"""The lowered model: scalar rate trees (:mod:`.ir`), their lowering from a scenario
(:mod:`.lower`), symbolic state derivatives (:mod:`.derivatives`) and the numpy
reference evaluator of the rates (:mod:`.numpy_rates`)."""

from ensemble.model.lower import (LoweredModel, ScheduleSlot, lower_model,
                                  time_varying_parameters)
from ensemble.model.numpy_rates import RateFunctions

__all__ = ["LoweredModel", "RateFunctions", "ScheduleSlot", "lower_model",
           "time_varying_parameters"]
