"""``ensemble fit``: condition a scenario's ensemble on its ``[[observations]]`` by tempered
sequential Monte Carlo (:mod:`ensemble.fit.smc`) and write a result file whose members
are the posterior, projected for every variant.

The file is a result file as ``ensemble run`` writes it (the same variables, read by
``summary``, ``score`` and ``open_result``), with ``member`` the equally weighted
posterior particles, plus each member's log-likelihood and the rounds of the fit
(``ensemble/scenario/reference.md``, the result of a fit).

The posterior members are projected as a run's chunks are: each chunk is saved into a
work journal (:class:`ensemble.run.journal.WorkJournal`, in
``<output>.fit-partial/projection.nc.partial``) as soon as it is integrated, and the
file is written from the saved chunks by the run's finish, block by block, so that
memory does not grow with members times reported times; a resumed fit keeps the chunks
already saved.  The fit's own variables are then added to that file, which is moved to
``output`` last.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import xarray as xr

from ensemble.durable import fsync_directory
from ensemble.fit.checkpoint import load_state, partial_directory, remove_state, save_state
from ensemble.fit.engine import FitProblem, posterior_chunk, posterior_keys, posterior_layout
from ensemble.fit.parameters_text import prior_variables
from ensemble.fit.smc import Posterior, Round, SamplerSettings, tempered_smc
from ensemble.output.dataset import time_attrs
from ensemble.records import ChunkKey, ChunkResult
from ensemble.run.journal import Checkpoints, WorkJournal
from ensemble.scenario.schema import Scenario

PROJECTION = "projection.nc"
"""The projection's file in the fit's directory until the fit's variables are added."""


def fit_and_write(scenario: Scenario, output: Path, settings: SamplerSettings, *,
                  backend: str, chunk: int, resume: bool = False, workers: int = 1,
                  report: Callable[[int, Round], None] | None = None) -> Posterior:
    """Fit ``scenario`` to its observations and write the posterior's result to
    ``output`` (whole or not at all), keeping the sampler's state after every round in
    ``<output>.fit-partial``; with ``resume``, go on from the state kept there (and from
    the projection's chunks saved there).  ``workers`` threads integrate the chunks of
    each round's likelihood and of the projection."""
    problem = FitProblem(scenario, backend, chunk, workers)
    key = f"{problem.layout.fingerprint} {settings}"
    directory = partial_directory(output)
    kept = load_state(directory, key) if resume else None
    posterior = tempered_smc(problem.log_likelihood, problem.dimension, settings, report,
                             checkpoint=lambda state: save_state(directory, key, state),
                             resume_from=kept)
    projection = project_posterior(problem, posterior.z, directory / PROJECTION, resume)
    fit_variables(posterior, problem).to_netcdf(projection, mode="a", engine="netcdf4")
    os.replace(projection, output)
    fsync_directory(output.parent)
    remove_state(directory)
    return posterior


def project_posterior(problem: FitProblem, z: np.ndarray, path: Path,
                      resume: bool) -> Path:
    """Write the result of the posterior members ``z`` projected for every variant to
    ``path``, through a run's work journal (its chunks kept for a resume)."""
    journal = WorkJournal.open(path, posterior_layout(problem, z), resume=resume,
                               force=True)
    try:
        pending = journal.pending(posterior_keys(problem, z.shape[1]))
        with Checkpoints(journal) as checkpoints:
            for key, (result, reported) in _projected(problem, z, pending):
                journal.save(key, result, reported, candidates=True)
                checkpoints.add(key)
    except BaseException:
        journal.close()
        raise
    return journal.finish(lambda key: posterior_chunk(problem, z, key)[0])


def _projected(problem: FitProblem, z: np.ndarray, keys: list[ChunkKey]
               ) -> Iterator[tuple[ChunkKey, tuple[ChunkResult, dict[str, np.ndarray]]]]:
    """Each chunk of ``keys`` projected, in order: in this thread, or by the problem's
    worker threads ``workers`` chunks at a time (so that at most that many wait to be
    saved)."""
    if problem.workers == 1:
        for key in keys:
            yield key, posterior_chunk(problem, z, key)
        return

    def in_worker(key: ChunkKey) -> tuple[ChunkResult, dict[str, np.ndarray]]:
        problem.keep_kernels_in_this_thread()
        return posterior_chunk(problem, z, key)

    with ThreadPoolExecutor(problem.workers, "ensemble-fit") as pool:
        for begin in range(0, len(keys), problem.workers):
            batch = keys[begin:begin + problem.workers]
            yield from zip(batch, pool.map(in_worker, batch))


def fit_variables(posterior: Posterior, problem: FitProblem) -> xr.Dataset:
    """Each member's log-likelihood, the rounds of the fit, the observations it saw and
    the prior quantiles of the parameters it drew, as variables added to its result."""
    rounds = posterior.rounds
    last = max((series.last_time for series in problem.series), default=np.nan)
    return xr.Dataset(dict(
        **observation_variables(problem), **prior_variables(problem.scenario),
        log_likelihood=xr.DataArray(
            posterior.log_likelihood, dims=("member",),
            attrs={"long_name": "log-likelihood of the observations for the member "
                                "(first variant)", "units": "1"}),
        fit_temperature=xr.DataArray(
            np.array([r.temperature for r in rounds]), dims=("fit_round",),
            attrs={"long_name": "temperature of each round of the fit", "units": "1"}),
        fit_effective_size=xr.DataArray(
            np.array([r.effective_size for r in rounds]), dims=("fit_round",),
            attrs={"long_name": "effective sample size of each round's weights",
                   "units": "1"}),
        fit_acceptance=xr.DataArray(
            np.array([r.acceptance for r in rounds]), dims=("fit_round",),
            attrs={"long_name": "share of moves accepted in each round", "units": "1"}),
    )).assign_attrs(fit_log_evidence=posterior.log_evidence,
                   fit_last_observed_day=last,
                   fit_observations=", ".join(f"{s.measure} from {Path(s.file).name}"
                                              for s in problem.series))


def observation_variables(problem: FitProblem) -> dict[str, xr.DataArray]:
    """The counts the fit saw, one row per count of every series over ``observation``:
    ``observation_measure`` (the measure it counts), ``observation_time`` (the end of its
    window, less the delay, in the result's time units) and ``observation_count`` (NaN
    where missing); what ``ensemble plot`` draws on the measures' fan charts."""
    units = {key: value for key, value in time_attrs(problem.layout).items()
             if key in ("units", "calendar")}
    dims = ("observation",)
    return {
        "observation_measure": xr.DataArray(
            np.array([s.measure for s in problem.series for _ in s.times], dtype=str),
            dims=dims, attrs={"long_name": "measure the observed count is a value of"}),
        "observation_time": xr.DataArray(
            np.concatenate([s.times for s in problem.series]).astype(float), dims=dims,
            attrs={"long_name": "end of the observed count's window", **units}),
        "observation_count": xr.DataArray(
            np.concatenate([s.counts for s in problem.series]).astype(float), dims=dims,
            attrs={"long_name": "observed count the fit saw", "units": "1"}),
    }
