"""The basic reproduction number R0 of a lowered model by the next-generation matrix.

Following van den Driessche & Watmough (2002, "Reproduction numbers and sub-threshold
endemic equilibria for compartmental models of disease transmission", Math. Biosci.
180:29-48), after Diekmann, Heesterbeek & Metz (1990, "On the definition and the
computation of the basic reproduction ratio R0 in models for infectious diseases in
heterogeneous populations", J. Math. Biol. 28:365-382): with x the states of the
infected compartments (every stage and group), dx/dt = F(x) - V(x), where F holds the
rates at which new infections appear and V the other moves of the infected (V^- - V^+).
With F and V the Jacobians of those at a disease-free state, R0 is the spectral radius
of F V^-1.

Here a flow element is a new infection when it moves persons into an infected state from
outside the infected compartments; every other flow element that takes from or gives to
an infected state is a transfer.  The Jacobians come from the model's exact partial
derivatives of the rates (:mod:`ensemble.model.derivatives`), evaluated per member by the
numpy evaluator of IR trees.

Which compartments are infected is declared (``[model] infected``) or inferred from the
flows (:func:`infected_compartments`).
"""

from __future__ import annotations

import threading
from collections.abc import Hashable, Sequence
from dataclasses import dataclass

import numpy as np

from ensemble.model.ir import ScalarNode
from ensemble.model.lower import LoweredModel
from ensemble.model.numpy_program import NumpyProgram
from ensemble.model.spectra import spectral_radii
from ensemble.scenario.expressions import names_in
from ensemble.scenario.schema import Model


RECENT_MODELS = 8
"""Models whose next-generation machinery a process keeps
(:meth:`NextGeneration.for_model`): a run's variants, a few at a time."""


@dataclass(frozen=True)
class Infected:
    """The infected compartments of a model, or None where they cannot be told, and
    how they were found (for ``ensemble check``)."""

    compartments: tuple[str, ...] | None
    note: str


def infected_compartments(model: Model) -> Infected:
    """The infected compartments: declared in ``model.infected``, else inferred.

    Inference: an infection flow leaves a compartment (a susceptible one) and has a rate
    that uses another compartment (not ``N``); the infected compartments are those on a
    path of flows from the target of an infection flow to a compartment an infection rate
    uses (both included) that passes through no susceptible compartment.  It is
    unambiguous when there is an infection flow and no susceptible compartment is the
    target of an infection flow or used by an infection rate.
    """
    if model.infected is not None:
        return Infected(model.infected, "declared in model.infected")
    compartments = set(model.compartments)
    infections = [flow for flow in model.flows if flow.source is not None and flow.target
                  and (names_in(flow.rate.tree) & compartments) - {flow.source}]
    if not infections:
        return Infected(None, "no flow's rate uses a compartment other than the one it "
                              "leaves, so no flow is an infection: declare model.infected")
    targets = {flow.target for flow in infections}
    spreading = set().union(*((names_in(f.rate.tree) & compartments) - {f.source}
                              for f in infections))
    susceptible = {flow.source for flow in infections}
    edges = {(f.source, f.target) for f in model.flows
             if f.source and f.target and not {f.source, f.target} & susceptible}
    after = _reachable(targets, edges)
    before = _reachable(spreading, {(b, a) for a, b in edges})
    infected = tuple(c for c in model.compartments if c in after and c in before)
    both = sorted(susceptible & (targets | spreading))
    if not infected or both:
        reason = (f"{', '.join(both)} both leaves by an infection flow and spreads or "
                  "receives infection" if both else "no path of flows leads from an "
                  "infection to a compartment that spreads it")
        return Infected(None, f"the flows do not tell the infected compartments apart "
                              f"({reason}): declare model.infected")
    names = ", ".join(f.name for f in infections)
    return Infected(infected, f"inferred from the flows; infection by {names}")


def _reachable(start: set[str], edges: set[tuple[str, str]]) -> set[str]:
    found, pending = set(start), list(start)
    while pending:
        current = pending.pop()
        for a, b in edges:
            if a == current and b not in found:
                found.add(b)
                pending.append(b)
    return found


class NextGeneration:
    """F and V of a lowered model and its R0, for a chunk of members.

    Parameters
    ----------
    model : the lowered model.
    infected : its infected compartments.

    Attributes
    ----------
    states : the infected state rows, ascending (the rows and columns of F and V).
    """

    _recent: dict[Hashable, NextGeneration] = {}
    _recent_lock = threading.Lock()

    @classmethod
    def for_model(cls, model: LoweredModel, infected: Sequence[str]) -> NextGeneration:
        """The machinery of ``model`` and ``infected``, built once per process for the
        last :data:`RECENT_MODELS` models and shared by every chunk and thread (it holds
        no per-member state).

        A chunk's task gets its own copy of the model, so the models are told apart by
        what the machinery is built from (the infected compartments, the state rows'
        compartments, the stoichiometry and the rates' partial derivatives), compared in
        full: building it generates and compiles an evaluator of every partial derivative
        (about 0.1 s for a 16-group model), comparing costs a tenth of that.
        """
        key = (tuple(infected), model.state_compartments, model.stoichiometry.shape,
               model.stoichiometry.tobytes(), model.rate_derivatives)
        with cls._recent_lock:
            known = cls._recent.get(key)
        if known is not None:
            return known
        built = cls(model, infected)
        with cls._recent_lock:
            if len(cls._recent) >= RECENT_MODELS:
                cls._recent.clear()
            cls._recent[key] = built
        return built

    def __init__(self, model: LoweredModel, infected: Sequence[str]):
        self.states = [i for i, c in enumerate(model.state_compartments) if c in infected]
        position = {state: n for n, state in enumerate(self.states)}
        stoichiometry = model.stoichiometry
        roots: list[ScalarNode] = []
        plan: list[tuple[int, int, int, float]] = []   # (F or V, row, column, sign)
        for k, partials in enumerate(model.rate_derivatives):
            touched = [i for i in np.flatnonzero(stoichiometry[:, k]) if i in position]
            if not touched:
                continue
            source = np.flatnonzero(stoichiometry[:, k] < 0)
            new = len(touched) == 1 and stoichiometry[touched[0], k] > 0 and not (
                source.size and int(source[0]) in position)
            for state, tree in partials:
                if state not in position:
                    continue
                for i in touched:
                    sign = stoichiometry[i, k] if new else -stoichiometry[i, k]
                    plan.append((0 if new else 1, position[i], position[state], float(sign)))
                    roots.append(tree)
        self._plan = plan
        self._program = NumpyProgram("next_generation", roots) if roots else None

    def matrices(self, y: np.ndarray, p: np.ndarray, s: np.ndarray, t: float = 0.0
                 ) -> tuple[np.ndarray, np.ndarray]:
        """F and V, each (M, n, n), at states ``y`` (n_states, M), parameter slots ``p``
        and schedule values ``s`` in force at time ``t``."""
        n, members = len(self.states), y.shape[1]
        both = np.zeros((2, members, n, n))
        if self._program is None:
            return both[0], both[1]
        values = self._program(t, y, p, s, np.empty((len(self._plan), members)))
        for (which, row, column, sign), value in zip(self._plan, values):
            both[which, :, row, column] += sign * value
        return both[0], both[1]

    def basic_reproduction_number(self, y: np.ndarray, p: np.ndarray, s: np.ndarray,
                                  t: float = 0.0) -> np.ndarray:
        """(M,) the spectral radius of F V^-1 at ``y`` (a disease-free state); NaN for a
        member whose V is singular or whose values are not finite."""
        transmission, transition = self.matrices(y, p, s, t)
        members = y.shape[1]
        if not self.states:
            return np.full(members, np.nan)
        usable = (np.isfinite(transmission).all(axis=(1, 2))
                  & np.isfinite(transition).all(axis=(1, 2)))
        product = np.full(transmission.shape, np.nan)
        chosen = np.flatnonzero(usable)
        # F V^-1 = (V^-T F^T)^T, solved member by member within one LAPACK call
        left, right = transition[chosen].swapaxes(1, 2), transmission[chosen].swapaxes(1, 2)
        try:
            product[chosen] = np.linalg.solve(left, right).swapaxes(1, 2)
        except np.linalg.LinAlgError:   # a singular V: the others one by one
            for m, a, b in zip(chosen, left, right):
                try:
                    product[m] = np.linalg.solve(a, b).T
                except np.linalg.LinAlgError:
                    pass
        return spectral_radii(product)
