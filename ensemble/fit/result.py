"""``ensemble fit``: condition a scenario's ensemble on its ``[[observations]]`` by tempered
sequential Monte Carlo (:mod:`ensemble.fit.smc`) and write a result file whose members
are the posterior, projected for every variant.

The file is a result file as ``ensemble run`` writes it (the same variables, read by
``summary``, ``score`` and ``open_result``), with ``member`` the equally weighted
posterior particles, plus each member's log-likelihood and the rounds of the fit
(``ensemble/scenario/reference.md``, the result of a fit).

Each round's likelihood and the projection are computed where a run's chunks are
(:class:`ensemble.run.executors.Workers`): in this process, or on one dask client (a
local cluster of threads or processes, a running scheduler, or batch-system worker jobs)
opened once for the whole fit; the file is the same bit for bit wherever.

The posterior members are projected as a run's chunks are
(:mod:`ensemble.run.executors`, members given their uniform draws): each chunk is saved
into a work journal (:class:`ensemble.run.journal.WorkJournal`, in
``<output>.fit-partial/projection.nc.partial``) as soon as it is integrated, by the
worker itself when it sees the directory, and the file is written from the saved chunks
by the run's finish, block by block, so that memory does not grow with members times
reported times; a resumed fit keeps the chunks already saved.  The fit's own variables
are then added to that file, which is moved to ``output`` last.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Callable
from contextlib import nullcontext
from pathlib import Path

import dask
import numpy as np
import xarray as xr
from distributed import Client

from ensemble.durable import fsync_directory
from ensemble.fit.checkpoint import load_state, partial_directory, remove_state, save_state
from ensemble.fit.engine import (FitProblem, LikelihoodOnWorkers, posterior_keys,
                                 posterior_layout)
from ensemble.fit.parameters_text import prior_variables
from ensemble.fit.smc import Posterior, Round, SamplerSettings, tempered_smc
from ensemble.output.dataset import time_attrs
from ensemble.run.execute import save_all
from ensemble.run.executors import Workers, dashboard_link, in_process, on_cluster
from ensemble.run.journal import WorkJournal
from ensemble.run.progress import Progress
from ensemble.run.tasks import chunk_uniforms, compute_chunk
from ensemble.scenario.schema import Scenario

PROJECTION = "projection.nc"
"""The projection's file in the fit's directory until the fit's variables are added."""


def fit_and_write(scenario: Scenario, output: Path, settings: SamplerSettings, *,
                  backend: str, chunk: int, where: Workers, resume: bool = False,
                  report: Callable[[int, Round], None] | None = None,
                  note: Callable[[str], None] | None = None) -> Posterior:
    """Fit ``scenario`` to its observations and write the posterior's result to
    ``output`` (whole or not at all), keeping the sampler's state after every round in
    ``<output>.fit-partial``; with ``resume``, go on from the state kept there (and from
    the projection's chunks saved there).  The chunks of each round's likelihood and of
    the projection are computed ``where`` a run's would be; ``note`` receives a line of
    information (the dashboard's address)."""
    problem = FitProblem(scenario, backend, chunk)
    key = f"{problem.layout.fingerprint} {settings}"
    directory = partial_directory(output)
    kept = load_state(directory, key) if resume else None
    with nullcontext(None) if where.in_this_process else where.client() as client:
        if client is not None and where.announces_dashboard() and note is not None:
            link = dashboard_link(client)
            if link:
                note(f"dask dashboard at {link}")
        likelihood = (problem.log_likelihood if client is None
                      else LikelihoodOnWorkers(client, problem))
        posterior = tempered_smc(likelihood, problem.dimension, settings, report,
                                 checkpoint=lambda state: save_state(directory, key, state),
                                 resume_from=kept)
        if client is not None:
            likelihood.close()
        journal = project_posterior(problem, posterior.z, directory / PROJECTION, resume,
                                    client)
        # written while the client is open (its closing resets dask's scheduler
        # setting), with xarray's file locks of this process rather than the cluster's
        with dask.config.set(scheduler="threads"):
            projection = finish_projection(journal, problem, posterior.z)
            fit_variables(posterior, problem).to_netcdf(projection, mode="a",
                                                        engine="netcdf4")
    os.replace(projection, output)
    fsync_directory(output.parent)
    remove_state(directory)
    return posterior


def project_posterior(problem: FitProblem, z: np.ndarray, path: Path, resume: bool,
                      client: Client | None = None) -> WorkJournal:
    """Save every chunk of the posterior members ``z`` projected for every variant into
    the run's work journal of ``path`` (chunks already saved there kept): in this
    process, or on ``client``'s workers (each saving its chunks when it sees the
    journal's directory)."""
    uniforms = problem.uniforms(z)
    journal = WorkJournal.open(path, posterior_layout(problem, z), resume=resume,
                               force=True)
    try:
        keys = journal.pending(posterior_keys(problem, z.shape[1]))
        scenario, models = _posterior_scenario(problem, z), problem.models
        outputs = (in_process(scenario, models, keys, problem.backend, uniforms)
                   if client is None
                   else on_cluster(client, scenario, models, keys, problem.backend,
                                   journal, candidates=True, uniforms=uniforms))
        save_all(journal, outputs, Progress(bar=False), candidates=True)
    except BaseException:
        journal.close()
        raise
    return journal


def finish_projection(journal: WorkJournal, problem: FitProblem, z: np.ndarray) -> Path:
    """Write the projection's file from the chunks saved in ``journal`` (a chunk found
    damaged is computed again here)."""
    scenario, uniforms = _posterior_scenario(problem, z), problem.uniforms(z)
    return journal.finish(lambda key: compute_chunk(
        scenario, problem.models[key[0]], key, problem.backend,
        uniforms=chunk_uniforms(uniforms, key)).result)


def _posterior_scenario(problem: FitProblem, z: np.ndarray) -> Scenario:
    """The scenario with the posterior's particles as its members."""
    return dataclasses.replace(problem.scenario, member_count=z.shape[1])


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
