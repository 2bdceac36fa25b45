"""``ensemble fit`` end to end: the posterior members of an SIR scenario fitted to Poisson
counts agree with the posterior computed on a fine grid from scipy's ``solve_ivp`` (at
tight tolerance) by quadrature (``scipy.integrate.simpson``); the same seed gives the same
file, and a fit killed after a round (at the barrier of its kept state) goes on with
--resume to the same file; rounds are printed and bad observations stop the command with
exit status 2.
"""

from __future__ import annotations

import signal
import subprocess
import time

import numpy as np
import pytest
import xarray as xr
from scipy import integrate, stats

from ensemble import api
from ensemble.about import CAUTION
from ensemble.sampling.uniform import observation_noise_draws
from support import ensemble_command, run_cli

SCENARIO = """\
# Illustrative only: an invented town and invented counts.
[scenario]
name = "fitted"
start = 2027-03-01
days = 42
members = 10
seed = 4

[model]
compartments = ["S", "I", "R"]
population = 10000
initial = { S = "rest", I = 10 }

[[model.flows]]
name = "infection"
from = "S"
to = "I"
rate = "contact * beta * S * I / N"

[[model.flows]]
from = "I"
to = "R"
rate = "I / 5"

[parameters]
beta = { dist = "uniform", low = 0.2, high = 0.8 }
contact = 1.0

[[variants]]
name = "usual"

[[variants]]
name = "fewer-contacts"
parameters = { contact = { schedule = [[0, 1.0], [21, 0.6]], between = "step" } }

[solver]
method = "rk4"
step = 0.25

[[measures]]
name = "cases"
of = "infection"
window = 7

[[observations]]
file = "cases.csv"
measure = "cases"
"""

COUNTS = "date,value\n2027-03-08,35\n2027-03-15,80\n2027-03-22,190\n"
"""Invented weekly counts."""


def _weekly_infections_by_solve_ivp(beta: float) -> np.ndarray:
    """New infections in weeks 1-3 of the scenario's SIR, by scipy at tight tolerance."""
    def slope(t, y):
        s, i = y
        infection = beta * s * i / 10000.0
        return [-infection, infection - i / 5.0]
    solution = integrate.solve_ivp(slope, (0, 21), [9990.0, 10.0], t_eval=[0, 7, 14, 21],
                                   rtol=1e-10, atol=1e-8, method="DOP853")
    return -np.diff(solution.y[0])


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    directory = tmp_path_factory.mktemp("fit")
    (directory / "cases.csv").write_text(COUNTS)
    (directory / "fitted.toml").write_text(SCENARIO)
    path = api.fit(directory / "fitted.toml", output=directory / "fitted.nc",
                   particles=600, backend="numpy")
    with xr.open_dataset(path, decode_times=False) as dataset:
        return directory, dataset.load()


def test_posterior_members_match_the_grid_posterior(fitted):
    _, dataset = fitted
    counts = np.array([35.0, 80.0, 190.0])
    grid = np.linspace(0.2, 0.8, 1201)       # uniform prior: the posterior is L on the grid
    log_l = np.array([stats.poisson.logpmf(counts, _weekly_infections_by_solve_ivp(b)).sum()
                      for b in grid])
    density = np.exp(log_l - log_l.max())
    total = integrate.simpson(density, x=grid)
    mean = integrate.simpson(density * grid, x=grid) / total
    sd = np.sqrt(integrate.simpson(density * (grid - mean) ** 2, x=grid) / total)
    beta = dataset["param_beta"].isel(variant=0).values
    # Monte Carlo error of 600 particles: 0.15 sd and 15% of sd, common practice, no source
    assert np.mean(beta) == pytest.approx(mean, abs=0.15 * sd)
    assert np.std(beta) == pytest.approx(sd, rel=0.15)
    # the members are the same particles in every variant (common random numbers)
    np.testing.assert_array_equal(dataset["param_beta"].isel(variant=1).values, beta)
    # each member's stored log-likelihood is the Poisson one of its own projection
    weeks = dataset["measure_cases"].isel(variant=0).values[:, :3]
    np.testing.assert_allclose(dataset["log_likelihood"].values,
                               stats.poisson.logpmf(counts, weeks).sum(axis=1), rtol=1e-10)
    assert dataset["fit_temperature"].values[-1] == 1.0


def test_the_parameter_table_gives_prior_and_posterior_quantiles(fitted):
    directory, dataset = fitted
    text = api.fit_summary(api.load_scenario(directory / "fitted.toml"),
                           directory / "fitted.nc")
    cells = text.splitlines()[1].split()
    assert cells[0] == "beta"
    # the prior uniform(0.2, 0.8)'s quantiles (scipy.stats.uniform.ppf), then the
    # members' (numpy.quantile, Hyndman & Fan 1996 definition 7)
    prior = stats.uniform.ppf([0.05, 0.5, 0.95], loc=0.2, scale=0.6)
    posterior = np.quantile(dataset["param_beta"].isel(variant=0).values, [0.05, 0.5, 0.95])
    np.testing.assert_allclose([float(c) for c in cells[1:]], [*prior, *posterior],
                               rtol=5e-4)


def test_scores_of_a_fit_count_horizons_from_its_last_observation(fitted, tmp_path):
    directory, _ = fitted
    later = tmp_path / "later.csv"
    later.write_text("date,value\n2027-03-29,400\n2027-04-05,700\n")
    text = api.score(directory / "fitted.nc", later)
    rows = text.split("variant usual\n")[1].splitlines()[1:3]
    # the last count the fit saw ends day 21 (2027-03-22): days 28 and 35 are 7 and 14
    assert [float(row.split()[0]) for row in rows] == [7.0, 14.0]


def test_the_same_seed_gives_the_same_file(fitted, tmp_path):
    directory, first = fitted
    again = api.fit(directory / "fitted.toml", output=tmp_path / "again.nc", particles=600,
                    backend="numpy")
    with xr.open_dataset(again, decode_times=False) as second:
        np.testing.assert_array_equal(second["param_beta"].values, first["param_beta"].values)
        np.testing.assert_array_equal(second["measure_cases_quantile"].values,
                                      first["measure_cases_quantile"].values)


def test_the_command_prints_rounds_and_refuses_bad_observations(fitted, tmp_path):
    directory, _ = fitted
    (tmp_path / "cases.csv").write_text(COUNTS)
    (tmp_path / "fitted.toml").write_text(SCENARIO)
    done = run_cli("fit", "fitted.toml", "--particles", "50", "--backend", "numpy",
                   cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "round 1: temperature" in done.stdout and "acceptance" in done.stdout
    assert "result:" in done.stdout
    assert done.stdout.rstrip().endswith(CAUTION)
    (tmp_path / "cases.csv").write_text(COUNTS + "2027-03-29,-2\n")
    refused = run_cli("fit", "fitted.toml", "--particles", "50", "--force", cwd=tmp_path)
    assert refused.returncode == 2 and "cases.csv: line 5, value" in refused.stderr


@pytest.mark.slow
def test_a_killed_fit_resumes_to_the_same_file(fitted, tmp_path):
    directory, whole = fitted
    (tmp_path / "cases.csv").write_text(COUNTS)
    (tmp_path / "fitted.toml").write_text(SCENARIO)
    arguments = ("fit", "fitted.toml", "--particles", "600", "--backend", "numpy",
                 "-o", "fitted.nc")
    state = tmp_path / "fitted.nc.fit-partial" / "state.npz"
    process = subprocess.Popen(ensemble_command(*arguments), cwd=tmp_path,
                               stdout=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 300      # a bound on a hang, not a timed assertion
    while not state.exists() and process.poll() is None and time.monotonic() < deadline:
        time.sleep(0.01)
    process.send_signal(signal.SIGKILL)    # at the barrier: a round's state is kept
    process.wait()
    assert process.returncode == -signal.SIGKILL, "the fit ended before it was killed"
    assert state.exists() and not (tmp_path / "fitted.nc").exists()
    done = run_cli(*arguments, "--resume", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "round 1:" not in done.stdout and "round " in done.stdout
    assert not state.parent.exists()
    with xr.open_dataset(tmp_path / "fitted.nc", decode_times=False) as resumed:
        for name in ("param_beta", "log_likelihood", "measure_cases_quantile",
                     "fit_temperature"):
            np.testing.assert_array_equal(resumed[name].values, whole[name].values)


def test_dispersion_and_reporting_drawn_as_parameters_are_each_members_own(tmp_path):
    (tmp_path / "cases.csv").write_text(COUNTS)
    text = SCENARIO.replace(
        "contact = 1.0\n", 'contact = 1.0\nk_cases = { dist = "uniform", low = 2, high = 50 }\n'
        'ascertained = { dist = "beta", mean = 0.5, sd = 0.1 }\n') + (
        'distribution = "negative-binomial"\ndispersion = "k_cases"\n'
        'reporting = "ascertained"\n')
    (tmp_path / "drawn.toml").write_text(text)
    path = api.fit(tmp_path / "drawn.toml", output=tmp_path / "drawn.nc", particles=100,
                   backend="numpy")
    with xr.open_dataset(path, decode_times=False) as dataset:
        k = dataset["param_k_cases"].isel(variant=0).values[:, None]
        share = dataset["param_ascertained"].isel(variant=0).values[:, None]
        weeks = dataset["measure_cases"].isel(variant=0).values[:, :3]
        stored = dataset["log_likelihood"].values
        every_week = dataset["measure_cases"].isel(variant=0).values
        as_observed = dataset["measure_cases_as_observed"].isel(variant=0).values
    counts = np.array([35.0, 80.0, 190.0])
    # scipy.stats.nbinom with n = k, p = k / (k + mean), mean = reporting x measure
    expected = stats.nbinom.logpmf(counts, k, k / (k + share * weeks)).sum(axis=1)
    np.testing.assert_allclose(stored, expected, rtol=1e-10)
    assert np.std(k) > 0 and np.std(share) > 0
    # the fit's result holds the counts as observed, each member's with its own k and
    # reporting: scipy.stats.nbinom.ppf at the member's draws
    draws = observation_noise_draws(api.load_scenario(tmp_path / "drawn.toml").seed,
                                    "cases", every_week.shape[1], np.arange(k.size))
    mean = share * every_week
    np.testing.assert_array_equal(as_observed, stats.nbinom.ppf(draws, k, k / (k + mean)))
