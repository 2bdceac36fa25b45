"""The compiled model: scalar rate trees (:mod:`.ir`), their lowering from a scenario
(:mod:`.compile`), symbolic state derivatives (:mod:`.derivatives`) and the numpy
reference evaluator (:mod:`.evaluate`)."""

from ensemble.model.compile import (CompiledModel, ScheduleSlot, compile_model,
                                    time_varying_parameters)
from ensemble.model.evaluate import RateFunctions

__all__ = ["CompiledModel", "RateFunctions", "ScheduleSlot", "compile_model",
           "time_varying_parameters"]
