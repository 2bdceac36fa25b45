"""The numpy reference evaluator of a lowered model's rates over a chunk of members.

:class:`RateFunctions` turns the scalar IR of a :class:`~ensemble.model.lower.LoweredModel`
into two functions over rows of member arrays (states x members): the flow rates and
their non-zero partial derivatives with respect to the state, each a
:class:`~ensemble.model.numpy_program.NumpyProgram`.

All members share the stage time ``t`` (a float); ``y`` is (n_states, M), ``p``
(n_parameter_slots, M), ``s`` (n_schedule_slots, M).  Arithmetic runs under
``numpy.errstate(all="ignore")``: a member whose values become invalid gets NaN or inf
silently, and the integrator flags it.
"""

from __future__ import annotations


import numpy as np
import scipy.sparse

from ensemble.model.lower import LoweredModel
from ensemble.model.numpy_program import NumpyProgram

_ASSEMBLY_BLOCK_BYTES = 8 * 2**20
"""Size of the temporary that :meth:`RateFunctions.state_jacobian` assembles at a time."""


class RateFunctions:
    """Flow rates and their state derivatives for a chunk of members, in numpy.

    Parameters
    ----------
    model : the lowered model.

    Attributes
    ----------
    model : the lowered model.
    jacobian_flow, jacobian_state : (nnz,) intp, the flow element and state row of each
        non-zero partial derivative, in the order :meth:`rate_jacobian` writes them
        (flow elements in order, each one's states ascending).
    source : the generated Python source, for reading and debugging.
    """

    def __init__(self, model: LoweredModel):
        self.model = model
        pattern = [(k, j, tree) for k, partials in enumerate(model.rate_derivatives)
                   for j, tree in partials]
        self.jacobian_flow = np.array([k for k, _, _ in pattern], dtype=np.intp)
        self.jacobian_state = np.array([j for _, j, _ in pattern], dtype=np.intp)
        self._programs = {"rates": NumpyProgram("rates", model.rates),
                          "rate_jacobian": NumpyProgram("rate_jacobian",
                                                        [tree for _, _, tree in pattern])}
        self.source = "\n\n".join(program.source for program in self._programs.values())
        self._assembly = self._assembly_matrix()

    def __reduce__(self):
        return RateFunctions, (self.model,)

    @property
    def nnz(self) -> int:
        """Number of non-zero partial derivatives of the rates."""
        return len(self.jacobian_flow)

    def rates(self, t: float, y: np.ndarray, p: np.ndarray, s: np.ndarray,
              out: np.ndarray | None = None) -> np.ndarray:
        """Flow rates (n_flow_elements, M), persons per day, written into ``out``."""
        if out is None:
            out = np.empty((self.model.n_flow_elements, y.shape[1]))
        return self._call("rates", t, y, p, s, out)

    def rate_jacobian(self, t: float, y: np.ndarray, p: np.ndarray, s: np.ndarray,
                      out: np.ndarray | None = None) -> np.ndarray:
        """The non-zero partials d rate / d state (nnz, M), ordered as ``jacobian_flow``
        and ``jacobian_state``."""
        if out is None:
            out = np.empty((self.nnz, y.shape[1]))
        return self._call("rate_jacobian", t, y, p, s, out)

    def right_hand_side(self, t: float, y: np.ndarray, p: np.ndarray, s: np.ndarray,
                        out: np.ndarray | None = None,
                        rates: np.ndarray | None = None) -> np.ndarray:
        """dy/dt = stoichiometry @ rates, (n_states, M); ``rates`` receives the rates."""
        rates = self.rates(t, y, p, s, rates)
        if out is None:
            out = np.empty(y.shape)
        return np.matmul(self.model.stoichiometry, rates, out=out)

    def state_jacobian(self, partials: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """Dense Jacobian of the right-hand side, (M, n_states, n_states), from the
        partials of :meth:`rate_jacobian`: ``stoichiometry @ d rates / d y`` per member,
        laid out for a batched ``numpy.linalg.solve``."""
        n, members = self.model.n_states, partials.shape[1]
        if out is None:
            out = np.empty((members, n, n))
        block = max(1, _ASSEMBLY_BLOCK_BYTES // (8 * n * n))
        for start in range(0, members, block):
            stop = min(start + block, members)
            dense = self._assembly @ partials[:, start:stop]
            out[start:stop] = dense.T.reshape(stop - start, n, n)
        return out

    def _call(self, name: str, t: float, y: np.ndarray, p: np.ndarray, s: np.ndarray,
              out: np.ndarray) -> np.ndarray:
        return self._programs[name](t, y, p, s, out)

    def _assembly_matrix(self) -> scipy.sparse.csr_array:
        """Sparse (n_states**2, nnz) map from the partials to the flattened Jacobian:
        entry (i * n + j, e) is stoichiometry[i, flow e] for j the state of partial e."""
        n = self.model.n_states
        stoichiometry = self.model.stoichiometry
        rows, columns, values = [], [], []
        for e, (k, j) in enumerate(zip(self.jacobian_flow, self.jacobian_state)):
            for i in np.flatnonzero(stoichiometry[:, k]):
                rows.append(i * n + j)
                columns.append(e)
                values.append(stoichiometry[i, k])
        return scipy.sparse.csr_array((values, (rows, columns)), shape=(n * n, self.nnz))
