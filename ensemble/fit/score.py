"""How well quantile projections met what was then observed: the weighted interval score
and the empirical coverage of central prediction intervals.

Both follow Bracher, Ray, Gneiting & Reich (2021), "Evaluating epidemic forecasts in an
interval format", *PLoS Computational Biology* 17:e1008618. A projection given as
quantiles at levels symmetric about one half holds a median and K central intervals; the
interval with nominal coverage 1 - alpha has the alpha/2 and 1 - alpha/2 quantiles as its
ends l and u. For an observation y,

    IS_alpha = (u - l) + (2 / alpha) (l - y) 1[y < l] + (2 / alpha) (y - u) 1[y > u]

    WIS = (|y - m| / 2 + sum_k (alpha_k / 2) IS_alpha_k) / (K + 1/2)

(their equations 1 and 2 with the weights w_0 = 1/2 and w_k = alpha_k / 2 they
recommend), where m is the median. Lower is better; a WIS is in the units of y.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

_LEVEL_TOLERANCE = 1e-9
"""Two quantile levels are taken as symmetric when p + q is within this of 1."""


@dataclass(frozen=True)
class CentralIntervals:
    """Where a set of quantile levels puts the median and the central intervals.

    Attributes
    ----------
    median : index of the 0.5 quantile, or None when the levels lack it.
    alphas : each interval's alpha (nominal coverage 1 - alpha), from widest to narrowest.
    lower, upper : index of each interval's alpha/2 and 1 - alpha/2 quantile.
    """

    median: int | None
    alphas: np.ndarray
    lower: np.ndarray
    upper: np.ndarray


def central_intervals(levels: np.ndarray) -> CentralIntervals:
    """The median and every central interval that the quantile ``levels`` hold: each
    level p below one half paired with the level 1 - p (levels without a partner are
    not used)."""
    levels = np.asarray(levels, dtype=float)
    median = next((i for i, p in enumerate(levels) if abs(p - 0.5) < _LEVEL_TOLERANCE),
                  None)
    pairs = []
    for i, p in enumerate(levels):
        if p >= 0.5 - _LEVEL_TOLERANCE:
            continue
        partner = np.flatnonzero(np.abs(levels + p - 1.0) < _LEVEL_TOLERANCE)
        if partner.size:
            pairs.append((2.0 * p, i, int(partner[0])))
    pairs.sort()
    return CentralIntervals(median, np.array([a for a, _, _ in pairs]),
                            np.array([i for _, i, _ in pairs], dtype=int),
                            np.array([j for _, _, j in pairs], dtype=int))


def interval_score(lower: np.ndarray, upper: np.ndarray, alpha: float,
                   observed: np.ndarray) -> np.ndarray:
    """The interval score of the central (1 - alpha) interval [lower, upper] at each
    observation (Bracher et al. 2021, equation 1)."""
    below = np.maximum(lower - observed, 0.0)
    above = np.maximum(observed - upper, 0.0)
    return (upper - lower) + (2.0 / alpha) * below + (2.0 / alpha) * above


def weighted_interval_score(quantiles: np.ndarray, levels: np.ndarray,
                            observed: np.ndarray) -> np.ndarray:
    """The weighted interval score of each projection against its observation.

    Parameters
    ----------
    quantiles : array (..., quantile): the projected quantiles at ``levels``, last axis.
    levels : the quantile levels; they must hold the median and at least one central
        interval.
    observed : array (...): the observations, broadcast against ``quantiles[..., 0]``;
        NaN where nothing was observed (the score is then NaN).

    Returns
    -------
    The score per observation (Bracher et al. 2021, equation 2, with w_0 = 1/2 and
    w_k = alpha_k / 2).
    """
    intervals = central_intervals(levels)
    if intervals.median is None or intervals.alphas.size == 0:
        raise ValueError("the weighted interval score needs the 0.5 quantile and at least "
                         "one pair of levels p and 1 - p")
    quantiles = np.asarray(quantiles, dtype=float)
    observed = np.asarray(observed, dtype=float)
    total = 0.5 * np.abs(observed - quantiles[..., intervals.median])
    for alpha, i, j in zip(intervals.alphas, intervals.lower, intervals.upper):
        total = total + 0.5 * alpha * interval_score(
            quantiles[..., i], quantiles[..., j], alpha, observed)
    return total / (intervals.alphas.size + 0.5)


def interval_coverage(quantiles: np.ndarray, levels: np.ndarray,
                      observed: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Whether each observation lies in each central interval, ends included.

    Returns
    -------
    (nominal, inside): ``nominal`` the intervals' nominal coverages 1 - alpha, widest
    first; ``inside`` an array (..., interval) of 1.0 where the observation is inside,
    0.0 where outside and NaN where nothing was observed. Its mean over observations is
    the empirical coverage (Bracher et al. 2021, section "Coverage").
    """
    intervals = central_intervals(levels)
    quantiles = np.asarray(quantiles, dtype=float)
    observed = np.asarray(observed, dtype=float)[..., np.newaxis]
    lower = quantiles[..., intervals.lower]
    upper = quantiles[..., intervals.upper]
    inside = ((lower <= observed) & (observed <= upper)).astype(float)
    inside[np.broadcast_to(np.isnan(observed), inside.shape)] = np.nan
    return 1.0 - intervals.alphas, inside
