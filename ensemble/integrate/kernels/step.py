"""What a kind of method contributes to a kernel: the interface of :mod:`.explicit` and
:mod:`.implicit`.

:class:`~.source.KernelSource` assembles the module around one :class:`StepCode`: its
constants and copied functions go into the module's head, its generated functions after
them, its work arrays at the start of each block, and its lines inside the loop over the
steps of a report interval.
"""

from __future__ import annotations

from collections.abc import Callable

from ensemble.integrate.kernels.rates import Names, RateCode
from ensemble.methods import Method
from ensemble.model.ir import ScalarNode


class StepCode:
    """Kernel code of one step of ``method``, evaluating the rates through ``rates``."""

    def __init__(self, rates: RateCode, method: Method):
        self.rates = rates
        self.method = method

    def constants(self) -> list[str]:
        """Module-level constant definitions the step reads."""
        return []

    def support(self) -> list[Callable]:
        """Plain functions (beyond :mod:`.scalars`) whose source the kernel must hold."""
        return []

    def functions(self) -> list[str]:
        """Lines of the generated functions the step calls."""
        return []

    def buffers(self) -> list[str]:
        """Allocations of the per-block work arrays the step needs beyond the state."""
        return []

    def lines(self, indent: str, param_only: list[ScalarNode],
              time_names: dict[str, Names]) -> list[str]:
        """Code of step ``step`` for every member of the block, at ``indent``;
        ``param_only`` are the rate subtrees of parameters alone, ``time_names`` the
        variables of each stage's subtrees of time alone."""
        raise NotImplementedError
