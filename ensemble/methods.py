"""The fixed-step one-step methods of ``[solver] method`` (reference.md), as data.

Explicit methods are Butcher tableaux (A, b, c): for a step of size h from (t, y),
stage i evaluates the flow rates ``r_i = R(t + c_i h, Y_i)`` with
``Y_i = y + h S sum_{j<i} A_ij r_j`` and the step moves ``h sum_i b_i r_i`` persons along
the flows (Butcher 2008, *Numerical Methods for Ordinary Differential Equations*, 2nd ed.,
ch. 2-3; Hairer, Norsett & Wanner 1993, *Solving Ordinary Differential Equations I*,
sec. II.1).  Section numbers here are cited from memory.

The implicit methods are members of the theta-method family
``y1 = y0 + h S [(1 - theta) R(t, y0) + theta R(t + h, y1)]`` (Hairer & Wanner 1996,
*Solving Ordinary Differential Equations II*, sec. IV.3; Dahlquist 1963): backward Euler
is theta = 1, the implicit trapezoidal rule theta = 1/2.  Forward Euler is theta = 0 of
the same family, but it needs no Newton solve, so it is given (and run) as its one-stage
tableau.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True, eq=False)
class Method:
    """One integration method.

    Attributes
    ----------
    name : the name a scenario gives in ``[solver] method`` (``"rk4"``, ``"backward-euler"``, ...).
    order : classical order of convergence p (used by the step check).
    a : (s, s) strictly lower-triangular Runge-Kutta matrix, or None for a theta method.
    b : (s,) weights, or None for a theta method.
    c : (s,) nodes, or None for a theta method.
    theta : weight of the end-of-step rate for the theta family, or None for an
        explicit tableau.
    """

    name: str
    order: int
    a: np.ndarray | None = None
    b: np.ndarray | None = None
    c: np.ndarray | None = None
    theta: float | None = None

    @property
    def implicit(self) -> bool:
        """True for the theta methods, which need a Newton solve per step."""
        return self.theta is not None

    @property
    def n_stages(self) -> int:
        """Rate evaluations held per step (two for a theta method: start and end)."""
        return 2 if self.implicit else len(self.b)


def _tableau(name: str, order: int, a: list[list[float]], b: list[float]) -> Method:
    """An explicit method from its tableau; the nodes are the row sums of A."""
    a_array = np.array(a, dtype=np.float64)
    return Method(name=name, order=order, a=a_array, b=np.array(b, dtype=np.float64),
                  c=a_array.sum(axis=1))


METHODS: dict[str, Method] = {
    # Euler 1768; the theta = 0 member of the theta family, run as a one-stage tableau.
    "forward-euler": _tableau("forward-euler", 1, [[0.0]], [1.0]),
    # Heun 1900: the explicit trapezoidal rule (Butcher 2008, ch. 2).
    "heun": _tableau("heun", 2, [[0.0, 0.0], [1.0, 0.0]], [0.5, 0.5]),
    # Kutta 1901, the classical fourth-order method (Hairer, Norsett & Wanner 1993, sec. II.1).
    "rk4": _tableau("rk4", 4,
                    [[0.0, 0.0, 0.0, 0.0],
                     [0.5, 0.0, 0.0, 0.0],
                     [0.0, 0.5, 0.0, 0.0],
                     [0.0, 0.0, 1.0, 0.0]],
                    [1 / 6, 1 / 3, 1 / 3, 1 / 6]),
    "backward-euler": Method(name="backward-euler", order=1, theta=1.0),
    "trapezoid": Method(name="trapezoid", order=2, theta=0.5),
}
"""Every method a scenario may choose, by the name it gives."""
