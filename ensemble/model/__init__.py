"""The lowered model: scalar IR trees (:mod:`.ir`), the one meaning of the expression
language's operations (:mod:`.lowering`), the rates of a scenario's model (:mod:`.lower`)
and its values constant in time (:mod:`.constants`), symbolic state derivatives
(:mod:`.derivatives`), the numpy evaluator of IR trees (:mod:`.numpy_program`) and the
numpy reference evaluator of the rates (:mod:`.numpy_rates`)."""

from ensemble.model.constants import ConstantTrees, time_varying_parameters
from ensemble.model.lower import LoweredModel, ScheduleSlot, lower_model
from ensemble.model.numpy_program import NumpyProgram
from ensemble.model.numpy_rates import RateFunctions

__all__ = ["ConstantTrees", "LoweredModel", "NumpyProgram", "RateFunctions", "ScheduleSlot",
           "lower_model", "time_varying_parameters"]
