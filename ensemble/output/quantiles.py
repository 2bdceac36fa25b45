"""Quantiles over members, and which members are behind them.

Quantiles use numpy's default definition (linear interpolation between order
statistics: Hyndman and Fan 1996, "Sample quantiles in statistical packages", The
American Statistician 50(4), definition 7), so they are the same numbers whatever the
order or grouping in which members arrive.

Which members the quantiles rest on: only those without any status bit.  A member whose
step check failed, that went below zero, whose Newton iteration did not converge, whose
values stopped being finite or whose drawn start was impossible has numbers the run
cannot vouch for, and bands that include them can span impossible values (a badly chosen
step gave bands from -28,910 to 48,845 persons in a population of 48,000).  Such members
keep their trajectories, metrics and status in the file; the file counts, per variant,
the members behind the quantiles (``members_in_summary``) and those left out by each bit
(``members_left_out``), and ``ensemble summary`` prints both.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ensemble.records import STATUS_FLAGS

EXCLUDED_FROM_SUMMARY = np.bitwise_or.reduce([bit for bit, _ in STATUS_FLAGS])
"""Status bits that keep a member out of the quantiles: every one of them."""


def in_summary(status: np.ndarray) -> np.ndarray:
    """Boolean mask of the members behind the quantiles: those without a status bit."""
    return (np.asarray(status) & EXCLUDED_FROM_SUMMARY) == 0


def left_out_by_bit(status: np.ndarray) -> np.ndarray:
    """Members left out of the quantiles that carry each status bit (in the order of
    :data:`~ensemble.records.STATUS_FLAGS`; a member may carry several), counted over
    the last axis of ``status``: shape ``status.shape[:-1] + (bits,)``."""
    status = np.asarray(status)
    return np.stack([np.count_nonzero(status & bit, axis=-1) for bit, _ in STATUS_FLAGS],
                    axis=-1)


def quantiles(values: np.ndarray, probabilities: Sequence[float], *, axis: int = 0,
              overwrite_input: bool = False) -> np.ndarray:
    """Quantiles of ``values`` over ``axis`` (numpy's default linear definition); the
    quantile axis replaces ``axis`` at the front.  NaN where ``axis`` is empty or holds a
    NaN.

    The values are sorted along ``axis`` (in place with ``overwrite_input``) and the
    order statistics read off by :func:`quantiles_of_sorted`: numpy's vectorised sort
    takes about a fifth of the time of ``numpy.quantile``'s selection of a dozen ranks
    (measured on 200,000 members), and the numbers are the same.
    """
    probabilities = np.asarray(probabilities, dtype=np.float64)
    if values.shape[axis] == 0:
        shape = np.delete(np.array(values.shape), axis % values.ndim)
        return np.full((len(probabilities), *shape), np.nan)
    if overwrite_input:
        values.sort(axis=axis)
        ordered = values
    else:
        ordered = np.sort(values, axis=axis)
    return quantiles_of_sorted(np.moveaxis(ordered, axis, -1), probabilities)


def quantiles_of_sorted(ordered: np.ndarray, probabilities: np.ndarray) -> np.ndarray:
    """Quantiles along the last axis of ``ordered``, sorted ascending along it (NaN last,
    as numpy sorts), shaped (quantile, ...); NaN where the values hold a NaN.

    Hyndman and Fan (1996) definition 7, computed as ``numpy.quantile``'s default
    "linear" method does, so the bits agree (:func:`linear_ranks`, :func:`interpolate`).
    """
    below, above, fraction = linear_ranks(ordered.shape[-1], probabilities)
    lower = np.moveaxis(ordered[..., below], -1, 0)
    upper = np.moveaxis(ordered[..., above], -1, 0)
    result = interpolate(lower, upper, fraction.reshape(-1, *([1] * (ordered.ndim - 1))))
    result[:, np.isnan(ordered[..., -1])] = np.nan
    return result


def linear_ranks(count: int, probabilities: Sequence[float]
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The order statistics (0-based ranks among ``count`` values) that numpy's linear
    quantile of each probability interpolates between, and the fraction of the way:
    virtual index ``(count - 1) p``, neighbours ``floor`` and ``floor + 1``, both the
    last rank from ``count - 1`` on."""
    virtual = (count - 1) * np.asarray(probabilities, dtype=np.float64)
    below = np.floor(virtual)
    above = below + 1
    beyond = virtual >= count - 1
    below[beyond] = count - 1
    above[beyond] = count - 1
    return below.astype(np.intp), above.astype(np.intp), virtual - below


def interpolate(lower: np.ndarray, upper: np.ndarray, fraction: np.ndarray) -> np.ndarray:
    """numpy's interpolation between neighbouring order statistics: ``a + (b - a) g`` for
    a fraction g below 1/2, ``b - (b - a)(1 - g)`` from 1/2 on."""
    gap = upper - lower
    result = lower + gap * fraction
    np.subtract(upper, gap * (1 - fraction), out=result,
                where=np.broadcast_to(fraction >= 0.5, result.shape))
    return result


def member_quantiles(values: np.ndarray, probabilities: Sequence[float],
                     included: np.ndarray) -> np.ndarray:
    """Quantiles over the members (axis 0) of ``values`` selected by ``included``."""
    return quantiles(values[included], probabilities, axis=0, overwrite_input=True)
