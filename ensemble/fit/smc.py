"""Tempered sequential Monte Carlo: particles drawn from the prior are moved, through a
sequence of tempered targets prior(z) L(z)^phi with phi rising from 0 to 1, to the
posterior (Del Moral, Doucet & Jasra 2006, "Sequential Monte Carlo samplers", J. R.
Stat. Soc. B 68:411-436).

Each round

1. chooses the next temperature by bisection so that the effective sample size of the
   incremental weights L^(phi' - phi) is a chosen fraction of the particles (the adaptive
   rule of Jasra, Stephens, Doucet & Tsagaris 2011, "Inference for Lévy-driven stochastic
   volatility models via adaptive sequential Monte Carlo", Scand. J. Stat. 38:1-22), or
   takes phi' = 1 when that keeps enough;
2. resamples the particles systematically (Kitagawa 1996, "Monte Carlo filter and
   smoother for non-Gaussian nonlinear state space models", J. Comput. Graph. Stat.
   5:1-25), so that every particle then has the same weight;
3. moves every particle by Metropolis-Hastings steps that leave the tempered target
   invariant, with a Gaussian random walk whose covariance is the particles' own,
   scaled by 2.38^2 / d (Roberts, Gelman & Gilks 1997, "Weak convergence and optimal
   scaling of random walk Metropolis algorithms", Ann. Appl. Probab. 7:110-120).

The particles live in a standard normal space: coordinate j of a particle is z_j with
prior N(0, 1), and the caller maps it to a parameter through the normal CDF and the
parameter's quantile function (:func:`parameters_from_normal`), the same map from the
uniform scale that the ensemble's design uses. The prior density in that space is the
standard normal's, whatever the parameters' families.

Pure numpy over a callback ``log_likelihood(z) -> (particles,)``, so it runs on any
simulator; the same seed gives the same particles bit for bit. Arrays are laid out
coordinates by particles, as the ensemble's states-by-members arrays are.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import special

LogLikelihood = Callable[[np.ndarray], np.ndarray]
"""z (dimension, particles) -> log-likelihood of each particle (particles,)."""


@dataclass(frozen=True)
class SamplerSettings:
    """How the sampler runs.

    Attributes
    ----------
    particles : number of particles.
    seed : seed of the sampler's random numbers.
    kept_fraction : the effective sample size each round keeps, as a fraction of the
        particles (0.5 is common practice, no source).
    move_steps : Metropolis-Hastings steps per particle and round.
    max_rounds : a bound on the number of rounds (tempering stops at phi = 1 sooner).
    """

    particles: int = 2000
    seed: int = 0
    kept_fraction: float = 0.5
    move_steps: int = 5
    max_rounds: int = 200


@dataclass(frozen=True)
class Round:
    """What one round did: its temperature, the effective sample size of its weights
    before resampling, and the share of proposed moves accepted."""

    temperature: float
    effective_size: float
    acceptance: float


@dataclass(frozen=True)
class Posterior:
    """The sampler's result: equally weighted particles from the posterior.

    Attributes
    ----------
    z : (dimension, particles) the particles in the standard normal space.
    log_likelihood : (particles,) each particle's log-likelihood.
    log_evidence : the estimate of log of the marginal likelihood, sum over rounds of
        the log mean incremental weight.
    rounds : each round's temperature, effective sample size and acceptance.
    """

    z: np.ndarray
    log_likelihood: np.ndarray
    log_evidence: float
    rounds: tuple[Round, ...]


def effective_size(log_weights: np.ndarray) -> float:
    """Kish's effective sample size (sum w)^2 / sum w^2 of unnormalised log weights."""
    finite = np.isfinite(log_weights)
    if not finite.any():
        return 0.0
    weights = np.exp(log_weights - np.max(log_weights[finite]))
    weights[~finite] = 0.0
    return float(weights.sum() ** 2 / np.sum(weights ** 2))


def next_temperature(log_likelihood: np.ndarray, temperature: float,
                     kept: float, tolerance: float = 1e-10) -> float:
    """The temperature after ``temperature`` at which the incremental weights keep an
    effective sample size of ``kept`` particles (1 when the full step keeps that many),
    by bisection: the size falls as the step grows."""
    if effective_size((1.0 - temperature) * log_likelihood) >= kept:
        return 1.0
    low, high = temperature, 1.0
    while high - low > tolerance:
        middle = 0.5 * (low + high)
        if effective_size((middle - temperature) * log_likelihood) >= kept:
            low = middle
        else:
            high = middle
    return max(low, temperature + tolerance)


def systematic_resample(log_weights: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Indices of the particles kept by systematic resampling: one uniform offset, then
    evenly spaced points through the cumulative weights (Kitagawa 1996)."""
    count = log_weights.size
    weights = np.exp(log_weights - np.max(log_weights))
    weights[~np.isfinite(weights)] = 0.0
    cumulative = np.cumsum(weights / weights.sum())
    cumulative[-1] = 1.0
    points = (rng.random() + np.arange(count)) / count
    return np.searchsorted(cumulative, points, side="right")


def _log_prior(z: np.ndarray) -> np.ndarray:
    """Standard normal log-density of each particle, without its constant."""
    return -0.5 * np.sum(z * z, axis=0)


def _finite(values: np.ndarray) -> np.ndarray:
    """Log-likelihoods with NaN read as impossible (minus infinity)."""
    values = np.asarray(values, dtype=float)
    return np.where(np.isnan(values), -np.inf, values)


def _move(z: np.ndarray, log_likelihood: np.ndarray, temperature: float,
          function: LogLikelihood, steps: int,
          rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, float]:
    """Random-walk Metropolis-Hastings steps leaving prior * L^temperature invariant,
    the proposal's covariance the particles' own scaled by 2.38^2 / d."""
    dimension, count = z.shape
    covariance = np.atleast_2d(np.cov(z)) * (2.38 ** 2 / dimension)
    covariance += 1e-12 * np.eye(dimension)
    factor = np.linalg.cholesky(covariance)
    accepted = 0
    for _ in range(steps):
        proposal = z + factor @ rng.standard_normal((dimension, count))
        proposed = _finite(function(proposal))
        log_ratio = (_log_prior(proposal) + temperature * proposed
                     - _log_prior(z) - temperature * log_likelihood)
        log_ratio = np.where(np.isneginf(proposed), -np.inf, log_ratio)
        accept = np.log(rng.random(count)) < log_ratio
        z = np.where(accept, proposal, z)
        log_likelihood = np.where(accept, proposed, log_likelihood)
        accepted += int(accept.sum())
    return z, log_likelihood, accepted / (steps * count)


@dataclass(frozen=True)
class SamplerState:
    """Where the sampler stands after a round: enough to go on as if never stopped.

    Attributes
    ----------
    z, log_likelihood : the equally weighted particles and their log-likelihoods.
    temperature : the exponent reached.
    log_evidence : the log evidence summed so far.
    rounds : the rounds done.
    random_state : the state of the sampler's random generator
        (``numpy.random.PCG64().state``, a dict of numbers).
    """

    z: np.ndarray
    log_likelihood: np.ndarray
    temperature: float
    log_evidence: float
    rounds: tuple[Round, ...]
    random_state: dict


def tempered_smc(function: LogLikelihood, dimension: int, settings: SamplerSettings,
                 report: Callable[[int, Round], None] | None = None,
                 checkpoint: Callable[[SamplerState], None] | None = None,
                 resume_from: SamplerState | None = None) -> Posterior:
    """Sample the posterior of ``dimension`` standard normal coordinates under the
    log-likelihood ``function``.

    Parameters
    ----------
    function : z (dimension, particles) -> log-likelihoods (particles,); NaN or minus
        infinity where the data are impossible.
    dimension : number of coordinates (uncertain parameters).
    settings : particles, seed, the effective size kept, move steps, round bound.
    report : called after each round with its number (from 1) and what it did.
    checkpoint : called after each round with the sampler's state, to be kept.
    resume_from : a state a checkpoint kept: the sampler goes on from it and gives the
        same bits as a run never stopped.

    Raises
    ------
    RuntimeError : every particle has an impossible likelihood, or the rounds ran out
        before the temperature reached 1.
    """
    rng = np.random.default_rng(settings.seed)
    if resume_from is None:
        z = rng.standard_normal((dimension, settings.particles))
        log_likelihood = _finite(function(z))
        temperature, log_evidence, rounds = 0.0, 0.0, []
    else:
        rng.bit_generator.state = resume_from.random_state
        z, log_likelihood = resume_from.z, resume_from.log_likelihood
        temperature, log_evidence = resume_from.temperature, resume_from.log_evidence
        rounds = list(resume_from.rounds)
    kept = settings.kept_fraction * settings.particles
    while temperature < 1.0:
        if len(rounds) == settings.max_rounds:
            raise RuntimeError(f"the temperature reached only {temperature:.3g} in "
                               f"{settings.max_rounds} rounds")
        if not np.isfinite(log_likelihood).any():
            raise RuntimeError("every particle makes the observations impossible")
        following = next_temperature(log_likelihood, temperature, kept)
        increment = (following - temperature) * log_likelihood
        increment = np.where(np.isneginf(log_likelihood), -np.inf, increment)
        top = np.max(increment)
        log_evidence += float(top + np.log(np.mean(np.exp(increment - top))))
        size = effective_size(increment)
        chosen = systematic_resample(increment, rng)
        z, log_likelihood = z[:, chosen], log_likelihood[chosen]
        temperature = following
        z, log_likelihood, acceptance = _move(z, log_likelihood, temperature, function,
                                              settings.move_steps, rng)
        rounds.append(Round(temperature, size, acceptance))
        if report is not None:
            report(len(rounds), rounds[-1])
        if checkpoint is not None:
            checkpoint(SamplerState(z, log_likelihood, temperature, log_evidence,
                                    tuple(rounds), rng.bit_generator.state))
    return Posterior(z, log_likelihood, log_evidence, tuple(rounds))


def parameters_from_normal(z: np.ndarray,
                           quantile_functions: Sequence[Callable[[np.ndarray], np.ndarray]]
                           ) -> np.ndarray:
    """Map particles to parameters: coordinate j through the standard normal CDF to the
    uniform scale, then through parameter j's quantile function (inverse CDF)."""
    uniform = special.ndtr(z)
    return np.stack([quantile(uniform[j]) for j, quantile in enumerate(quantile_functions)])

