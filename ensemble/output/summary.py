"""Per-member metrics (peaks, peak times, totals) and quantiles over members.

numpy, with one compiled (numba) pass over the times for the metrics: used by the
streaming store on each chunk, by :func:`ensemble.simulate` on a whole ensemble, and by
``ensemble summary``.  Quantiles use numpy's default definition
(linear interpolation between order statistics: Hyndman and Fan 1996, "Sample quantiles
in statistical packages", definition 7), so they are the same numbers whatever the
order or grouping in which members arrive.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numba
import numpy as np

from ensemble.records import INVALID_START, NON_FINITE, STATUS_FLAGS

EXCLUDED_FROM_SUMMARY = NON_FINITE | INVALID_START
"""Status bits that keep a member out of the quantiles."""

STATE_METRICS = ("peak_value", "peak_time")
"""Metrics with one value per member and state row."""

FLOW_METRICS = ("flow_peak_value", "flow_peak_time", "total_flow")
"""Metrics with one value per member and flow row."""

METRICS = STATE_METRICS + FLOW_METRICS


def status_counts(status: np.ndarray) -> dict[str, int]:
    """Members behind each status bit: flag word (as in ``flag_meanings``) -> count."""
    return {word: int(np.count_nonzero(status & bit)) for bit, word in STATUS_FLAGS}


def in_summary(status: np.ndarray) -> np.ndarray:
    """Boolean mask of the members behind the quantiles: those without the non-finite or
    invalid-start bits."""
    return (np.asarray(status) & EXCLUDED_FROM_SUMMARY) == 0


@numba.njit(cache=True, nogil=True)
def _scan_times(values: np.ndarray, first: int, peak: np.ndarray, peak_index: np.ndarray,
                total: np.ndarray) -> None:
    """One pass over the (n_times, K) ``values`` from row ``first`` on: the largest value
    of each column, the row where it is first reached (NaN peak where any value is NaN)
    and the sum of the column (added in time order)."""
    n_times, columns = values.shape
    for k in range(columns):
        peak[k] = values[first, k]
        peak_index[k] = first
        total[k] = 0.0
    seen_nan = np.zeros(columns, np.bool_)
    for t in range(first, n_times):
        row = values[t]
        for k in range(columns):
            value = row[k]
            total[k] += value
            seen_nan[k] |= value != value
            if value > peak[k]:
                peak[k] = value
                peak_index[k] = t
    for k in range(columns):
        if seen_nan[k]:
            peak[k] = np.nan


def _time_scan(values: np.ndarray, times: np.ndarray, first: int
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Peak value, first peak time and sum over times ``first:`` of (..., n_times)
    ``values``, each shaped ``values.shape[:-1]``.

    The pass runs over the array's own memory order (time-major arrays, as the compiled
    backend writes them, are read in place without a copy).
    """
    moved = np.moveaxis(values, -1, 0)
    # the other axes from the largest stride to the smallest: contiguous when possible
    order = sorted(range(moved.ndim - 1), key=lambda axis: -abs(moved.strides[axis + 1]))
    rows = np.ascontiguousarray(moved.transpose(0, *(axis + 1 for axis in order)),
                                dtype=np.float64)
    shape = rows.shape[1:]
    flat = rows.reshape(rows.shape[0], -1)
    peak = np.empty(flat.shape[1])
    peak_index = np.empty(flat.shape[1], np.int64)
    total = np.empty(flat.shape[1])
    if flat.shape[0] > first:
        _scan_times(flat, first, peak, peak_index, total)
        when = times[peak_index]
        when[np.isnan(peak)] = np.nan
    else:
        peak[:], total[:] = np.nan, 0.0
        when = np.full(flat.shape[1], np.nan)
    back = np.argsort(order)
    return tuple(np.ascontiguousarray(array.reshape(shape).transpose(back))
                 for array in (peak, when, total))


def member_metrics(state: np.ndarray, flow_count: np.ndarray,
                   times: np.ndarray) -> dict[str, np.ndarray]:
    """Peaks, peak times and totals of each member.

    Parameters
    ----------
    state : (..., n_states, n_reports) persons at each reported time.
    flow_count : (..., n_flow_elements, n_reports) persons moved over the interval ending
        at each reported time (the first entry, NaN, is ignored).
    times : (n_reports,) reported times.

    Returns
    -------
    ``peak_value``, ``peak_time`` (..., n_states); ``flow_peak_value``,
    ``flow_peak_time``, ``total_flow`` (..., n_flow_elements), all float64.  A peak time is
    the first reported time at which the largest value is reached; a trajectory with a
    NaN has neither.  Totals add the intervals in time order, so a member's total has the
    same bits whatever chunk it was computed in.
    """
    times = np.asarray(times, dtype=np.float64)
    peak_value, peak_time, _ = _time_scan(state, times, 0)
    flow_peak_value, flow_peak_time, total_flow = _time_scan(flow_count, times, 1)
    return {"peak_value": peak_value, "peak_time": peak_time,
            "flow_peak_value": flow_peak_value, "flow_peak_time": flow_peak_time,
            "total_flow": total_flow}


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


def summary_quantiles(per_member: Mapping[str, np.ndarray], status: np.ndarray,
                      probabilities: Sequence[float],
                      compare_to: int | None = None) -> dict[str, np.ndarray]:
    """``members_in_summary``, ``<metric>_quantile`` and (with ``compare_to``)
    ``difference_quantile_<metric>`` of SPEC section 3.

    Parameters
    ----------
    per_member : each name of :data:`METRICS` -> (variant, member, rows) values.
    status : (variant, member) status bits.
    probabilities : the quantiles' probabilities.
    compare_to : index of the variant to subtract member by member; a member counts in
        a difference only when it is in the summary in both variants.

    Returns
    -------
    name -> (variant,) int32 counts, or (variant, quantile, rows) quantiles.
    """
    included = in_summary(status)
    result: dict[str, np.ndarray] = {
        "members_in_summary": included.sum(axis=1).astype(np.int32)}
    n_variants = included.shape[0]
    for name in METRICS:
        values = per_member[name]
        result[f"{name}_quantile"] = np.stack(
            [member_quantiles(values[v], probabilities, included[v])
             for v in range(n_variants)])
        if compare_to is not None:
            difference = values - values[compare_to]
            both = included & included[compare_to]
            result[f"difference_quantile_{name}"] = np.stack(
                [member_quantiles(difference[v], probabilities, both[v])
                 for v in range(n_variants)])
    return result
