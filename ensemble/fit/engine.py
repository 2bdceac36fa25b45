"""The scenario's members as a likelihood: particles of :mod:`ensemble.fit.smc` become
members (their uniform draws), run through the same design and integration as a run's
chunks, and their measures are compared with the ``[[observations]]``.

The fit uses the first variant (observations describe what already happened, before
the variants part); the posterior members are then projected for every variant
(``ensemble fit`` in the README), a chunk at a time (:func:`posterior_chunk`), so that
the caller can save each chunk into a run's work journal instead of holding them all.
With ``workers``, the chunks of a round's likelihood are integrated by that many threads;
each chunk's numbers are those of one thread, so the log-likelihoods keep their bits.
"""

from __future__ import annotations

import dataclasses
import hashlib
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from scipy import special

from ensemble.errors import ScenarioError
from ensemble.fit.likelihood import series_log_likelihood
from ensemble.fit.observations import scenario_observations
from ensemble.integrate.chunk import integrate_chunk
from ensemble.output.layout import ResultLayout
from ensemble.output.measures import measure_series, measure_shapes
from ensemble.records import ChunkKey, ChunkResult
from ensemble.run.layout import lowered_models, result_layout
from ensemble.run.plan import fingerprint
from ensemble.sampling.design import Design, design_from_uniforms
from ensemble.sampling.uniform import uncertain_columns
from ensemble.scenario.schema import Scenario


class FitProblem:
    """A scenario with observations, as the log-likelihood of particles.

    Parameters
    ----------
    scenario : a scenario with at least one ``[[observations]]`` table and at least one
        drawn parameter.
    backend : the integration backend (``"numpy"`` or ``"compiled"``).
    chunk : members integrated at once (bounds memory; changes no number).
    workers : threads integrating the chunks of a round at once (1: this thread).

    Raises
    ------
    ScenarioError : no observations, nothing drawn, or an observed measure per group.
    """

    def __init__(self, scenario: Scenario, backend: str, chunk: int, workers: int = 1):
        self.scenario = scenario
        self.backend = backend
        self.chunk = chunk
        self.workers = max(1, int(workers))
        self.series = scenario_observations(scenario)
        file = scenario.source.path
        if not self.series:
            raise ScenarioError(file, "observations", None,
                                "ensemble fit needs at least one [[observations]] table")
        self.columns = uncertain_columns(scenario)
        if not self.columns:
            raise ScenarioError(file, "parameters", None,
                                "nothing to fit: no parameter has a distribution")
        self.models = lowered_models(scenario)
        self.layout = result_layout(scenario, self.models, fingerprint(scenario, backend),
                                    history="ensemble fit")
        shapes = {shape.name: shape for shape in measure_shapes(self.layout)}
        self._where = []
        for series in self.series:
            shape = shapes[series.measure]
            if len(shape.group_rows) != 1:
                raise ScenarioError(file, f"{series.key}.measure", series.measure,
                                    "an observed measure must be one series, not per group")
            self._where.append(np.array([int(np.argmin(np.abs(shape.times - t)))
                                         for t in series.times]))
        self._shapes = [shapes[series.measure] for series in self.series]

    @property
    def dimension(self) -> int:
        """The number of coordinates of a particle: the scenario's drawn columns."""
        return len(self.columns)

    def designs(self, z: np.ndarray, variant: int) -> Iterator[tuple[slice, Design]]:
        """The designs of the particles ``z`` (dimension, particles) for ``variant``, a
        chunk at a time: coordinate j through the normal CDF is column j's uniform draw
        (:func:`ensemble.fit.smc.parameters_from_normal`)."""
        uniform = special.ndtr(z)
        for begin in range(0, z.shape[1], self.chunk):
            part = slice(begin, min(begin + self.chunk, z.shape[1]))
            draws = {key: uniform[j, part] for j, key in enumerate(self.columns)}
            yield part, design_from_uniforms(self.scenario, self.scenario.variants[variant],
                                             self.models[variant], draws)

    def keep_kernels_in_this_thread(self) -> None:
        """Run the compiled kernels of this thread in it alone (a worker thread, whose
        siblings use the other cores)."""
        if self.backend == "compiled":
            from ensemble.integrate.kernels.launch import set_kernel_threads

            set_kernel_threads(1)

    def integrate(self, design: Design, variant: int) -> ChunkResult:
        """The chunk of ``design``'s members, as a run integrates it."""
        return integrate_chunk(self.models[variant], design, self.scenario.solver,
                               self.scenario.n_reports, self.backend)

    def log_likelihood(self, z: np.ndarray) -> np.ndarray:
        """(particles,) the log-likelihood of every observed series for each particle of
        the first variant; minus infinity for a member with any status bit."""
        total = np.zeros(z.shape[1])
        parts = self.designs(z, 0)
        if self.workers == 1:
            for part, design in parts:
                total[part] = self._chunk_log_likelihood(design)
            return total
        with ThreadPoolExecutor(self.workers, "ensemble-fit") as pool:
            running = [(part, pool.submit(self._chunk_log_likelihood, design, True))
                       for part, design in parts]
            for part, future in running:
                total[part] = future.result()
        return total

    def _chunk_log_likelihood(self, design: Design, one_thread: bool = False) -> np.ndarray:
        """The log-likelihood of ``design``'s members (first variant); with
        ``one_thread`` the compiled kernels stay in the calling thread (a worker)."""
        if one_thread:
            self.keep_kernels_in_this_thread()
        result = self.integrate(design, 0)
        trajectories = {"state": result.state, "flow_count": result.flow_count}
        total = np.zeros(result.status.shape[0])
        for series, shape, where in zip(self.series, self._shapes, self._where):
            values = measure_series(self.layout, shape, trajectories)[:, 0, where]
            total += series_log_likelihood(
                series.counts, values.T, series.distribution,
                _per_member(series.reporting, design),
                _per_member(series.dispersion, design))
        return np.where(result.status != 0, -np.inf, total)


def _per_member(value: float | str | None, design: Design) -> np.ndarray | float | None:
    """A number as it is, or a parameter's name as each member's value."""
    return design.reported[value] if isinstance(value, str) else value


def posterior_layout(problem: FitProblem, z: np.ndarray) -> ResultLayout:
    """The layout of the result of the posterior members ``z``: the scenario with as many
    members as particles; its fingerprint follows from the run's and the particles' bits
    (so that a journal of another posterior is never taken for this one's)."""
    scenario = dataclasses.replace(problem.scenario, member_count=z.shape[1])
    digest = hashlib.sha256(fingerprint(scenario, problem.backend).encode())
    digest.update(np.ascontiguousarray(z, dtype=np.float64).tobytes())
    return result_layout(scenario, problem.models, digest.hexdigest(),
                         history="ensemble fit")


def posterior_keys(problem: FitProblem, particles: int) -> list[ChunkKey]:
    """The chunks of the projection of ``particles`` members, for every variant."""
    return [(variant, begin, min(begin + problem.chunk, particles))
            for variant in range(len(problem.scenario.variants))
            for begin in range(0, particles, problem.chunk)]


def posterior_chunk(problem: FitProblem, z: np.ndarray, key: ChunkKey
                    ) -> tuple[ChunkResult, dict[str, np.ndarray]]:
    """The chunk ``key`` (variant, first, end) of the posterior members ``z`` projected:
    its result (members numbered as particles) and its members' reported values."""
    variant, first, end = key
    uniform = special.ndtr(z[:, first:end])
    draws = {column: uniform[j] for j, column in enumerate(problem.columns)}
    design = design_from_uniforms(problem.scenario, problem.scenario.variants[variant],
                                  problem.models[variant], draws)
    result = problem.integrate(design, variant)
    members = np.arange(first, end, dtype=np.int64)
    return dataclasses.replace(result, members=members), dict(design.reported)

