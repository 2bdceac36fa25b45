"""Fixed-step integration of chunks of members, with the per-member step check."""

from ensemble.integrate.check import integrate_chunk
from ensemble.records import ChunkResult
from ensemble.methods import METHODS, Method
from ensemble.integrate.stepper import Trajectory, integrate_fixed

__all__ = ["METHODS", "ChunkResult", "Method", "Trajectory", "integrate_chunk",
           "integrate_fixed"]
