"""The tempered sequential Monte Carlo sampler (Del Moral, Doucet & Jasra 2006, "Sequential
Monte Carlo samplers", J. R. Stat. Soc. B 68:411-436) against posteriors computed
otherwise:

- a normal prior and normal likelihood, whose posterior is normal in closed form
  (conjugacy; Gelman et al. 2013, "Bayesian Data Analysis", 3rd ed., sec. 2.5);
- an SIR model with one and with two uncertain parameters and Poisson counts, against
  the posterior's mean and standard deviation by quadrature on a fine grid
  (``scipy.integrate.simpson``);
- over repeated synthetic data sets, the 90% central posterior intervals cover the
  parameter that made the data at the nominal rate (a binomial test, ``scipy.stats``),
  and the ranks of that parameter among posterior draws are uniform (simulation-based
  calibration: Talts, Betancourt, Simpson, Vehtari & Gelman 2018, "Validating Bayesian
  inference algorithms with simulation-based calibration", arXiv:1804.06788; a
  chi-square test).

The SIR here is the test's own vectorised RK4 integration (Kermack & McKendrick 1927's
model), shared by the sampler and the grid, so the checks test the sampler, not the
integration.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate, special, stats

from ensemble.fit.smc import (SamplerSettings, effective_size, next_temperature,
                              parameters_from_normal, systematic_resample, tempered_smc)

POPULATION = 1000.0
FIRST_INFECTED = 5.0
WEEKS = 6


def weekly_infections(beta: np.ndarray, gamma: np.ndarray, weeks: int = WEEKS,
                      step: float = 0.25) -> np.ndarray:
    """New infections of an SIR in each week, (weeks, particles), by RK4 on S and I."""
    beta, gamma = np.broadcast_arrays(np.atleast_1d(np.asarray(beta, float)),
                                      np.asarray(gamma, float))
    s = np.full(beta.shape, POPULATION - FIRST_INFECTED)
    i = np.full(beta.shape, FIRST_INFECTED)

    def slope(s, i):
        infection = beta * s * i / POPULATION
        return -infection, infection - gamma * i

    totals = [s.copy()]
    per_week = int(round(7 / step))
    for _ in range(weeks):
        for _ in range(per_week):
            k1 = slope(s, i)
            k2 = slope(s + 0.5 * step * k1[0], i + 0.5 * step * k1[1])
            k3 = slope(s + 0.5 * step * k2[0], i + 0.5 * step * k2[1])
            k4 = slope(s + step * k3[0], i + step * k3[1])
            s = s + step / 6 * (k1[0] + 2 * k2[0] + 2 * k3[0] + k4[0])
            i = i + step / 6 * (k1[1] + 2 * k2[1] + 2 * k3[1] + k4[1])
        totals.append(s.copy())
    return -np.diff(np.array(totals), axis=0)


def poisson_log_likelihood(expected: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """Sum over weeks of Poisson log-pmfs, (particles,) from expected (weeks, particles)."""
    expected = np.maximum(expected, 1e-12)
    return np.sum(counts[:, None] * np.log(expected) - expected
                  - special.gammaln(counts[:, None] + 1), axis=0)


BETA = (0.2, 0.8)      # uniform prior of the transmission rate per day (invented)
GAMMA = (0.15, 0.45)   # uniform prior of the recovery rate per day (invented)


def uniform_quantile(low: float, high: float):
    return lambda u: low + (high - low) * u


def test_effective_size_and_systematic_resampling():
    # Kish's effective sample size: equal weights give N; one weight gives 1
    assert effective_size(np.zeros(10)) == pytest.approx(10.0)
    assert effective_size(np.array([0.0, -np.inf, -np.inf])) == pytest.approx(1.0)
    # systematic resampling keeps particle i floor(N w_i) or ceil(N w_i) times (Douc,
    # Cappé & Moulines 2005, "Comparison of resampling schemes for particle
    # filtering", ISPA 2005, sec. 3)
    weights = np.array([0.05, 0.4, 0.3, 0.25])
    rng = np.random.default_rng(3)
    for _ in range(50):
        counts = np.bincount(systematic_resample(np.log(weights), rng), minlength=4)
        assert np.all(counts >= np.floor(4 * weights)) and np.all(
            counts <= np.ceil(4 * weights))


def test_the_next_temperature_keeps_the_chosen_effective_size():
    log_likelihood = np.random.default_rng(1).normal(-50.0, 10.0, 1000)
    following = next_temperature(log_likelihood, 0.0, 500.0)
    assert 0.0 < following < 1.0
    assert effective_size(following * log_likelihood) == pytest.approx(500.0, rel=1e-4)
    assert next_temperature(np.zeros(100), 0.3, 50.0) == 1.0


def test_normal_prior_and_normal_likelihood_give_the_conjugate_posterior():
    # prior z ~ N(0, 1), data y ~ N(z, s^2): posterior N(y / (1 + s^2), s^2 / (1 + s^2))
    # (Gelman et al. 2013, sec. 2.5)
    y, s = 2.5, 0.4
    posterior = tempered_smc(lambda z: -0.5 * ((y - z[0]) / s) ** 2, 1,
                             SamplerSettings(particles=4000, seed=7))
    mean, sd = y / (1 + s ** 2), np.sqrt(s ** 2 / (1 + s ** 2))
    assert posterior.rounds[-1].temperature == 1.0
    assert np.mean(posterior.z[0]) == pytest.approx(mean, abs=0.05 * sd)
    assert np.std(posterior.z[0]) == pytest.approx(sd, rel=0.05)
    # the log evidence: y ~ N(0, 1 + s^2) marginally, less the likelihood's constant
    evidence = stats.norm.logpdf(y, scale=np.sqrt(1 + s ** 2)) + np.log(s * np.sqrt(2 * np.pi))
    assert posterior.log_evidence == pytest.approx(evidence, abs=0.05)


def _grid_moments(log_posterior: np.ndarray, axes: list[np.ndarray]) -> list[tuple[float, float]]:
    """Mean and sd of each axis of a posterior on a grid, by Simpson's rule."""
    density = np.exp(log_posterior - log_posterior.max())

    def integral(values):
        for axis in reversed(axes):
            values = integrate.simpson(values, x=axis, axis=-1)
        return values

    total = integral(density)
    moments = []
    for k, axis in enumerate(axes):
        shape = [1] * len(axes)
        shape[k] = axis.size
        x = axis.reshape(shape)
        mean = integral(density * x) / total
        moments.append((mean, np.sqrt(integral(density * (x - mean) ** 2) / total)))
    return moments


def test_sir_one_parameter_matches_the_grid_posterior():
    truth = 0.5
    counts = stats.poisson.rvs(weekly_infections(truth, 0.3)[:, 0],
                               random_state=np.random.default_rng(11)).astype(float)
    quantiles = [uniform_quantile(*BETA)]

    def log_likelihood(z):
        beta = parameters_from_normal(z, quantiles)[0]
        return poisson_log_likelihood(weekly_infections(beta, 0.3), counts)

    posterior = tempered_smc(log_likelihood, 1, SamplerSettings(particles=2000, seed=5))
    beta = parameters_from_normal(posterior.z, quantiles)[0]
    grid = np.linspace(*BETA, 4001)        # uniform prior: the posterior is L on the grid
    [(mean, sd)] = _grid_moments(poisson_log_likelihood(weekly_infections(grid, 0.3),
                                                        counts), [grid])
    # Monte Carlo error: about sd / sqrt(effective draws); 0.1 sd and 10% of sd are
    # common practice, no source, for 2000 particles after moves
    assert np.mean(beta) == pytest.approx(mean, abs=0.1 * sd)
    assert np.std(beta) == pytest.approx(sd, rel=0.1)


def test_sir_two_parameters_match_the_grid_posterior():
    counts = stats.poisson.rvs(weekly_infections(0.55, 0.25)[:, 0],
                               random_state=np.random.default_rng(12)).astype(float)
    quantiles = [uniform_quantile(*BETA), uniform_quantile(*GAMMA)]

    def log_likelihood(z):
        beta, gamma = parameters_from_normal(z, quantiles)
        return poisson_log_likelihood(weekly_infections(beta, gamma), counts)

    posterior = tempered_smc(log_likelihood, 2, SamplerSettings(particles=3000, seed=6))
    drawn = parameters_from_normal(posterior.z, quantiles)
    betas, gammas = np.linspace(*BETA, 301), np.linspace(*GAMMA, 301)
    b, g = np.meshgrid(betas, gammas, indexing="ij")
    grid_log = poisson_log_likelihood(weekly_infections(b.ravel(), g.ravel()), counts)
    moments = _grid_moments(grid_log.reshape(b.shape), [betas, gammas])
    for values, (mean, sd) in zip(drawn, moments):
        assert np.mean(values) == pytest.approx(mean, abs=0.1 * sd)
        assert np.std(values) == pytest.approx(sd, rel=0.1)
    # the posterior is narrow against the prior: the check is not one of the prior
    assert moments[0][1] < 0.25 * (BETA[1] - BETA[0]) / np.sqrt(12)


def test_posterior_intervals_cover_and_ranks_are_uniform_over_synthetic_data():
    repeats, draws = 100, 9
    rng = np.random.default_rng(2026)
    quantiles = [uniform_quantile(*BETA)]
    inside, ranks = 0, []
    for repeat in range(repeats):
        z_true = rng.standard_normal((1, 1))
        truth = parameters_from_normal(z_true, quantiles)[0, 0]
        counts = rng.poisson(weekly_infections(truth, 0.3, weeks=4, step=0.5)[:, 0]
                             ).astype(float)

        def log_likelihood(z):
            beta = parameters_from_normal(z, quantiles)[0]
            return poisson_log_likelihood(weekly_infections(beta, 0.3, weeks=4, step=0.5),
                                          counts)

        posterior = tempered_smc(log_likelihood, 1, SamplerSettings(
            particles=400, seed=repeat, move_steps=4))
        beta = parameters_from_normal(posterior.z, quantiles)[0]
        low, high = np.quantile(beta, [0.05, 0.95])
        inside += bool(low <= truth <= high)
        thinned = rng.choice(beta, draws, replace=False)
        ranks.append(int(np.sum(thinned < truth)))
    # (c) the 90% intervals cover the truth at the nominal rate: a two-sided binomial
    # test at the 0.001 level (scipy.stats.binomtest)
    assert stats.binomtest(inside, repeats, 0.9).pvalue > 0.001, inside
    # (b) simulation-based calibration (Talts et al. 2018): ranks 0..9 uniform, a
    # chi-square test at the 0.001 level
    observed = np.bincount(ranks, minlength=draws + 1)
    assert stats.chisquare(observed).pvalue > 0.001, observed


def test_the_same_seed_gives_the_same_particles_bit_for_bit():
    def log_likelihood(z):
        return -0.5 * np.sum((z - 1.0) ** 2, axis=0) / 0.09

    first = tempered_smc(log_likelihood, 2, SamplerSettings(particles=500, seed=3))
    second = tempered_smc(log_likelihood, 2, SamplerSettings(particles=500, seed=3))
    other = tempered_smc(log_likelihood, 2, SamplerSettings(particles=500, seed=4))
    assert np.array_equal(first.z, second.z) and first.rounds == second.rounds
    assert not np.array_equal(first.z, other.z)


def test_a_sampler_stopped_after_a_round_goes_on_to_the_same_bits():
    def log_likelihood(z):
        return -0.5 * np.sum((z - 1.0) ** 2, axis=0) / 0.01

    settings = SamplerSettings(particles=400, seed=9)
    kept = []
    whole = tempered_smc(log_likelihood, 2, settings, checkpoint=kept.append)
    assert len(kept) == len(whole.rounds) >= 3
    resumed = tempered_smc(log_likelihood, 2, settings, resume_from=kept[1])
    assert np.array_equal(resumed.z, whole.z) and resumed.rounds == whole.rounds
    assert resumed.log_evidence == whole.log_evidence
