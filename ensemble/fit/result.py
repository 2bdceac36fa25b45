"""``ensemble fit``: condition a scenario's ensemble on its ``[[observations]]`` by tempered
sequential Monte Carlo (:mod:`ensemble.fit.smc`) and write a result file whose members
are the posterior, projected for every variant.

The file is a result file as ``ensemble run`` writes it (the same variables, read by
``summary``, ``score`` and ``open_result``), with ``member`` the equally weighted
posterior particles, plus each member's log-likelihood and the rounds of the fit
(``ensemble/scenario/reference.md``, the result of a fit).
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np
import xarray as xr

from ensemble.durable import replace_atomically
from ensemble.fit.checkpoint import load_state, partial_directory, remove_state, save_state
from ensemble.fit.engine import FitProblem, posterior_chunks
from ensemble.fit.parameters_text import prior_variables
from ensemble.fit.smc import Posterior, Round, SamplerSettings, tempered_smc
from ensemble.output.dataset import encoding, time_attrs
from ensemble.output.finish import Finisher
from ensemble.output.result_file import UNFINISHED_SUFFIX
from ensemble.output.sources import MembersInMemory
from ensemble.output.writer import result_dataset
from ensemble.scenario.schema import Scenario


def fit_and_write(scenario: Scenario, output: Path, settings: SamplerSettings, *,
                  backend: str, chunk: int, resume: bool = False,
                  report: Callable[[int, Round], None] | None = None) -> Posterior:
    """Fit ``scenario`` to its observations and write the posterior's result to
    ``output`` (whole or not at all), keeping the sampler's state after every round in
    ``<output>.fit-partial``; with ``resume``, go on from the state kept there."""
    problem = FitProblem(scenario, backend, chunk)
    key = f"{problem.layout.fingerprint} {settings}"
    directory = partial_directory(output)
    kept = load_state(directory, key) if resume else None
    posterior = tempered_smc(problem.log_likelihood, problem.dimension, settings, report,
                             checkpoint=lambda state: save_state(directory, key, state),
                             resume_from=kept)
    layout, chunks = posterior_chunks(problem, posterior.z)
    dataset = result_dataset(Finisher(layout, MembersInMemory(layout, chunks)))
    stored = encoding(layout, dataset)
    dataset = with_fit_variables(dataset, posterior, problem)
    replace_atomically(output, lambda target: dataset.to_netcdf(
        target, format="NETCDF4", engine="netcdf4", encoding=stored),
        suffix=UNFINISHED_SUFFIX)
    remove_state(directory)
    return posterior


def with_fit_variables(dataset: xr.Dataset, posterior: Posterior,
                       problem: FitProblem) -> xr.Dataset:
    """``dataset`` with each member's log-likelihood, the rounds of the fit, the
    observations it saw and the prior quantiles of the parameters it drew."""
    rounds = posterior.rounds
    last = max((series.last_time for series in problem.series), default=np.nan)
    return dataset.assign(
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
    ).assign_attrs(fit_log_evidence=posterior.log_evidence,
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
