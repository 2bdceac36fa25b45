"""Fixed-step integration of chunks of members, with the per-member step check.

``chunk`` is the entry point (:func:`integrate_chunk`); ``reference`` the readable numpy
stepper whose arithmetic defines the results; ``refine`` the step check; ``kernels`` the
compiled backend (generated numba kernels), imported only when asked for.
"""

from ensemble.integrate.chunk import integrate_chunk
from ensemble.integrate.reference import Trajectory, integrate_fixed

__all__ = ["Trajectory", "integrate_chunk", "integrate_fixed"]
