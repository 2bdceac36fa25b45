"""The scenario's members as a likelihood: particles of :mod:`ensemble.fit.smc` become
members (their uniform draws), run through the same design and integration as a run's
chunks, and their measures are compared with the ``[[observations]]``.

The fit uses the first variant (observations describe what already happened, before
the variants part); the posterior members are then projected for every variant
(``ensemble fit`` in the README) as a run's chunks are (:mod:`ensemble.fit.result`).

A round's particles are split into chunks of the problem's size.  In this process they
are integrated one after another (:meth:`FitProblem.log_likelihood`); on the run's dask
workers (:class:`LikelihoodOnWorkers`) each chunk is one task, a pure function of the
problem and the chunk's particles, gathered in chunk order: a chunk's numbers do not
depend on where it was computed, so the log-likelihoods keep their bits whatever the
workers, and a task whose worker dies is computed again elsewhere.
"""

from __future__ import annotations

import dataclasses
import hashlib
import itertools
import uuid

import numpy as np
from distributed import Client, Future
from scipy import special

from ensemble.errors import ScenarioError
from ensemble.fit.likelihood import series_log_likelihood
from ensemble.fit.observations import scenario_observations
from ensemble.integrate.chunk import integrate_chunk
from ensemble.output.layout import ResultLayout
from ensemble.output.measures import measure_series, measure_shapes
from ensemble.records import ChunkKey
from ensemble.run.executors import chunk_failed
from ensemble.run.layout import lowered_models, result_layout
from ensemble.run.plan import fingerprint
from ensemble.run.tasks import Uniforms
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

    Raises
    ------
    ScenarioError : no observations, nothing drawn, or an observed measure per group.
    """

    def __init__(self, scenario: Scenario, backend: str, chunk: int):
        self.scenario = scenario
        self.backend = backend
        self.chunk = chunk
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

    def uniforms(self, z: np.ndarray) -> Uniforms:
        """The uniform draws of the particles ``z`` (dimension, particles): coordinate j
        through the normal CDF is column j's draw
        (:func:`ensemble.fit.smc.parameters_from_normal`)."""
        uniform = special.ndtr(z)
        return {key: uniform[j] for j, key in enumerate(self.columns)}

    def parts(self, particles: int) -> list[slice]:
        """The chunks of ``particles`` particles, in order."""
        return [slice(begin, min(begin + self.chunk, particles))
                for begin in range(0, particles, self.chunk)]

    def log_likelihood(self, z: np.ndarray) -> np.ndarray:
        """(particles,) the log-likelihood of every observed series for each particle of
        the first variant, a chunk after another in this process; minus infinity for a
        member with any status bit."""
        total = np.zeros(z.shape[1])
        for part in self.parts(z.shape[1]):
            total[part] = self.chunk_log_likelihood(z[:, part])
        return total

    def chunk_log_likelihood(self, z: np.ndarray, kernel_threads: int | None = None
                             ) -> np.ndarray:
        """The log-likelihood of the particles ``z`` of one chunk (first variant); a pure
        function of the problem and ``z``.  ``kernel_threads`` sets the threads of the
        compiled kernels in the calling thread (1 in a dask worker, whose siblings use
        the other cores), as a run's tasks do."""
        if kernel_threads is not None and self.backend == "compiled":
            from ensemble.integrate.kernels.launch import set_kernel_threads

            set_kernel_threads(kernel_threads)
        design = design_from_uniforms(self.scenario, self.scenario.variants[0],
                                      self.models[0], self.uniforms(z))
        result = integrate_chunk(self.models[0], design, self.scenario.solver,
                                 self.scenario.n_reports, self.backend)
        trajectories = {"state": result.state, "flow_count": result.flow_count}
        total = np.zeros(result.status.shape[0])
        for series, shape, where in zip(self.series, self._shapes, self._where):
            values = measure_series(self.layout, shape, trajectories)[:, 0, where]
            total += series_log_likelihood(
                series.counts, values.T, series.distribution,
                _per_member(series.reporting, design),
                _per_member(series.dispersion, design))
        return np.where(result.status != 0, -np.inf, total)


def worker_chunk_log_likelihood(problem: FitProblem, z: np.ndarray) -> np.ndarray:
    """One dask task: :meth:`FitProblem.chunk_log_likelihood` with the compiled kernels
    kept in the worker thread."""
    return problem.chunk_log_likelihood(z, kernel_threads=1)


def _itself(problem: FitProblem) -> FitProblem:
    """The problem, as the result of a task (see :class:`LikelihoodOnWorkers`)."""
    return problem


class LikelihoodOnWorkers:
    """The log-likelihood of a round's particles, computed by ``client``'s workers.

    The problem (scenario, lowered models, layout, observations) goes to the cluster
    once, as the result of a task that returns it: the scheduler keeps that task, so a
    worker that joins later fetches the problem from another, and if every worker that
    held it dies the task is simply run again (data scattered to the workers would be
    lost with them).  Each chunk's particles travel as a small array.
    """

    def __init__(self, client: Client, problem: FitProblem):
        self.client = client
        self.problem = problem
        self._fit = uuid.uuid4().hex    # a scheduler may serve several drivers
        self._calls = itertools.count()
        self._held: Future = client.submit(_itself, problem, pure=False,
                                           key=f"ensemble-fit-{self._fit}-problem")

    def __call__(self, z: np.ndarray) -> np.ndarray:
        """(particles,) as :meth:`FitProblem.log_likelihood` gives, bit for bit.

        Raises
        ------
        ensemble.errors.RunFailed : a chunk's task failed (its own error, or it kept
            killing its workers).
        """
        call = next(self._calls)
        parts = self.problem.parts(z.shape[1])
        futures = [self.client.submit(
            worker_chunk_log_likelihood, self._held, np.ascontiguousarray(z[:, part]),
            pure=False, key=f"ensemble-fit-{self._fit}-{call}-{part.start}")
            for part in parts]
        total = np.zeros(z.shape[1])
        try:
            for part, future in zip(parts, futures):
                try:
                    total[part] = future.result()
                except Exception as error:  # the task's own error, or KilledWorker
                    key: ChunkKey = (0, part.start, part.stop)
                    raise chunk_failed(self.problem.scenario, key, error) from error
        finally:
            self.client.cancel(futures)
        return total

    def close(self) -> None:
        """Let the cluster forget the problem."""
        self._held.release()


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
