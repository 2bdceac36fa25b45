"""Each observed measure as it would be observed: the member's measure with the noise
of the observation on it, a second per-member series whose bands are predictive
intervals for the counts themselves.

A measure that an ``[[observations]]`` table observes (the first such table, when
several do) gets the series ``measure_<name>_as_observed``: for member i and window (or
reported time) w, the quantile function of the observed count's distribution, Poisson
with mean m = rho_i x_iw or negative binomial with that mean and dispersion k_i
(variance m + m^2 / k_i), at a uniform draw u_iw
(:func:`ensemble.sampling.uniform.observation_noise_draws`), where x_iw is the member's
measure and rho_i, k_i its reporting fraction and dispersion (``[[observations]]`` in
the project's reference, ``ensemble/scenario/reference.md``). The draw depends on the
seed, the measure, w and i alone, so the series has the same bits whatever the chunks
and workers, and every variant's member i sees the same noise (common random numbers).
The negative binomial in this mean-dispersion form is the gamma mixture of Poissons of
Lloyd-Smith, Schreiber, Kopp & Getz (2005), "Superspreading and the effect of individual
variation on disease emergence", Nature 438:355-359; in scipy's terms it is
``nbinom(n=k, p=k / (k + m))``. Quantiles over members of the series are the
predictive intervals of Bracher, Ray, Gneiting & Reich (2021), "Evaluating epidemic
forecasts in an interval format", PLoS Comput. Biol. 17:e1008618, that ``ensemble
score`` judges counts against.
"""

from __future__ import annotations

from collections.abc import Mapping
import numpy as np

from ensemble.output.layout import ResultLayout
from ensemble.records import ChunkResult
from ensemble.sampling.uniform import observation_noise_draws
from ensemble.scenario.observations import AS_OBSERVED_SUFFIX
from ensemble.scenario.schema import Observation

SUFFIX = AS_OBSERVED_SUFFIX
"""The series of measure ``<name>`` as observed is ``measure_<name>_as_observed``."""


SEARCH_STEPS = 12
"""Steps of one count up or down from the first guess before a Poisson value is handed
to scipy.stats' quantile function (which inverts the distribution function by iteration,
about five times slower)."""


def observed_count_quantile(probability: np.ndarray, mean: np.ndarray, distribution: str,
                            dispersion: np.ndarray | float | None = None) -> np.ndarray:
    """The quantile function of an observed count: the smallest whole y with
    P(Y <= y) >= ``probability``, elementwise, for Y Poisson with ``mean`` or negative
    binomial with ``mean`` and ``dispersion`` k; 0 where the mean is 0 (or below, a
    solver's round-off), NaN where it is NaN.

    The negative binomial's is scipy.stats' ``nbinom.ppf``. The Poisson's is the same
    number found faster: the search starts from the Cornish-Fisher approximation (the
    normal quantile corrected for skewness; Cornish & Fisher 1938, "Moments and cumulants
    in the specification of distributions", Rev. Inst. Int. Stat. 5:307-320) and walks
    one count at a time while the definition fails, with P(Y <= y) = Q(y + 1, mean), the
    regularised upper incomplete gamma function of :mod:`scipy.special`; values still
    open after :data:`SEARCH_STEPS` steps are scipy.stats' ``poisson.ppf``.

    Parameters
    ----------
    probability : draws in (0, 1).
    mean : the expected observed counts, broadcast against ``probability``.
    distribution : ``"poisson"`` or ``"negative-binomial"``.
    dispersion : k of the negative binomial, broadcast against ``probability``.
    """
    from scipy import special, stats    # stats here only: it takes half a second to import

    probability, mean = np.broadcast_arrays(np.asarray(probability, dtype=float),
                                            np.asarray(mean, dtype=float))
    positive = np.where(mean > 0, mean, 1.0)
    if distribution == "poisson":
        z = special.ndtri(probability)
        guess = positive + np.sqrt(positive) * z + (z * z - 1.0) / 6.0
        counts = _walk(np.maximum(np.floor(np.nan_to_num(guess)), 0.0), probability,
                       lambda y, where: special.gammaincc(y + 1.0, positive[where]))
        open_ = np.isnan(counts) & (mean > 0)
        counts[open_] = stats.poisson.ppf(probability[open_], positive[open_])
    elif distribution == "negative-binomial":
        k = np.broadcast_to(np.asarray(dispersion, dtype=float), mean.shape)
        counts = stats.nbinom.ppf(probability, k, k / (k + positive))
    else:
        raise ValueError(f"unknown distribution {distribution!r}")
    counts = np.where(mean > 0, counts, 0.0)
    return np.where(np.isnan(mean), np.nan, counts).astype(np.float64)


def _walk(counts: np.ndarray, probability: np.ndarray, cdf) -> np.ndarray:
    """From ``counts``, the smallest y with ``cdf(y) >= probability``, one step at a time;
    NaN where :data:`SEARCH_STEPS` steps do not reach it."""
    counts = np.array(counts, dtype=float)
    active = np.arange(counts.size)
    flat, target = counts.reshape(-1), probability.reshape(-1)
    for _ in range(SEARCH_STEPS):
        y, u = flat[active], target[active]
        low = cdf(y, _unravel(active, counts.shape)) < u
        below = np.maximum(y - 1.0, 0.0)
        high = ~low & (y > 0) & (cdf(below, _unravel(active, counts.shape)) >= u)
        flat[active[low]] += 1.0
        flat[active[high]] -= 1.0
        active = active[low | high]
        if not active.size:
            return counts
    flat[active] = np.nan
    return counts


def _unravel(flat: np.ndarray, shape: tuple[int, ...]) -> tuple[np.ndarray, ...]:
    return np.unravel_index(flat, shape)


def first_observations(layout: ResultLayout) -> dict[str, Observation]:
    """Measure name -> the first ``[[observations]]`` table that observes it, in the
    order of the measures."""
    found: dict[str, Observation] = {}
    for observation in layout.scenario.observations:
        found.setdefault(observation.measure, observation)
    return {measure.name: found[measure.name] for measure in layout.scenario.measures
            if measure.name in found}


def member_values(value: float | str | None, reported: Mapping[str, np.ndarray] | None,
                  members: int) -> np.ndarray | float | None:
    """A number as it is, or a parameter's name as each member's value ((members, 1),
    to broadcast over the times).

    Raises
    ------
    ValueError : the parameter's values are not at hand.
    """
    if not isinstance(value, str):
        return value
    if reported is None or value not in reported:
        raise ValueError(f"the members' values of parameter {value!r} are needed for "
                         "the series as observed, and the chunk does not carry them")
    values = np.asarray(reported[value], dtype=float)
    if values.shape != (members,):
        raise ValueError(f"parameter {value!r} has shape {values.shape}, expected "
                         f"({members},)")
    return values[:, np.newaxis]


def as_observed(observation: Observation, seed: int, series: np.ndarray,
                result: ChunkResult) -> np.ndarray:
    """(members, 1, times) the observed measure's ``series`` (members, 1, times) of the
    chunk ``result`` as it would be observed, its noise drawn for the chunk's members."""
    members = series.shape[0]
    draws = observation_noise_draws(seed, observation.measure, series.shape[2],
                                    result.members)
    reporting = member_values(observation.reporting, result.reported, members)
    dispersion = member_values(observation.dispersion, result.reported, members)
    counts = observed_count_quantile(draws, reporting * series[:, 0, :],
                                     observation.distribution, dispersion)
    return counts[:, np.newaxis, :]


def long_name(observation: Observation) -> str:
    """The CF ``long_name`` of a measure's series as observed."""
    noise = ("Poisson" if observation.distribution == "poisson"
             else "negative-binomial")
    return (f"measure {observation.measure} as it would be observed: the member's "
            f"measure times its reporting fraction, with {noise} observation noise "
            "(one draw per member and time)")
