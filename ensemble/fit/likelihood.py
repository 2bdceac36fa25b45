"""Log-likelihoods of observed counts given each member's expected counts.

An observed count y of a window is modelled as Poisson with mean mu = rho * x, or
negative binomial with that mean and dispersion k (variance mu + mu^2 / k), where x is
the member's count of the measure over the window and rho the fraction reported
(``[[observations]]`` in the project's reference, ``ensemble/scenario/reference.md``).
The negative binomial in this mean-dispersion form is the gamma mixture of Poissons of
Lloyd-Smith, Schreiber, Kopp & Getz (2005), "Superspreading and the effect of individual
variation on disease emergence", Nature 438:355-359; in scipy's terms it is
``nbinom(n=k, p=k / (k + mu))``.
"""

from __future__ import annotations

import numpy as np
from scipy import special


def poisson_log_pmf(counts: np.ndarray, mean: np.ndarray) -> np.ndarray:
    """log P(Y = counts) for Y ~ Poisson(mean), elementwise; minus infinity where the
    mean is 0 (or below, a solver's round-off) and the count is not, NaN where the mean
    is NaN."""
    mean = np.maximum(np.asarray(mean, dtype=float), 0.0)
    counts = np.asarray(counts, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        value = special.xlogy(counts, mean) - mean - special.gammaln(counts + 1.0)
    return np.where((mean <= 0) & (counts > 0), -np.inf, value)


def negative_binomial_log_pmf(counts: np.ndarray, mean: np.ndarray,
                              dispersion: np.ndarray) -> np.ndarray:
    """log P(Y = counts) for Y negative binomial with ``mean`` and ``dispersion`` k
    (variance mean + mean^2 / k), elementwise."""
    mean = np.maximum(np.asarray(mean, dtype=float), 0.0)
    counts = np.asarray(counts, dtype=float)
    k = np.asarray(dispersion, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        value = (special.gammaln(counts + k) - special.gammaln(k)
                 - special.gammaln(counts + 1.0)
                 + k * (np.log(k) - np.log(k + mean))
                 + special.xlogy(counts, mean) - special.xlogy(counts, k + mean))
    return np.where((mean <= 0) & (counts > 0), -np.inf, value)


def series_log_likelihood(counts: np.ndarray, expected: np.ndarray, distribution: str,
                          reporting: np.ndarray | float = 1.0,
                          dispersion: np.ndarray | float | None = None) -> np.ndarray:
    """The log-likelihood of one observed series for every member.

    Parameters
    ----------
    counts : (observations,) the observed counts, NaN where missing (left out).
    expected : (observations, members) each member's count of the measure over each
        observation's window, before reporting.
    distribution : ``"poisson"`` or ``"negative-binomial"``.
    reporting : the fraction reported, a number or one per member.
    dispersion : k of the negative binomial, a number or one per member.

    Returns
    -------
    (members,) the sum over the observed windows; minus infinity where a member makes a
    count impossible, NaN where its expected counts are not finite.
    """
    seen = ~np.isnan(counts)
    mean = np.asarray(reporting, dtype=float) * expected[seen]
    observed = counts[seen][:, np.newaxis]
    if distribution == "poisson":
        terms = poisson_log_pmf(observed, mean)
    elif distribution == "negative-binomial":
        terms = negative_binomial_log_pmf(observed, mean, dispersion)
    else:
        raise ValueError(f"unknown distribution {distribution!r}")
    return np.sum(terms, axis=0)
