"""The distribution families of the scenario format: one registry, :data:`FAMILIES`.

The loader reads from it which families exist, which keys each one takes and which
arguments are impossible; the parameter design reads from it each family's quantile
function (the inverse CDF).  Adding a family is one :class:`Family` entry here, and a case
in ``tests/test_sampling_distributions.py`` (which fails for a family without one).

Every uncertain parameter is drawn on the uniform scale and mapped through its family's
quantile function, so the same uniform column gives monotonely related values under any
two distributions of the same parameter (common random numbers between variants).  The
functions are :mod:`scipy.special`'s (the normal integral, the regularised incomplete
gamma and beta functions and their inverses), combined with the location and scale as
:mod:`scipy.stats` does (``standard * scale + loc``); importing :mod:`scipy.stats` itself
would take half a second of every run's start.

The mean/sd conversions are the moment relations in Johnson, Kotz & Balakrishnan,
*Continuous Univariate Distributions*, vol. 1 (1994), ch. 14 (lognormal) and ch. 17
(gamma), and vol. 2 (1995), ch. 25 (beta); chapter numbers from memory.  The scenario
format itself is described in the project's reference (``ensemble/scenario/reference.md``).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import NamedTuple, Protocol, Union

import numpy as np
from scipy import special

ArgumentValue = Union[float, tuple[float, ...]]
"""A family's argument: a number, or a list of numbers (``values`` and ``weights``)."""

Arguments = Mapping[str, ArgumentValue]


class Problem(NamedTuple):
    """Why a family's arguments are impossible: the key (relative to the parameter's
    table, such as ``"sd"`` or ``"weights[2]"``), its value, and the message."""

    key: str
    value: object
    message: str


# --------------------------------------------------------------------- mean/sd -> family


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


# -------------------------------------------------------------------- quantile functions


class QuantileFunction(Protocol):
    """A distribution with its parameters, as the design uses it."""

    def ppf(self, q: np.ndarray) -> np.ndarray:
        """The values below which a fraction ``q`` of the distribution lies."""


PLAIN_TAIL_MASS = 1e-290
"""Smallest probability beyond the near end of a truncation interval that its draws take
as a plain number: above it every probability of the interval is a normal float with all
its digits (the smallest is about 2.2e-308); below it they are taken as logarithms, or,
for a family without logarithmic forms, the interval is refused."""

Elementwise = Callable[[np.ndarray], np.ndarray]


class NoRepresentableMass(ValueError):
    """A truncation interval so far in a tail that its probability cannot be computed:
    ``key`` (``"low"`` or ``"high"``) is the end that lies there."""

    def __init__(self, key: str, message: str):
        super().__init__(message)
        self.key = key


@dataclass(frozen=True)
class Logarithmic:
    """The logarithmic forms of a standard distribution, for truncation far in a tail:
    ``log_cdf`` and ``log_sf`` give log P(Z <= z) and log P(Z > z), ``ppf_of_log`` and
    ``isf_of_log`` their inverses (the z whose log-CDF, or log-survival, is given)."""

    log_cdf: Elementwise
    log_sf: Elementwise
    ppf_of_log: Elementwise
    isf_of_log: Elementwise


@dataclass(frozen=True)
class Continuous:
    """A continuous distribution ``X = loc + scale * Z`` for a standard variable Z whose
    CDF ``cdf_standard``, survival function ``sf_standard`` and their inverses
    ``ppf_standard`` and ``isf_standard`` act elementwise on arrays (the CDF, survival
    function and ``isf`` only for families that accept truncation; ``logarithmic`` for
    those whose truncation may lie beyond :data:`PLAIN_TAIL_MASS`)."""

    ppf_standard: Elementwise
    loc: float = 0.0
    scale: float = 1.0
    cdf_standard: Elementwise | None = None
    sf_standard: Elementwise | None = None
    isf_standard: Elementwise | None = None
    logarithmic: Logarithmic | None = None

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

    def truncated_ppf(self, u: np.ndarray, low: float, high: float) -> np.ndarray:
        """The quantile function of X conditioned on low <= X <= high.

        The draw is first moved into the kept probability range,
        u -> F(low) + u (F(high) - F(low)), or in the survival form
        S(low) - u (S(low) - S(high)) mapped by ``isf`` when the range lies in the upper
        half, where 1 - F loses the digits that S keeps.  When the probability beyond the
        near end is below :data:`PLAIN_TAIL_MASS` (a normal truncated to [40, 41] keeps
        about 1e-350, which underflows), the same map is taken in logarithms,
        log F(x) = logaddexp(log(1 - u) + log F(low), log(u) + log F(high)) (and alike
        for S), and inverted by the logarithmic forms.

        Raises
        ------
        NoRepresentableMass : the interval lies so far in a tail that its probability
            cannot be computed (:meth:`check_truncation`).
        """
        self.check_truncation(low, high)
        upper = self.cdf(low) > 0.5
        near = self.sf(low) if upper else self.cdf(high)
        if near < PLAIN_TAIL_MASS:
            return np.clip(self._truncated_in_logarithms(u, low, high, upper), low, high)
        if upper:
            survival_low, survival_high = self.sf(low), self.sf(high)
            values = self.isf(survival_low - u * (survival_low - survival_high))
        else:
            cdf_low, cdf_high = self.cdf(low), self.cdf(high)
            values = self.ppf(cdf_low + u * (cdf_high - cdf_low))
        return np.clip(values, low, high)

    def check_truncation(self, low: float, high: float) -> None:
        """Raise :class:`NoRepresentableMass` unless draws of X conditioned on
        low <= X <= high can be computed: the probability beyond the interval's near end
        is at least :data:`PLAIN_TAIL_MASS`, or the family has logarithmic forms and its
        logarithm is finite."""
        upper = self.cdf(low) > 0.5
        key, end = ("low", low) if upper else ("high", high)
        near = self.sf(low) if upper else self.cdf(high)
        if near >= PLAIN_TAIL_MASS:
            return
        if self.logarithmic is not None:
            standard = np.float64((end - self.loc) / self.scale)
            log_near = (self.logarithmic.log_sf if upper else self.logarithmic.log_cdf)(standard)
            if np.isfinite(log_near):
                return
        side = "above" if upper else "below"
        size = "it underflows to 0" if near == 0 else f"about {near:.1e}"
        raise NoRepresentableMass(key, f"the distribution has almost no probability {side} "
                                       f"{end:g} ({size}): the interval is too far in its "
                                       "tail to draw from")

    def _truncated_in_logarithms(self, u: np.ndarray, low: float, high: float,
                                 upper: bool) -> np.ndarray:
        """:meth:`truncated_ppf`'s map in logarithms (the upper form with ``upper``)."""
        forms = self.logarithmic
        assert forms is not None
        z_low = np.float64((low - self.loc) / self.scale)
        z_high = np.float64((high - self.loc) / self.scale)
        with np.errstate(divide="ignore"):
            log_u, log_rest = np.log(u), np.log1p(-u)
        if upper:
            log_survival = np.logaddexp(log_rest + forms.log_sf(z_low),
                                        log_u + forms.log_sf(z_high))
            standard = forms.isf_of_log(log_survival)
        else:
            log_cdf = np.logaddexp(log_rest + forms.log_cdf(z_low),
                                   log_u + forms.log_cdf(z_high))
            standard = forms.ppf_of_log(log_cdf)
        return standard * self.scale + self.loc


@dataclass(frozen=True)
class Choice:
    """A discrete distribution on ``values`` with probabilities proportional to
    ``weights`` (equal when there are none)."""

    values: tuple[float, ...]
    weights: tuple[float, ...] = ()

    def ppf(self, q: np.ndarray) -> np.ndarray:
        """The smallest value whose cumulative weight reaches ``q`` (values sorted)."""
        points = np.asarray(self.values, dtype=np.float64)
        if self.weights:
            total = math.fsum(self.weights)
            mass = np.asarray([w / total for w in self.weights], dtype=np.float64)
        else:
            mass = np.full(points.size, 1.0 / points.size)
        order = np.argsort(points, kind="stable")
        points, mass = points[order], mass[order]
        cumulative = np.cumsum(mass) / mass.sum()
        cumulative[-1] = 1.0
        index = np.searchsorted(cumulative, q, side="left")
        return points[np.minimum(index, points.size - 1)]


def _positive_log(x: np.ndarray) -> np.ndarray:
    """log(x), -inf for x <= 0 (below a lognormal's support)."""
    with np.errstate(divide="ignore"):
        return np.log(np.maximum(x, 0.0))


# The standard forms of Johnson, Kotz & Balakrishnan (1994, 1995; chapters as in the
# module's note) through scipy.special: ndtr/ndtri, the normal integral and its inverse;
# gammainc/gammaincinv and betainc/betaincinv, the regularised incomplete gamma and beta
# functions and their inverses.

def _uniform(a: Arguments) -> Continuous:
    return Continuous(lambda q: q, loc=a["low"], scale=a["high"] - a["low"])


# log_ndtr is the logarithm of the normal integral, accurate far into either tail, and
# ndtri_exp its inverse (the z whose log_ndtr is given).
NORMAL_LOGARITHMS = Logarithmic(special.log_ndtr, lambda z: special.log_ndtr(-z),
                                special.ndtri_exp, lambda log_q: -special.ndtri_exp(log_q))


def _normal(a: Arguments) -> Continuous:
    return Continuous(special.ndtri, a["mean"], a["sd"], special.ndtr,
                      lambda z: special.ndtr(-z), lambda q: -special.ndtri(q),
                      NORMAL_LOGARITHMS)


def _lognormal(a: Arguments) -> Continuous:
    """exp(sigma * N) scaled by exp(mu): the normal's forms through the logarithm."""
    mu, sigma = lognormal_parameters(a["mean"], a["sd"])
    logarithms = Logarithmic(
        lambda z: special.log_ndtr(_positive_log(z) / sigma),
        lambda z: special.log_ndtr(-_positive_log(z) / sigma),
        lambda log_q: np.exp(sigma * special.ndtri_exp(log_q)),
        lambda log_q: np.exp(-sigma * special.ndtri_exp(log_q)))
    return Continuous(lambda q: np.exp(sigma * special.ndtri(q)), 0.0, math.exp(mu),
                      lambda z: special.ndtr(_positive_log(z) / sigma),
                      lambda z: special.ndtr(-_positive_log(z) / sigma),
                      lambda q: np.exp(-sigma * special.ndtri(q)), logarithms)


def _gamma(a: Arguments) -> Continuous:
    shape, scale = gamma_parameters(a["mean"], a["sd"])
    return Continuous(lambda q: special.gammaincinv(shape, q), 0.0, scale,
                      lambda z: special.gammainc(shape, np.maximum(z, 0.0)),
                      lambda z: special.gammaincc(shape, np.maximum(z, 0.0)),
                      lambda q: special.gammainccinv(shape, q))


def _beta(a: Arguments) -> Continuous:
    shape_a, shape_b = beta_parameters(a["mean"], a["sd"])
    return Continuous(lambda q: special.betaincinv(shape_a, shape_b, q))


def _triangular(a: Arguments) -> Continuous:
    low, mode, high = a["low"], a["mode"], a["high"]
    c = (mode - low) / (high - low)
    return Continuous(lambda q: np.where(q < c, np.sqrt(c * q),
                                         1.0 - np.sqrt((1.0 - c) * (1.0 - q))),
                      loc=low, scale=high - low)


def _choice(a: Arguments) -> Choice:
    return Choice(a["values"], a.get("weights", ()))  # type: ignore[arg-type]


# ------------------------------------------------------------------ impossible arguments


def _above_low(a: Arguments) -> Problem | None:
    if a["low"] >= a["high"]:
        return Problem("high", a["high"], f"must be above low ({a['low']:g})")
    return None


def _mode_inside(a: Arguments) -> Problem | None:
    problem = _above_low(a)
    if problem is None and not a["low"] <= a["mode"] <= a["high"]:
        problem = Problem("mode", a["mode"],
                          f"must lie within low..high ({a['low']:g}..{a['high']:g})")
    return problem


def _positive_sd(a: Arguments) -> Problem | None:
    if a["sd"] <= 0:
        return Problem("sd", a["sd"], "must be positive")
    return None


def _positive_mean(family: str) -> Callable[[Arguments], Problem | None]:
    def problem(a: Arguments) -> Problem | None:
        first = _positive_sd(a)
        if first is None and a["mean"] <= 0:
            first = Problem("mean", a["mean"], f"must be positive for a {family} distribution")
        return first
    return problem


def _beta_moments(a: Arguments) -> Problem | None:
    mean, sd = a["mean"], a["sd"]
    first = _positive_sd(a)
    if first is not None:
        return first
    if not 0 < mean < 1:
        return Problem("mean", mean, "must lie strictly between 0 and 1 for a beta "
                                     "distribution")
    if sd * sd >= mean * (1 - mean):
        return Problem("sd", sd, "no beta distribution has this mean and sd: sd must be "
                                 f"below sqrt(mean * (1 - mean)) = "
                                 f"{math.sqrt(mean * (1 - mean)):.6g}")
    return None


def _choice_weights(a: Arguments) -> Problem | None:
    values: tuple[float, ...] = a["values"]  # type: ignore[assignment]
    weights: tuple[float, ...] | None = a.get("weights")  # type: ignore[assignment]
    if not values:
        return Problem("values", [], "must list at least one value")
    if weights is None:
        return None
    if len(weights) != len(values):
        return Problem("weights", list(weights),
                       f"must have one weight per value ({len(values)})")
    negative = [i for i, weight in enumerate(weights) if weight < 0]
    if negative:
        return Problem(f"weights[{negative[0]}]", weights[negative[0]], "must not be negative")
    if math.fsum(weights) <= 0:
        return Problem("weights", list(weights), "must not all be zero")
    return None


def _always_possible(a: Arguments) -> Problem | None:
    return None


# -------------------------------------------------------------------------- the registry


@dataclass(frozen=True)
class Family:
    """One distribution family of the scenario format.

    Attributes
    ----------
    name : the family's name in the scenario file (``dist = "<name>"``).
    required : the keys it needs.
    make : its distribution for given arguments (every value a number, except the keys
        of ``lists``).
    optional : further keys it accepts besides ``low``/``high`` truncation.
    lists : keys whose value is a list of numbers rather than a number.
    problem : the first reason its arguments are impossible, or None when they are fine.
    truncatable : whether it accepts optional ``low``/``high`` truncation.
    support_low : the lower end of its support (an upper truncation at or below it keeps
        nothing).
    """

    name: str
    required: tuple[str, ...]
    make: Callable[[Arguments], QuantileFunction]
    optional: tuple[str, ...] = ()
    lists: frozenset[str] = frozenset()
    problem: Callable[[Arguments], Problem | None] = _always_possible
    truncatable: bool = False
    support_low: float = -math.inf

    def truncation_problem(self, arguments: Arguments, low: float | None,
                           high: float | None) -> Problem | None:
        """Why truncation of the family with ``arguments`` to [low, high] is impossible
        (None for an open end), or None: an empty interval, one outside the support, or
        one too far in a tail to draw (:class:`NoRepresentableMass`)."""
        if low is not None and high is not None and low >= high:
            return Problem("high", high, f"must be above low ({low:g})")
        if high is not None and high <= self.support_low:
            return Problem("high", high, f"a {self.name} distribution has no values at or "
                                         f"below {self.support_low:g}")
        distribution = self.make(arguments)
        try:
            distribution.check_truncation(  # type: ignore[attr-defined]
                -math.inf if low is None else low, math.inf if high is None else high)
        except NoRepresentableMass as refused:
            return Problem(refused.key, low if refused.key == "low" else high, str(refused))
        return None


FAMILIES: dict[str, Family] = {family.name: family for family in (
    Family("uniform", ("low", "high"), _uniform, problem=_above_low),
    Family("normal", ("mean", "sd"), _normal, problem=_positive_sd, truncatable=True),
    Family("lognormal", ("mean", "sd"), _lognormal,
           problem=_positive_mean("lognormal"), truncatable=True, support_low=0.0),
    Family("gamma", ("mean", "sd"), _gamma, problem=_positive_mean("gamma"),
           truncatable=True, support_low=0.0),
    Family("beta", ("mean", "sd"), _beta, problem=_beta_moments),
    Family("triangular", ("low", "mode", "high"), _triangular, problem=_mode_inside),
    Family("choice", ("values",), _choice, optional=("weights",),
           lists=frozenset({"values", "weights"}), problem=_choice_weights),
)}
"""Every distribution family, by its name in the scenario file."""


def inverse_cdf(family: str, arguments: Arguments,
                truncation: tuple[float | None, float | None], u: np.ndarray) -> np.ndarray:
    """Map uniform draws ``u`` in (0, 1) to values of a family with ``arguments``,
    truncated to ``truncation`` = (low, high) (None for an open end)."""
    distribution = FAMILIES[family].make(arguments)
    u = np.asarray(u, dtype=np.float64)
    low, high = truncation
    if low is None and high is None:
        return distribution.ppf(u)
    return distribution.truncated_ppf(  # type: ignore[attr-defined]
        u, -np.inf if low is None else float(low), np.inf if high is None else float(high))
