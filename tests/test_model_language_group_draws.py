"""A parameter given as a list of distributions, one per group: each group's value is
drawn from its own distribution, independently of the other groups, with common random
numbers per parameter and group across variants.

Every setting here is invented and illustrative.  The distributions are checked against
``scipy.stats`` (Kolmogorov-Smirnov tests, and the CDFs of the draws) with the moment
relations of the beta and gamma families (Johnson, Kotz & Balakrishnan 1995, *Continuous
Univariate Distributions*, vol. 2, ch. 25; vol. 1 1994, ch. 17).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from ensemble.errors import ScenarioError
from ensemble.sampling.uniform import uncertain_columns
from support import load_text, model_and_design

MEMBERS = 2000


def scenario_text(fraction: str, sampling: str = "random", variants: str = "") -> str:
    return f"""
    [scenario]
    name = "group-draws"
    days = 2
    members = {MEMBERS}
    seed = 17

    [model]
    compartments = ["S", "I", "R", "H"]
    groups = ["young", "middle", "old"]
    population = [600, 400, 300]
    initial = {{ S = "rest", I = [1, 1, 1] }}

    [[model.flows]]
    from = "S"
    to = "I"
    rate = "0.3 * S * sum(I) / sum(N)"

    [[model.flows]]
    from = "I"
    to = "R"
    rate = "I * (1 - admitted) / 4"

    [[model.flows]]
    from = "I"
    to = "H"
    rate = "I * admitted / 4"

    [parameters]
    admitted = {fraction}
    doubled = "2 * admitted"

    [sampling]
    method = "{sampling}"
    {variants}
    """


FRACTION = ('{ value = [{ dist = "beta", mean = 0.01, sd = 0.004 }, 0.05, '
            '{ dist = "gamma", mean = 0.2, sd = 0.05, high = 0.35 }], units = "1" }')


def beta_of(mean: float, sd: float):
    """scipy.stats.beta with this mean and sd (a = mean nu, b = (1 - mean) nu, nu =
    mean (1 - mean) / sd^2 - 1)."""
    nu = mean * (1 - mean) / sd ** 2 - 1
    return stats.beta(mean * nu, (1 - mean) * nu)


def gamma_of(mean: float, sd: float):
    """scipy.stats.gamma with shape mean^2 / sd^2 and scale sd^2 / mean."""
    return stats.gamma(mean ** 2 / sd ** 2, scale=sd ** 2 / mean)


def drawn(scenario, variant: int = 0) -> np.ndarray:
    _, design = model_and_design(scenario, variant)
    assert np.array_equal(design.reported["doubled"], 2 * design.reported["admitted"])
    return design.reported["admitted"]


@pytest.mark.parametrize("sampling", ["random", "latin-hypercube", "sobol"])
def test_each_group_follows_its_own_distribution(tmp_path, sampling) -> None:
    """Kolmogorov-Smirnov against scipy.stats (the beta family; the gamma truncated
    above at 0.35, whose CDF is F(x) / F(0.35)); the given group keeps its number."""
    values = drawn(load_text(tmp_path, scenario_text(FRACTION, sampling)))
    assert values.shape == (3, MEMBERS)
    assert stats.kstest(values[0], beta_of(0.01, 0.004).cdf).pvalue > 1e-3
    gamma = gamma_of(0.2, 0.05)
    assert stats.kstest(values[2], lambda x: gamma.cdf(x) / gamma.cdf(0.35)).pvalue > 1e-3
    assert values[2].max() <= 0.35
    assert (values[1] == 0.05).all()


def test_groups_are_drawn_independently(tmp_path) -> None:
    """Two drawn groups: Spearman's rank correlation within 4 / sqrt(n) of zero (the
    null distribution of the rank correlation is about normal with sd 1 / sqrt(n - 1);
    Kendall & Gibbons 1990, *Rank Correlation Methods*, from memory)."""
    values = drawn(load_text(tmp_path, scenario_text(FRACTION)))
    correlation = stats.spearmanr(values[0], values[2]).statistic
    assert abs(correlation) < 4 / np.sqrt(MEMBERS)


def test_variants_draw_each_group_at_the_same_ranks(tmp_path) -> None:
    """Common random numbers: a variant that gives group 0 another distribution maps the
    same uniform draw, so the two CDFs (scipy.stats) agree member by member."""
    variants = """
    [[variants]]
    name = "as-written"

    [[variants]]
    name = "higher"
    parameters = { admitted = [{ dist = "beta", mean = 0.02, sd = 0.006 }, 0.05, { dist = "gamma", mean = 0.2, sd = 0.05, high = 0.35 }] }
    """
    scenario = load_text(tmp_path, scenario_text(FRACTION, "latin-hypercube", variants))
    first, second = drawn(scenario, 0), drawn(scenario, 1)
    np.testing.assert_allclose(beta_of(0.01, 0.004).cdf(first[0]),
                               beta_of(0.02, 0.006).cdf(second[0]), rtol=1e-8, atol=1e-12)
    assert np.array_equal(first[2], second[2])


def test_one_column_per_drawn_group(tmp_path) -> None:
    scenario = load_text(tmp_path, scenario_text(FRACTION))
    assert uncertain_columns(scenario) == (("admitted", 0), ("admitted", 2))


@pytest.mark.parametrize("fraction, key, message", [
    ('[{ dist = "beta", mean = 0.01, sd = 0.004 }, 0.05]', "parameters.admitted",
     "one entry per group"),
    ('[{ dist = "beta", mean = 0.01, sd = 0.004, per_group = true }, 0.05, 0.1]',
     "parameters.admitted[0].per_group", "unknown key"),
    ('[{ mean = 0.01 }, 0.05, 0.1]', "parameters.admitted[0]", "distribution table"),
    ('[{ dist = "beta", mean = 0.01, sd = 0.5 }, 0.05, 0.1]', "parameters.admitted[0]",
     ""),
])
def test_bad_lists_of_distributions_name_the_entry(tmp_path, fraction, key, message) -> None:
    with pytest.raises(ScenarioError) as error:
        load_text(tmp_path, scenario_text(fraction))
    assert error.value.key.startswith(key)
    assert message in str(error.value)
