"""What a kind of method contributes to a kernel: the interface of :mod:`.explicit` and
:mod:`.implicit`.

:class:`~.source.KernelSource` assembles the module around one :class:`StepCode`: its
generated functions go into the module's head, its work arrays at the start of each block,
its data among the kernel's arguments, and its lines inside the loop over the steps of a
report interval.
"""

from __future__ import annotations


import numpy as np

from ensemble.integrate.kernels.rates import RateCode


class StepCode:
    """Kernel code of one step of the method of ``rates.form``, evaluating the rates
    through ``rates``."""

    def __init__(self, rates: RateCode):
        self.rates = rates
        self.form = rates.form
        self.method = rates.form.method

    def buffers(self) -> list[str]:
        """Allocations of the per-block work arrays the step needs beyond the state."""
        return []

    def data_arguments(self) -> list[str]:
        """Names of the kernel's arguments holding the step's own data."""
        return []

    def data(self) -> list[np.ndarray]:
        """The arrays of :meth:`data_arguments`, in order."""
        return []

    def functions(self) -> list[str]:
        """Lines of the generated functions the step calls (beyond ``rates_at``)."""
        return []

    def lines(self, indent: str) -> list[str]:
        """Code of step ``step`` for every member of the block, at ``indent``."""
        raise NotImplementedError
