"""Distributions: sampled marginals, mean/sd conversions and truncation against scipy.stats.

Marginals are compared with the Kolmogorov-Smirnov test (Kolmogorov 1933, Smirnov 1948,
via scipy.stats.kstest) at a fixed seed; the distributions on the other side are built in
this file from the moment formulas of Johnson, Kotz & Balakrishnan, Continuous Univariate
Distributions, vol. 1 (1994) and vol. 2 (1995), written out independently of the code.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
import pytest
from scipy import stats

from ensemble import distributions
from ensemble.distributions import (FAMILIES, beta_parameters, gamma_parameters,
                                    lognormal_parameters)

N = 4000
KS_LEVEL = 1e-3
"""Significance level of the KS checks (common practice, no source)."""


def draws(n: int = N, seed: int = 2027) -> np.ndarray:
    """n uniform draws in (0, 1) from numpy's PCG64 generator."""
    u = np.random.default_rng(seed).random(n)
    assert np.all(u > 0)
    return u


class Law(NamedTuple):
    """A family with its arguments and truncation, as a scenario file gives them."""

    family: str
    arguments: dict
    truncation: tuple


def dist(family: str, truncation=(None, None), **arguments) -> Law:
    return Law(family, arguments, truncation)


def inverse_cdf(law: Law, u: np.ndarray) -> np.ndarray:
    return distributions.inverse_cdf(law.family, law.arguments, law.truncation, u)


# Reference distributions from the moment formulas (JKB 1994 vol. 1 ch. 14 lognormal:
# E = exp(mu + s^2/2), Var = (e^{s^2} - 1) E^2; ch. 17 gamma: E = k theta, Var = k theta^2;
# JKB 1995 vol. 2 ch. 25 beta: E = a/(a+b), Var = ab/((a+b)^2 (a+b+1))).
def reference_lognormal(mean: float, sd: float):
    cv2 = (sd / mean) ** 2
    return stats.lognorm(s=math.sqrt(math.log(1.0 + cv2)), scale=mean / math.sqrt(1.0 + cv2))


def reference_gamma(mean: float, sd: float):
    return stats.gamma(a=mean ** 2 / sd ** 2, scale=sd ** 2 / mean)


def reference_beta(mean: float, sd: float):
    total = mean * (1 - mean) / sd ** 2 - 1
    return stats.beta(a=mean * total, b=(1 - mean) * total)


CASES = [
    (dist("uniform", low=1.2, high=1.9), stats.uniform(loc=1.2, scale=0.7)),
    (dist("normal", mean=-3.0, sd=0.5), stats.norm(loc=-3.0, scale=0.5)),
    (dist("lognormal", mean=4.0, sd=1.0), reference_lognormal(4.0, 1.0)),
    (dist("lognormal", mean=0.2, sd=0.5), reference_lognormal(0.2, 0.5)),
    (dist("gamma", mean=2.5, sd=0.6), reference_gamma(2.5, 0.6)),
    (dist("gamma", mean=1.0, sd=3.0), reference_gamma(1.0, 3.0)),
    (dist("beta", mean=0.3, sd=0.1), reference_beta(0.3, 0.1)),
    (dist("beta", mean=0.9, sd=0.05), reference_beta(0.9, 0.05)),
    (dist("triangular", low=1.0, mode=1.5, high=4.0), stats.triang(c=0.5 / 3.0, loc=1.0, scale=3.0)),
]


def test_every_family_has_a_case_here():
    """A family added to the registry without a case in this file fails here."""
    checked = {law.family for law, _ in CASES} | {"choice"}
    assert set(FAMILIES) <= checked, f"no case for {set(FAMILIES) - checked}"


@pytest.mark.parametrize("distribution, reference", CASES,
                         ids=[f"{d.family}-{i}" for i, (d, _) in enumerate(CASES)])
def test_marginal_matches_scipy_by_kolmogorov_smirnov(distribution, reference):
    """KS test (Kolmogorov 1933; Smirnov 1948) of the sampled marginal against scipy.stats."""
    sample = inverse_cdf(distribution, draws())
    assert stats.kstest(sample, reference.cdf).pvalue > KS_LEVEL


@pytest.mark.parametrize("distribution, reference", CASES,
                         ids=[f"{d.family}-{i}" for i, (d, _) in enumerate(CASES)])
def test_inverse_cdf_equals_scipy_stats_ppf(distribution, reference):
    """The quantile function built on scipy.special equals scipy.stats' ``ppf`` (the
    reference library) to 1e-12 relative, from the far tails to the centre."""
    u = np.concatenate([np.logspace(-12, -1, 23), np.linspace(0.05, 0.95, 37),
                        1 - np.logspace(-12, -1, 23)])
    np.testing.assert_allclose(inverse_cdf(distribution, u), reference.ppf(u), rtol=1e-12,
                               atol=0)


@pytest.mark.parametrize("distribution, reference, low, high", [
    (dist("normal", mean=10.0, sd=2.0, truncation=(16.0, 20.0)),
     stats.norm(loc=10.0, scale=2.0), 16.0, 20.0),
    (dist("normal", mean=1.0, sd=1.0, truncation=(None, 0.5)),
     stats.norm(loc=1.0, scale=1.0), -np.inf, 0.5),
    (dist("lognormal", mean=4.0, sd=1.0, truncation=(None, 3.0)),
     reference_lognormal(4.0, 1.0), 0.0, 3.0),
    (dist("lognormal", mean=4.0, sd=1.0, truncation=(5.0, None)),
     reference_lognormal(4.0, 1.0), 5.0, np.inf),
    (dist("gamma", mean=2.0, sd=1.0, truncation=(6.0, None)),
     reference_gamma(2.0, 1.0), 6.0, np.inf),
    (dist("gamma", mean=2.0, sd=1.0, truncation=(1.0, 2.0)),
     reference_gamma(2.0, 1.0), 1.0, 2.0),
], ids=["normal-upper-window", "normal-below", "lognormal-below", "lognormal-above",
        "gamma-tail", "gamma-window"])
def test_truncated_inverse_cdf_equals_scipy_stats(distribution, reference, low, high):
    """Truncated draws equal the same map written with scipy.stats' cdf, sf, ppf and isf
    (u -> F(low) + u (F(high) - F(low)), or its survival form in the upper half) to 1e-12
    relative."""
    u = np.linspace(0.001, 0.999, 101)
    if reference.cdf(low) > 0.5:
        expected = reference.isf(reference.sf(low) - u * (reference.sf(low)
                                                           - reference.sf(high)))
    else:
        expected = reference.ppf(reference.cdf(low) + u * (reference.cdf(high)
                                                           - reference.cdf(low)))
    np.testing.assert_allclose(inverse_cdf(distribution, u), np.clip(expected, low, high),
                               rtol=1e-12, atol=0)


def test_kolmogorov_smirnov_check_has_power():
    """The KS check of this file rejects the usual mistake of taking ``sd`` as the sd of
    the log (JKB 1994 vol. 1 ch. 14): the check can fail."""
    sample = inverse_cdf(dist("lognormal", mean=4.0, sd=1.0), draws())
    wrong = stats.lognorm(s=1.0, scale=4.0)
    assert stats.kstest(sample, wrong.cdf).pvalue < 1e-6


@pytest.mark.parametrize("family, mean, sd", [
    ("lognormal", 4.0, 1.0), ("lognormal", 0.01, 0.03), ("gamma", 2.5, 0.6),
    ("gamma", 100.0, 1.0), ("beta", 0.3, 0.1), ("beta", 0.02, 0.01), ("normal", 7.0, 2.0),
])
def test_converted_parameters_have_the_requested_moments(family, mean, sd):
    """Exact moments of scipy's distribution with the converted parameters equal the
    requested mean and sd (JKB 1994 vol. 1 ch. 14, 17; JKB 1995 vol. 2 ch. 25), and so do
    the sample moments within 4 standard errors (common practice, no source)."""
    if family == "lognormal":
        mu, sigma = lognormal_parameters(mean, sd)
        rv = stats.lognorm(s=sigma, scale=math.exp(mu))
    elif family == "gamma":
        shape, scale = gamma_parameters(mean, sd)
        rv = stats.gamma(a=shape, scale=scale)
    elif family == "beta":
        rv = stats.beta(*beta_parameters(mean, sd))
    else:
        rv = stats.norm(loc=mean, scale=sd)
    assert rv.mean() == pytest.approx(mean, rel=1e-12)
    assert rv.std() == pytest.approx(sd, rel=1e-10)
    sample = inverse_cdf(dist(family, mean=mean, sd=sd), draws(20000))
    n = sample.size
    assert abs(sample.mean() - mean) < 4 * sd / math.sqrt(n)
    # large-sample standard error of a sample sd: sd * sqrt((excess kurtosis + 2) / (4 n))
    relative_error_of_sd = math.sqrt((rv.stats(moments="k") + 2) / (4 * n))
    assert abs(sample.std() / sd - 1) < 4 * relative_error_of_sd


def test_conversion_formulas_match_moment_relations():
    """The closed forms against the moment relations of JKB (1994, 1995), evaluated by hand."""
    mu, sigma = lognormal_parameters(4.0, 1.0)
    assert math.exp(mu + sigma ** 2 / 2) == pytest.approx(4.0, rel=1e-14)
    assert math.sqrt(math.expm1(sigma ** 2)) * 4.0 == pytest.approx(1.0, rel=1e-14)
    shape, scale = gamma_parameters(2.5, 0.6)
    assert (shape * scale, math.sqrt(shape) * scale) == pytest.approx((2.5, 0.6), rel=1e-14)
    a, b = beta_parameters(0.3, 0.1)
    assert a / (a + b) == pytest.approx(0.3, rel=1e-14)
    assert math.sqrt(a * b / ((a + b) ** 2 * (a + b + 1))) == pytest.approx(0.1, rel=1e-13)


def truncated_cdf(rv, low: float, high: float):
    """CDF of ``rv`` truncated to [low, high], written in the survival form so that it is
    accurate in the upper tail."""
    mass = rv.sf(low) - rv.sf(high)
    return lambda x: (rv.sf(low) - rv.sf(np.clip(x, low, high))) / mass


@pytest.mark.parametrize("distribution, reference", [
    (dist("normal", mean=1.0, sd=1.0, truncation=(0.5, 2.0)),
     stats.truncnorm(a=-0.5, b=1.0, loc=1.0, scale=1.0)),
    (dist("normal", mean=0.0, sd=1.0, truncation=(0.0, None)),
     stats.truncnorm(a=0.0, b=np.inf)),
    (dist("normal", mean=0.0, sd=1.0, truncation=(None, -1.0)),
     stats.truncnorm(a=-np.inf, b=-1.0)),
    # far upper tail: the survival path (1 - F would have ~5 digits left at 4 sd)
    (dist("normal", mean=0.0, sd=1.0, truncation=(4.0, None)),
     stats.truncnorm(a=4.0, b=np.inf)),
    (dist("normal", mean=10.0, sd=2.0, truncation=(16.0, 20.0)),
     stats.truncnorm(a=3.0, b=5.0, loc=10.0, scale=2.0)),
], ids=["both", "low", "high", "far-tail", "tail-window"])
def test_truncated_normal_against_scipy_truncnorm(distribution, reference):
    """Truncated normal draws lie within the bounds and pass KS against
    scipy.stats.truncnorm (Kolmogorov 1933; Smirnov 1948)."""
    sample = inverse_cdf(distribution, draws())
    low, high = distribution.truncation
    assert np.all(sample >= (low if low is not None else -np.inf))
    assert np.all(sample <= (high if high is not None else np.inf))
    assert stats.kstest(sample, reference.cdf).pvalue > KS_LEVEL


@pytest.mark.parametrize("distribution, reference, low, high", [
    (dist("lognormal", mean=4.0, sd=1.0, truncation=(3.0, 6.0)),
     reference_lognormal(4.0, 1.0), 3.0, 6.0),
    (dist("lognormal", mean=4.0, sd=1.0, truncation=(None, 3.0)),
     reference_lognormal(4.0, 1.0), 0.0, 3.0),
    (dist("gamma", mean=2.0, sd=1.0, truncation=(6.0, None)),
     reference_gamma(2.0, 1.0), 6.0, np.inf),
    (dist("gamma", mean=2.0, sd=1.0, truncation=(1.0, 2.0)),
     reference_gamma(2.0, 1.0), 1.0, 2.0),
])
def test_truncated_lognormal_and_gamma(distribution, reference, low, high):
    """Truncated lognormal and gamma draws lie within the bounds and pass KS against the
    truncated scipy.stats CDF (F(x) - F(low)) / (F(high) - F(low))."""
    sample = inverse_cdf(distribution, draws())
    assert np.all((sample >= low) & (sample <= high))
    assert stats.kstest(sample, truncated_cdf(reference, low, high)).pvalue > KS_LEVEL


def test_choice_frequencies_by_pearson_chi_square():
    """Choice draws have the normalised weights as frequencies: Pearson's (1900) chi-square
    test via scipy.stats.chisquare; the values are sorted, so the map is monotone."""
    distribution = dist("choice", values=(3.0, 1.0, 2.0), weights=(0.5, 0.2, 0.3))
    u = draws()
    sample = inverse_cdf(distribution, u)
    observed = [np.count_nonzero(sample == v) for v in (1.0, 2.0, 3.0)]
    assert sum(observed) == N
    assert stats.chisquare(observed, np.array([0.2, 0.3, 0.5]) * N).pvalue > KS_LEVEL
    order = np.argsort(u)
    assert np.all(np.diff(sample[order]) >= 0)


def test_choice_without_weights_is_uniform_over_values():
    """Equal weights when none are given (chi-square, Pearson 1900)."""
    sample = inverse_cdf(dist("choice", values=(0.1, 0.2, 0.3, 0.4)), draws())
    observed = [np.count_nonzero(sample == v) for v in (0.1, 0.2, 0.3, 0.4)]
    assert stats.chisquare(observed).pvalue > KS_LEVEL


def test_choice_inverse_cdf_at_the_cumulative_weights():
    """Inverse CDF of a discrete law: the smallest value whose cumulative weight reaches u."""
    distribution = dist("choice", values=(1.0, 2.0), weights=(0.25, 0.75))
    u = np.array([1e-12, 0.2499, 0.25, 0.2501, 0.999999])
    assert inverse_cdf(distribution, u).tolist() == [1.0, 1.0, 1.0, 2.0, 2.0]



# Far tails: the probabilities beyond the interval underflow as plain numbers (a normal
# keeps about 1e-350 above 40), so the draws are taken in logarithms.  scipy.stats'
# truncnorm computes its quantiles in logarithms too (scipy 1.17), and is the reference.
UNIFORM_GRID = np.concatenate([np.logspace(-12, -3, 10), np.linspace(0.001, 0.999, 499),
                               1 - np.logspace(-3, -12, 10)])


@pytest.mark.parametrize("mean, sd, low, high", [
    (0.0, 1.0, 40.0, 41.0), (0.0, 1.0, -41.0, -40.0), (0.0, 1.0, 40.0, None),
    (0.0, 1.0, None, -40.0), (3.0, 0.5, 30.0, 31.0), (0.0, 1.0, 38.5, 38.6),
], ids=["upper-window", "lower-window", "upper-tail", "lower-tail", "shifted", "narrow"])
def test_truncated_normal_far_in_a_tail_against_truncnorm(mean, sd, low, high):
    """Quantiles at a grid of uniforms equal scipy.stats.truncnorm's to 1e-9 relative,
    where the plain map gave every member the interval's end."""
    a = -np.inf if low is None else (low - mean) / sd
    b = np.inf if high is None else (high - mean) / sd
    reference = stats.truncnorm(a, b, loc=mean, scale=sd)
    got = inverse_cdf(dist("normal", mean=mean, sd=sd, truncation=(low, high)), UNIFORM_GRID)
    np.testing.assert_allclose(got, reference.ppf(UNIFORM_GRID), rtol=1e-9, atol=0)


def test_truncated_normal_at_40_to_41_has_the_truncnorm_mean():
    """The case of the trial: N(0, 1) on [40, 41] has mean 40.025 (scipy.stats.truncnorm,
    40.02496884721...); the midpoint rule over 200,000 uniforms gives it to 1e-7."""
    u = (np.arange(200_000) + 0.5) / 200_000
    values = inverse_cdf(dist("normal", mean=0.0, sd=1.0, truncation=(40.0, 41.0)), u)
    assert values.mean() == pytest.approx(stats.truncnorm(40.0, 41.0).mean(), rel=1e-7)
    assert values.mean() == pytest.approx(40.025, abs=1e-3)


def test_truncated_lognormal_far_in_a_tail():
    """A lognormal on [1e6, 2e6] (about 1e-570 of it above 1e6) is exp(mu + sigma Z) with
    Z truncated to the logarithms of the bounds (the definition of the lognormal, JKB
    1994 vol. 1 ch. 14): scipy.stats.truncnorm on that scale, to 1e-9 relative."""
    mu, sigma = lognormal_parameters(5.0, 1.2)
    a, b = ((math.log(x) - mu) / sigma for x in (1e6, 2e6))
    expected = np.exp(mu + sigma * stats.truncnorm(a, b).ppf(UNIFORM_GRID))
    got = inverse_cdf(dist("lognormal", mean=5.0, sd=1.2, truncation=(1e6, 2e6)),
                      UNIFORM_GRID)
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=0)


def erlang_log_survival(x: float, shape: int, scale: float) -> float:
    """log P(X > x) of a gamma with whole ``shape`` (the Erlang distribution):
    P(X > x) = exp(-x/scale) sum_{j < shape} (x/scale)^j / j! (JKB 1994 vol. 1 ch. 17)."""
    z = x / scale
    return -z + math.log(math.fsum(z ** j / math.factorial(j) for j in range(shape)))


@pytest.mark.parametrize("low, high", [(100.0, 101.0), (320.0, 330.0)],
                         ids=["1e-83-beyond", "1e-275-beyond"])
def test_truncated_gamma_far_in_a_tail_against_the_erlang_survival(low, high):
    """A gamma of mean 2 and sd 1 (shape 4, scale 0.5) truncated far in its upper tail:
    the quantile solves log S(x) = log((1 - u) S(low) + u S(high)) with the Erlang
    survival function written out in logarithms, to 1e-9 relative."""
    from scipy.optimize import brentq

    u = np.linspace(0.001, 0.999, 41)
    got = inverse_cdf(dist("gamma", mean=2.0, sd=1.0, truncation=(low, high)), u)
    expected = []
    for fraction in u:
        target = np.logaddexp(math.log1p(-fraction) + erlang_log_survival(low, 4, 0.5),
                              math.log(fraction) + erlang_log_survival(high, 4, 0.5))
        expected.append(brentq(lambda x: erlang_log_survival(x, 4, 0.5) - target, low, high,
                               xtol=1e-13, rtol=1e-15))
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=0)


@pytest.mark.parametrize("family, arguments, low, high, key", [
    ("gamma", {"mean": 2.0, "sd": 1.0}, 2000.0, None, "low"),
    ("gamma", {"mean": 2.0, "sd": 1.0}, None, 1e-120, "high"),
    ("normal", {"mean": 0.0, "sd": 1.0}, 1e200, None, "low"),
    ("normal", {"mean": 0.0, "sd": 1.0}, None, -1e200, "high"),
])
def test_truncation_without_representable_mass_is_refused(family, arguments, low, high, key):
    """An interval whose probability underflows even in logarithms (or, for the gamma,
    which has no logarithmic forms here, below 1e-290) is refused, naming its far end."""
    problem = FAMILIES[family].truncation_problem(arguments, low, high)
    assert problem is not None and problem.key == key
    assert "tail" in problem.message
    with pytest.raises(distributions.NoRepresentableMass):
        distributions.inverse_cdf(family, arguments, (low, high), np.array([0.5]))
