"""Per-member metrics of the trajectories (peaks, peak times, totals) and their
quantiles over members.

One compiled (numba) pass over the times gives every metric of a chunk of members as it
is saved; the quantiles over members (:mod:`.quantiles`) of each metric, and of each
member's metric minus the same member's in the ``compare_to`` variant, are computed when
the result is finished.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numba
import numpy as np

from ensemble.output.quantiles import in_summary, left_out_by_bit, member_quantiles
from ensemble.output.variables import MEMBER_VALUES, METRIC_NAMES, TRAJECTORIES


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


def member_metrics(trajectories: Mapping[str, np.ndarray],
                   times: np.ndarray) -> dict[str, np.ndarray]:
    """The metrics of each member's trajectories (:data:`.variables.METRICS`).

    Parameters
    ----------
    trajectories : name of each trajectory variable -> (..., rows, n_reports) values
        (values before the variable's ``first_report`` are ignored).
    times : (n_reports,) reported times.

    Returns
    -------
    metric name -> (..., rows) float64.  A peak time is the first reported time at which
    the largest value is reached; a trajectory with a NaN has neither.  Totals add the
    values in time order, so a member's total has the same bits whatever chunk it was
    computed in.
    """
    times = np.asarray(times, dtype=np.float64)
    metrics: dict[str, np.ndarray] = {}
    for variable in TRAJECTORIES:
        if not variable.metrics:
            continue
        peak, when, total = _time_scan(trajectories[variable.name], times,
                                       variable.first_report)
        taken = {"peak_value": peak, "peak_time": when, "total": total}
        metrics.update((metric.name, taken[metric.kind]) for metric in variable.metrics)
    return metrics


def summary_quantiles(per_member: Mapping[str, np.ndarray], status: np.ndarray,
                      probabilities: Sequence[float],
                      compare_to: int | None = None) -> dict[str, np.ndarray]:
    """``members_in_summary``, ``members_left_out``, ``<metric>_quantile``,
    ``<value>_quantile`` of each
    summarised per-member value and (with ``compare_to``)
    ``difference_quantile_<metric>`` (the project's reference,
    ``ensemble/scenario/reference.md``, result file).

    Parameters
    ----------
    per_member : each metric name (:data:`.variables.METRIC_NAMES`) -> (variant, member,
        rows) values, and each summarised per-member value -> (variant, member).
    status : (variant, member) status bits.
    probabilities : the quantiles' probabilities.
    compare_to : index of the variant to subtract member by member; a member counts in
        a difference only when it is in the summary in both variants.

    Returns
    -------
    name -> (variant,) and (variant, status bit) int32 counts, (variant, quantile) or
    (variant, quantile, rows) quantiles.
    """
    included = in_summary(status)
    result: dict[str, np.ndarray] = {
        "members_in_summary": included.sum(axis=1).astype(np.int32),
        "members_left_out": left_out_by_bit(status).astype(np.int32)}
    n_variants = included.shape[0]
    for value in MEMBER_VALUES:
        if value.summarised:
            result[f"{value.name}_quantile"] = np.stack(
                [member_quantiles(per_member[value.name][v], probabilities, included[v])
                 for v in range(n_variants)])
    for name in METRIC_NAMES:
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
