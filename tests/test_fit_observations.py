"""Observed series (``[[observations]]`` in the project's reference,
``ensemble/scenario/reference.md``): their log-likelihoods against ``scipy.stats``
(``poisson.logpmf``; ``nbinom.logpmf`` with n = k, p = k / (k + mu), the mean-dispersion
form of Lloyd-Smith et al. 2005, Nature 438:355-359), and the checks of the tables and
counts files, each naming the key or the file and line (exit status 2).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from ensemble.errors import ScenarioError
from ensemble.fit.likelihood import (negative_binomial_log_pmf, poisson_log_pmf,
                                     series_log_likelihood)
from ensemble.fit.observations import scenario_observations
from ensemble.scenario.load import load_scenario
from support import load_text, run_cli

COUNTS = np.array([0.0, 1.0, 7.0, 40.0, 250.0, 3000.0])
MEANS = np.array([0.3, 2.5, 7.0, 55.5, 180.0, 2999.0])


def test_poisson_log_pmf_is_scipys():
    np.testing.assert_allclose(poisson_log_pmf(COUNTS, MEANS),
                               stats.poisson.logpmf(COUNTS, MEANS), rtol=1e-12)
    # a mean of 0: a count of 0 is certain, any other impossible (scipy agrees)
    np.testing.assert_array_equal(poisson_log_pmf(np.array([0.0, 3.0]), np.zeros(2)),
                                  stats.poisson.logpmf([0, 3], 0.0))


@pytest.mark.parametrize("k", [0.2, 1.0, 15.0, 1e4])
def test_negative_binomial_log_pmf_is_scipys(k):
    np.testing.assert_allclose(negative_binomial_log_pmf(COUNTS, MEANS, k),
                               stats.nbinom.logpmf(COUNTS, k, k / (k + MEANS)), rtol=1e-10)


def test_series_log_likelihood_adds_observed_windows_with_reporting():
    counts = np.array([3.0, np.nan, 12.0])
    expected = np.array([[10.0, 20.0], [30.0, 40.0], [50.0, 60.0]])   # windows x members
    reporting = np.array([0.2, 0.4])
    by_hand = [stats.poisson.logpmf(3, 0.2 * 10) + stats.poisson.logpmf(12, 0.2 * 50),
               stats.poisson.logpmf(3, 0.4 * 20) + stats.poisson.logpmf(12, 0.4 * 60)]
    np.testing.assert_allclose(series_log_likelihood(counts, expected, "poisson", reporting),
                               by_hand, rtol=1e-12)
    k = np.array([2.0, 5.0])
    by_hand = [stats.nbinom.logpmf(c, k[m], k[m] / (k[m] + reporting[m] * expected[w, m]))
               for m in range(2) for w, c in ((0, 3), (2, 12))]
    np.testing.assert_allclose(
        series_log_likelihood(counts, expected, "negative-binomial", reporting, k),
        [by_hand[0] + by_hand[1], by_hand[2] + by_hand[3]], rtol=1e-12)


SCENARIO = """\
# Illustrative only: invented numbers.
[scenario]
name = "observed"
start = 2027-03-01
days = 42
members = 8
seed = 3

[model]
compartments = ["S", "I", "R"]
population = 5000
initial = {{ S = "rest", I = 10 }}

[[model.flows]]
name = "infection"
from = "S"
to = "I"
rate = "beta * S * I / N"

[[model.flows]]
from = "I"
to = "R"
rate = "I / 5"

[parameters]
beta = {{ dist = "uniform", low = 0.3, high = 0.5 }}
k_cases = {{ dist = "uniform", low = 2, high = 20 }}

[[measures]]
name = "cases"
of = "infection"
window = 7

[[measures]]
name = "prevalent"
of = "I"

[[observations]]
{observations}
"""

GOOD = """\
file = "cases.csv"
measure = "cases"
distribution = "negative-binomial"
dispersion = "k_cases"
reporting = 0.5
delay = 2
"""


def _load(tmp_path, observations: str, counts: str):
    (tmp_path / "cases.csv").write_text(counts)
    return load_text(tmp_path, SCENARIO.format(observations=observations), "observed")


def test_a_good_table_gives_window_ends_after_the_delay(tmp_path):
    scenario = _load(tmp_path, GOOD, "date,value\n2027-03-10,4\n2027-03-17,\n"
                                     "2027-03-24,31\n")
    [series] = scenario_observations(scenario)
    # dated 9, 16 and 23 days after the start, two days' delay: windows ending 7, 14, 21
    np.testing.assert_array_equal(series.times, [7.0, 14.0, 21.0])
    np.testing.assert_array_equal(series.counts, [4.0, np.nan, 31.0])
    assert (series.dispersion, series.reporting, series.last_time) == ("k_cases", 0.5, 21.0)


@pytest.mark.parametrize("change, counts, where", [
    ('measure = "cases"', "date,value\n2027-03-10,4\n2027-05-01,3\n", "line 3, date"),
    ('measure = "cases"', "date,value\n2027-03-11,4\n", "line 2, date"),          # off grid
    ('measure = "cases"', "date,value\n2027-03-10,-4\n", "line 2, value"),
    ('measure = "cases"', "date,value\n2027-03-03,4\n", "line 2, date"),   # before day 0
    ('measure = "admissions"', "date,value\n2027-03-10,4\n", "observations[0].measure"),
    ('distribution = "binomial"', "date,value\n2027-03-10,4\n",
     "observations[0].distribution"),
    ('dispersion = "k_unknown"', "date,value\n2027-03-10,4\n", "observations[0].dispersion"),
    ("reporting = 1.5", "date,value\n2027-03-10,4\n", "observations[0].reporting"),
    ("delay = -1", "date,value\n2027-03-10,4\n", "observations[0].delay"),
    ('measure = "cases"\nlag = 3', "date,value\n2027-03-10,4\n", "observations[0]"),
])
def test_bad_observations_are_refused_naming_the_key_or_line(tmp_path, change, counts,
                                                              where):
    key = change.split(" =")[0]
    table = "\n".join(change if line.startswith(key + " ") else line
                      for line in GOOD.splitlines())
    if change not in table:
        table += "\n" + change
    with pytest.raises(ScenarioError) as caught:     # the table's keys: when loading
        scenario_observations(_load(tmp_path, table, counts))
    assert where in str(caught.value)
    assert ("cases.csv" in str(caught.value)) == where.startswith("line")


def test_a_stock_measure_is_observed_at_reported_times(tmp_path):
    table = GOOD.replace('"cases"', '"prevalent"', 1).replace("delay = 2", "delay = 0")
    scenario = _load(tmp_path, table, "date,value\n2027-03-02,12\n2027-03-05,30\n")
    [series] = scenario_observations(scenario)
    np.testing.assert_array_equal(series.times, [1.0, 4.0])


def test_check_refuses_bad_observations_with_exit_status_2(tmp_path):
    _load(tmp_path, GOOD, "date,value\n2027-03-11,4\n")
    done = run_cli("check", "observed.toml", cwd=tmp_path)
    assert done.returncode == 2
    assert "cases.csv: line 2, date" in done.stderr


def _fit_log_likelihood(scenario) -> np.ndarray:
    """The fit's log-likelihood of a few fixed particles (normal scores of the drawn
    columns, as the sampler moves them)."""
    from ensemble.fit.engine import FitProblem

    problem = FitProblem(scenario, "numpy", chunk=4)
    z = np.linspace(-1.0, 1.0, 4 * problem.dimension).reshape(problem.dimension, 4)
    return problem.log_likelihood(z)


def test_set_reaches_the_observations_and_changes_the_likelihood(tmp_path):
    (tmp_path / "cases.csv").write_text("date,value\n2027-03-10,4\n2027-03-24,31\n")
    (tmp_path / "observed.toml").write_text(SCENARIO.format(observations=GOOD))
    path = tmp_path / "observed.toml"
    plain = load_scenario(path)
    changed = load_scenario(path, settings=["observations[0].reporting=0.25"])
    [series] = scenario_observations(changed)
    assert (plain.observations[0].reporting, series.reporting) == (0.5, 0.25)
    before, after = _fit_log_likelihood(plain), _fit_log_likelihood(changed)
    assert np.all(np.isfinite(before)) and np.all(np.isfinite(after))
    assert not np.any(before == after)
    # the file edited instead gives the same likelihood, bit for bit
    (tmp_path / "edited.toml").write_text(
        SCENARIO.format(observations=GOOD.replace("reporting = 0.5", "reporting = 0.25")))
    np.testing.assert_array_equal(_fit_log_likelihood(load_scenario(tmp_path /
                                                                    "edited.toml")), after)


@pytest.mark.parametrize("setting, key", [
    ("observations[0].reporting=1.5", "observations[0].reporting"),
    ('observations[0].distribution="binomial"', "observations[0].distribution"),
    ('observations[0].measure="deaths"', "observations[0].measure"),
    ("observations[0].dispersion=-2", "observations[0].dispersion"),
])
def test_a_bad_set_of_an_observation_exits_2_naming_the_key(tmp_path, setting, key):
    (tmp_path / "cases.csv").write_text("date,value\n2027-03-10,4\n")
    (tmp_path / "observed.toml").write_text(SCENARIO.format(observations=GOOD))
    done = run_cli("check", "observed.toml", "--set", setting, cwd=tmp_path)
    assert done.returncode == 2
    assert key in done.stderr


def test_a_measure_named_as_another_as_observed_is_refused(tmp_path):
    text = SCENARIO.format(observations=GOOD).replace(
        '[[measures]]\nname = "prevalent"', '[[measures]]\nname = "cases_as_observed"')
    (tmp_path / "observed.toml").write_text(text)
    with pytest.raises(ScenarioError, match="observations\\[0\\].measure"):
        load_scenario(tmp_path / "observed.toml")
