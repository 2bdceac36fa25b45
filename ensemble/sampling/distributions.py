"""Distributions of the scenario file: mean/sd conversions and inverse CDFs.

Every uncertain parameter is drawn on the uniform scale and mapped through its
family's inverse CDF (the quantile function), so the same uniform column gives monotonely
related values under any two distributions of the same parameter (common random numbers
between variants).  The functions are :mod:`scipy.special`'s (the normal integral, the
regularised incomplete gamma and beta functions and their inverses), combined with the
location and scale as :mod:`scipy.stats` does (``standard * scale + loc``); importing
:mod:`scipy.stats` itself would take half a second of every run's start.

The mean/sd conversions are the moment relations in Johnson, Kotz & Balakrishnan,
*Continuous Univariate Distributions*, vol. 1 (1994), ch. 14 (lognormal) and ch. 17
(gamma), and vol. 2 (1995), ch. 25 (beta); chapter numbers from memory.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import special

from ensemble.scenario.schema import Distribution

CONTINUOUS_FAMILIES = ("uniform", "normal", "lognormal", "gamma", "beta", "triangular")
"""Families mapped through an inverse CDF (:class:`Continuous`)."""

TRUNCATABLE_FAMILIES = ("normal", "lognormal", "gamma")
"""Families that accept ``low``/``high`` truncation."""


def lognormal_parameters(mean: float, sd: float) -> tuple[float, float]:
    """(mu, sigma) of the underlying normal for a lognormal of the given mean and sd.

    sigma^2 = ln(1 + sd^2 / mean^2), mu = ln(mean) - sigma^2 / 2, from
    E[X] = exp(mu + sigma^2 / 2) and Var[X] = (exp(sigma^2) - 1) exp(2 mu + sigma^2)
    (Johnson, Kotz & Balakrishnan 1994, vol. 1, ch. 14).
    """
    sigma2 = math.log1p((sd / mean) ** 2)
    return math.log(mean) - 0.5 * sigma2, math.sqrt(sigma2)


def gamma_parameters(mean: float, sd: float) -> tuple[float, float]:
    """(shape, scale) of a gamma distribution of the given mean and sd.

    From E[X] = shape * scale and Var[X] = shape * scale^2 (Johnson, Kotz &
    Balakrishnan 1994, vol. 1, ch. 17): shape = mean^2 / sd^2, scale = sd^2 / mean.
    """
    return (mean / sd) ** 2, sd * sd / mean


def beta_parameters(mean: float, sd: float) -> tuple[float, float]:
    """(a, b) of a beta distribution on [0, 1] of the given mean and sd.

    From E[X] = a / (a + b) and Var[X] = mean (1 - mean) / (a + b + 1) (Johnson, Kotz &
    Balakrishnan 1995, vol. 2, ch. 25): nu = mean (1 - mean) / sd^2 - 1,
    a = mean * nu, b = (1 - mean) * nu.  Needs sd^2 < mean (1 - mean).
    """
    nu = mean * (1.0 - mean) / (sd * sd) - 1.0
    return mean * nu, (1.0 - mean) * nu


@dataclass(frozen=True)
class Continuous:
    """A continuous family with its parameters: ``X = loc + scale * Z`` for a standard
    variable Z whose CDF ``cdf``, survival function ``sf`` and their inverses ``ppf`` and
    ``isf`` act elementwise on arrays (the last two only for families that accept
    truncation)."""

    ppf_standard: Callable[[np.ndarray], np.ndarray]
    loc: float = 0.0
    scale: float = 1.0
    cdf_standard: Callable[[np.ndarray], np.ndarray] | None = None
    sf_standard: Callable[[np.ndarray], np.ndarray] | None = None
    isf_standard: Callable[[np.ndarray], np.ndarray] | None = None

    def ppf(self, q: np.ndarray) -> np.ndarray:
        """The values below which a fraction ``q`` of the distribution lies."""
        return self.ppf_standard(np.asarray(q, dtype=np.float64)) * self.scale + self.loc

    def isf(self, q: np.ndarray) -> np.ndarray:
        """The values above which a fraction ``q`` of the distribution lies."""
        return self.isf_standard(np.asarray(q, dtype=np.float64)) * self.scale + self.loc

    def cdf(self, x: float) -> float:
        """P(X <= x)."""
        return float(self.cdf_standard(np.float64((x - self.loc) / self.scale)))

    def sf(self, x: float) -> float:
        """P(X > x), without the cancellation of 1 - cdf in the upper tail."""
        return float(self.sf_standard(np.float64((x - self.loc) / self.scale)))


def _positive_log(x: np.ndarray) -> np.ndarray:
    """log(x), -inf for x <= 0 (below a lognormal's support)."""
    with np.errstate(divide="ignore"):
        return np.log(np.maximum(x, 0.0))


def continuous(dist: Distribution) -> Continuous:
    """The untruncated distribution of a continuous family: the standard forms of
    Johnson, Kotz & Balakrishnan (1994, 1995; chapters as in the module's note) through
    :mod:`scipy.special` (``ndtr``/``ndtri``: the normal integral and its inverse;
    ``gammainc``/``gammaincinv`` and ``betainc``/``betaincinv``: the regularised
    incomplete gamma and beta functions and their inverses)."""
    args = dist.arguments
    family = dist.family
    if family == "uniform":
        return Continuous(lambda q: q, loc=args["low"], scale=args["high"] - args["low"])
    if family == "normal":
        return Continuous(special.ndtri, args["mean"], args["sd"], special.ndtr,
                          lambda z: special.ndtr(-z), lambda q: -special.ndtri(q))
    if family == "lognormal":
        mu, sigma = lognormal_parameters(args["mean"], args["sd"])
        return Continuous(lambda q: np.exp(sigma * special.ndtri(q)), 0.0, math.exp(mu),
                          lambda z: special.ndtr(_positive_log(z) / sigma),
                          lambda z: special.ndtr(-_positive_log(z) / sigma),
                          lambda q: np.exp(-sigma * special.ndtri(q)))
    if family == "gamma":
        shape, scale = gamma_parameters(args["mean"], args["sd"])
        return Continuous(lambda q: special.gammaincinv(shape, q), 0.0, scale,
                          lambda z: special.gammainc(shape, np.maximum(z, 0.0)),
                          lambda z: special.gammaincc(shape, np.maximum(z, 0.0)),
                          lambda q: special.gammainccinv(shape, q))
    if family == "beta":
        a, b = beta_parameters(args["mean"], args["sd"])
        return Continuous(lambda q: special.betaincinv(a, b, q))
    if family == "triangular":
        low, mode, high = args["low"], args["mode"], args["high"]
        c = (mode - low) / (high - low)
        return Continuous(lambda q: np.where(q < c, np.sqrt(c * q),
                                             1.0 - np.sqrt((1.0 - c) * (1.0 - q))),
                          loc=low, scale=high - low)
    raise ValueError(f"{family!r} is not a continuous family")


def needs_draw(dist: Distribution) -> bool:
    """Whether ``dist`` takes a uniform column (every family but ``fixed``)."""
    return dist.family != "fixed"


def inverse_cdf(dist: Distribution, u: np.ndarray) -> np.ndarray:
    """Map uniform draws ``u`` in (0, 1) to values of ``dist``.

    Continuous families use their ``ppf``; with truncation to [low, high] the draw is
    first moved into the kept probability range, u -> F(low) + u (F(high) - F(low)), or
    in the survival form S(low) - u (S(low) - S(high)) mapped by ``isf`` when the range
    lies in the upper half, where 1 - F loses the digits that S keeps.  ``choice`` sorts
    its values and inverts the cumulative weights: the smallest value whose cumulative
    weight reaches u.
    """
    u = np.asarray(u, dtype=np.float64)
    if dist.family == "fixed":
        return np.full(u.shape, float(dist.arguments["value"]))
    if dist.family == "choice":
        return _choice_inverse_cdf(dist.values, dist.weights, u)
    rv = continuous(dist)
    low, high = dist.truncation
    if low is None and high is None:
        return rv.ppf(u)
    return _truncated_inverse_cdf(rv, u,
                                  -np.inf if low is None else float(low),
                                  np.inf if high is None else float(high))


def _truncated_inverse_cdf(rv: Continuous, u: np.ndarray, low: float, high: float
                           ) -> np.ndarray:
    if rv.cdf(low) > 0.5:
        survival_low, survival_high = rv.sf(low), rv.sf(high)
        values = rv.isf(survival_low - u * (survival_low - survival_high))
    else:
        cdf_low, cdf_high = rv.cdf(low), rv.cdf(high)
        values = rv.ppf(cdf_low + u * (cdf_high - cdf_low))
    return np.clip(values, low, high)


def _choice_inverse_cdf(values: tuple[float, ...], weights: tuple[float, ...],
                        u: np.ndarray) -> np.ndarray:
    points = np.asarray(values, dtype=np.float64)
    mass = np.asarray(weights, dtype=np.float64) if weights else np.ones(points.size)
    order = np.argsort(points, kind="stable")
    points, mass = points[order], mass[order]
    cumulative = np.cumsum(mass) / mass.sum()
    cumulative[-1] = 1.0
    index = np.searchsorted(cumulative, u, side="left")
    return points[np.minimum(index, points.size - 1)]
