"""Exact quantiles over members from a fraction of their trajectories.

A quantile over members needs, for every reported time and row of a trajectory (a
*cell*), only the two order statistics that numpy's linear rule interpolates between
(:func:`~ensemble.output.quantiles.linear_ranks`).  Keeping every member's value of every
cell until the end costs gigabytes for large ensembles; this module keeps those near the
ranks that matter and still gives numpy's bits.

Brackets.  A pilot (the run's first members, kept whole) gives, for each cell and each
probability p, the pilot's order statistics at ranks ``P p -/+ (Z sqrt(P p (1 - p)) + 2)``
of its P values: the members' own p-quantile lies between them unless the pilot is off by
Z standard deviations of a binomial count (normal approximation: about 1e-9 for
:data:`MARGIN_SD` = 6; the members are drawn independently or stratified, so the pilot is
a fair sample).  Overlapping intervals of a cell are merged.

Candidates.  Every chunk then keeps, for each cell and interval, its members' values
inside the interval, how many fall below it, and how many are NaN
(:func:`chunk_candidates`).

Selection.  Summed over chunks, the counts place each interval in the order of all
members; when both ranks of a quantile fall inside one interval, its candidates hold the
exact order statistics, found by selection (:func:`select`, :mod:`.rank_select`).  A cell whose ranks the pilot missed is
reported, and the caller computes it from whole trajectories.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numba
import numpy as np

from ensemble.output.quantiles import interpolate, linear_ranks
from ensemble.output.rank_select import select_ranks_of_groups

MARGIN_SD = 6.0
"""Half-width of a bracket in standard deviations of the pilot's binomial rank count."""

PILOT_MEMBER_COUNT = 8192
"""Members of the pilot (the first members of each variant)."""


@dataclass(frozen=True)
class Brackets:
    """Intervals of values kept for each cell.

    Attributes
    ----------
    lower, upper : (cells, K) float64, each cell's disjoint intervals ``[lower, upper]`` in
        increasing order; unused slots have ``lower = inf, upper = -inf`` (empty).
    """

    lower: np.ndarray
    upper: np.ndarray

    def digest(self) -> str:
        """A fingerprint of the intervals (chunks record the brackets they were cut
        with)."""
        return hashlib.sha256(np.ascontiguousarray(self.lower).tobytes()
                              + np.ascontiguousarray(self.upper).tobytes()).hexdigest()


def pilot_brackets(pilot: np.ndarray, probabilities: Sequence[float]) -> Brackets:
    """Brackets of each cell from the pilot's (cells, P) values, which are sorted in place
    (NaN ignored; a cell with fewer than two numbers keeps every value)."""
    return merged_brackets(*pilot_ranges(pilot, probabilities))


def pilot_ranges(pilot: np.ndarray, probabilities: Sequence[float]
                 ) -> tuple[np.ndarray, np.ndarray]:
    """(cells, len(probabilities)) lower and upper ends of each quantile's interval from
    the pilot's (cells, P) values, which are sorted in place; a cell may be split into
    blocks of rows (:func:`merged_brackets` merges the intervals of each cell)."""
    pilot.sort(axis=1)
    finite = np.isfinite(pilot).sum(axis=1)
    probabilities = np.asarray(probabilities, dtype=np.float64)
    cells = pilot.shape[0]
    lower = np.full((cells, len(probabilities)), -np.inf)
    upper = np.full((cells, len(probabilities)), np.inf)
    for count in np.unique(finite[finite >= 2]):
        rows = np.flatnonzero(finite == count)[:, None]
        low_rank, high_rank = bracket_ranks(count, probabilities)
        low_kept = np.flatnonzero(low_rank >= 0)
        high_kept = np.flatnonzero(high_rank <= count - 1)
        lower[rows, low_kept] = pilot[rows, low_rank[low_kept]]
        upper[rows, high_kept] = pilot[rows, high_rank[high_kept]]
    return lower, upper


def bracket_ranks(count, probabilities: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The 0-based ranks ``count p -/+ (MARGIN_SD sqrt(count p (1 - p)) + 2)`` (floor and
    ceiling) among ``count`` values that bracket each probability's quantile (``count`` a
    number, or an array broadcasting against ``probabilities``)."""
    centre = count * probabilities
    margin = MARGIN_SD * np.sqrt(count * probabilities * (1 - probabilities)) + 2
    return (np.floor(centre - margin).astype(np.int64),
            np.ceil(centre + margin).astype(np.int64))


def merged_brackets(lower: np.ndarray, upper: np.ndarray) -> Brackets:
    """Brackets whose cells hold the intervals ``[lower, upper]`` (rows of (cells, K)
    arrays), sorted and merged where they overlap, padded with empty ones."""
    order = np.argsort(lower, axis=1, kind="stable")
    lower = np.take_along_axis(lower, order, axis=1)
    upper = np.take_along_axis(upper, order, axis=1)
    merged_lower = np.full_like(lower, np.inf)
    merged_upper = np.full_like(upper, -np.inf)
    used = _merge_sorted(lower, upper, merged_lower, merged_upper)
    return Brackets(merged_lower[:, :used].copy(), merged_upper[:, :used].copy())


@numba.njit(cache=True, nogil=True)
def _merge_sorted(lower, upper, merged_lower, merged_upper):
    """Each row's intervals (sorted by lower end) merged where they overlap, into the
    rows of ``merged_*``; the most intervals a row kept (at least 1)."""
    most = 1
    for row in range(lower.shape[0]):
        slot = -1
        for k in range(lower.shape[1]):
            low = lower[row, k]
            high = upper[row, k]
            if slot >= 0 and low <= merged_upper[row, slot]:
                merged_upper[row, slot] = max(merged_upper[row, slot], high)
            else:
                slot += 1
                merged_lower[row, slot] = low
                merged_upper[row, slot] = high
        most = max(most, slot + 1)
    return most


@numba.njit(cache=True, nogil=True)
def _cut(values, included, lower, upper, used, below, nans, offsets, out):
    """Cut each cell's row of ``values`` into its candidates, cell after cell.

    For every member a slot: ``2 k + 1`` when its value lies in interval k, an even
    number (``2 k``: between intervals k - 1 and k) otherwise, and an ignored slot for
    NaN values and members not included (loops over members innermost and without
    branches, so the compiler vectorises them).  The slots' counts give ``below`` and
    ``nans``; the members of the odd slots are copied to ``out`` interval by interval
    from ``offsets[c * K + k]`` on, in member order.  Returns how many values were
    kept."""
    cells, member_count = values.shape
    intervals = lower.shape[1]
    ignored = 2 * intervals + 2
    slots = np.empty(member_count, np.int32)
    chosen = np.empty(member_count + 1, np.int32)
    cursor = np.empty(intervals, np.int64)
    kept = 0
    for c in range(cells):
        row = values[c]
        for m in range(member_count):
            slots[m] = 0
        for k in range(used[c]):
            low = lower[c, k]
            high = upper[c, k]
            for m in range(member_count):
                value = row[m]
                slots[m] += (value >= low) + (value > high)
        missing = 0
        for m in range(member_count):
            value = row[m]
            keep = included[m] & (value == value)
            missing += included[m] & (value != value)
            slots[m] = slots[m] * keep + ignored * (1 - keep)
        nans[c] = missing
        # counts by reductions over members, then the kept members' indices in order
        for k in range(used[c]):
            under = 0
            within = 0
            for m in range(member_count):
                under += slots[m] < 2 * k + 1
                within += slots[m] == 2 * k + 1
            below[c, k] = under
            offsets[c * intervals + k] = kept
            cursor[k] = kept
            kept += within
        for k in range(used[c], intervals):
            offsets[c * intervals + k] = kept
        found = 0
        for m in range(member_count):
            chosen[found] = m
            found += slots[m] & 1
        for i in range(found):
            m = chosen[i]
            k = slots[m] >> 1
            out[cursor[k]] = row[m]
            cursor[k] += 1
    offsets[cells * intervals] = kept
    return kept


@dataclass(frozen=True)
class Candidates:
    """What a chunk keeps of one trajectory variable.

    Attributes
    ----------
    below : (cells, K) int64 included values below each interval.
    nans : (cells,) int64 included NaN values.
    offsets : (cells * K + 1,) int64 start of each (cell, interval) in ``values``.
    values : the included values inside each interval, cell by cell, interval by
        interval, in member order (None for a chunk whose values are read as needed).
    """

    below: np.ndarray
    nans: np.ndarray
    offsets: np.ndarray
    values: np.ndarray | None


def chunk_candidates(cell_values: np.ndarray, included: np.ndarray, brackets: Brackets,
                     out: np.ndarray | None = None) -> Candidates:
    """The candidates of a chunk's (cells, members) values; ``included`` marks the members
    behind the quantiles.  ``out`` (float64, at least ``cell_values.size + 1`` long, e.g.
    a buffer reused from chunk to chunk) receives the kept values, which the result then
    views; only the part written is touched, so an unused tail costs no memory."""
    values = np.ascontiguousarray(cell_values, dtype=np.float64)
    included = np.ascontiguousarray(included, dtype=np.int64)
    cells, intervals = brackets.lower.shape
    used = (brackets.lower != np.inf).sum(axis=1)
    below = np.zeros((cells, intervals), np.int64)
    nans = np.zeros(cells, np.int64)
    offsets = np.empty(cells * intervals + 1, np.int64)
    if out is None or out.size <= values.size:
        out = np.empty(values.size + 1)
    kept = _cut(values, included, brackets.lower, brackets.upper, used, below, nans, offsets,
                out)
    return Candidates(below, nans, offsets, out[:kept])


@numba.njit(cache=True, nogil=True)
def _append_groups(values, offsets, cursor, out):
    """Copy each group of one chunk (``values[offsets[g]:offsets[g + 1]]``, offsets
    relative to ``values``) to ``out[cursor[g]:]`` and advance ``cursor[g]``."""
    for group in range(offsets.shape[0] - 1):
        start = cursor[group]
        for i in range(offsets[group], offsets[group + 1]):
            out[start] = values[i]
            start += 1
        cursor[group] = start


def order_statistics(parts: Sequence[Candidates], cells: slice, below: np.ndarray,
                     inside: np.ndarray, ranks: np.ndarray,
                     buffer: np.ndarray | None = None,
                     read: Callable[[int, int, int], np.ndarray] | None = None
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Order statistics of the cells ``cells`` over all members from the chunks'
    candidates.

    Parameters
    ----------
    parts : every chunk's candidates (cut with the same brackets).
    cells : the block of cells.
    below, inside : the chunks' counts summed, for all cells ((cells, K)).
    ranks : (block, R) 0-based ranks wanted in each cell of the block.
    buffer : float64 memory for the block's candidates, reused from block to block
        (grown when short); default new memory.
    read : ``read(i, start, stop)``, values ``start .. stop - 1`` of part i, for parts
        whose values stay on disk (default: ``parts[i].values[start:stop]``).

    Returns
    -------
    (values, found) : (block, R) the values at those ranks, and whether each rank fell
        inside an interval (where not, its value is NaN).
    """
    first, stop = cells.start, cells.stop
    intervals = below.shape[1]
    block_below = below[cells][:, None, :]                   # (cell, 1, K)
    block_end = block_below + inside[cells][:, None, :]
    holds = (block_below <= ranks[:, :, None]) & (ranks[:, :, None] < block_end)
    found = holds.any(axis=2)
    interval = holds.argmax(axis=2)                          # (cell, rank)
    # every chunk's candidates of the block, group by group, then the groups used sorted
    sizes = inside[cells].ravel()
    starts = np.zeros(sizes.size + 1, np.int64)
    np.cumsum(sizes, out=starts[1:])
    out = (buffer[:starts[-1]] if buffer is not None and buffer.size >= starts[-1]
           else np.empty(starts[-1]))
    cursor = starts[:-1].copy()
    for index, part in enumerate(parts):
        offsets = np.asarray(part.offsets[first * intervals:stop * intervals + 1])
        values = (read(index, offsets[0], offsets[-1]) if read is not None
                  else part.values[offsets[0]:offsets[-1]])
        _append_groups(values, offsets - offsets[0], cursor, out)
    rows, columns = np.nonzero(found)
    chosen = interval[rows, columns]
    groups = rows * intervals + chosen
    # the order statistic's rank within its group: its rank - values below the interval
    positions = ranks[rows, columns] - below[first + rows, chosen]
    order = np.lexsort((positions, groups))
    picked = np.empty(order.size)
    select_ranks_of_groups(out, starts, groups[order], positions[order], picked)
    result = np.full(ranks.shape, np.nan)
    result[rows[order], columns[order]] = picked
    return result, found


def select(parts: Sequence[Candidates], cells: slice, count: int, nans: np.ndarray,
           below: np.ndarray, inside: np.ndarray, probabilities: Sequence[float],
           buffer: np.ndarray | None = None,
           read: Callable[[int, int, int], np.ndarray] | None = None
           ) -> tuple[np.ndarray, np.ndarray]:
    """Quantiles of the cells ``cells`` over all members from the chunks' candidates.

    Parameters
    ----------
    parts, cells, below, inside, buffer, read : as for :func:`order_statistics`.
    count : included members of the variant.
    nans : the chunks' NaN counts summed, for all cells ((cells,)).
    probabilities : the quantiles' probabilities.

    Returns
    -------
    (quantile, block) values, and a (block,) mask of the cells whose ranks fell outside
    every interval (their values are left NaN for the caller to compute).
    """
    n_cells = cells.stop - cells.start
    result = np.full((len(probabilities), n_cells), np.nan)
    if count == 0:
        return result, np.zeros(n_cells, bool)
    low_rank, high_rank, fraction = linear_ranks(count, probabilities)
    ranks = np.broadcast_to(np.concatenate([low_rank, high_rank]), (n_cells,
                                                                     2 * low_rank.size))
    values, found = order_statistics(parts, cells, below, inside, ranks, buffer, read)
    has_nan = nans[cells] > 0
    good = found.all(axis=1) & ~has_nan
    missed = ~found.all(axis=1) & ~has_nan
    rows = np.flatnonzero(good)
    quantile_count = low_rank.size
    result[:, rows] = interpolate(values[rows, :quantile_count].T,
                                  values[rows, quantile_count:].T, fraction[:, None])
    return result, missed


def refined_brackets(parts: Sequence[Candidates], count: int, nans: np.ndarray,
                     below: np.ndarray, inside: np.ndarray, coarse: Brackets,
                     probabilities: Sequence[float], block_cells: int,
                     buffer: np.ndarray | None = None,
                     read: Callable[[int, int, int], np.ndarray] | None = None) -> Brackets:
    """Narrower brackets from the first S members (``count`` of them included), cut with
    ``coarse``: for each cell and probability the interval between their order statistics
    at the ranks :func:`pilot_ranges` takes for S values, where both lie inside one coarse
    interval; a cell where one does not (or with fewer than two numbers) keeps its coarse
    intervals.  So every new interval lies inside a coarse one, and chunks cut with the
    coarse brackets can be cut again with these (:func:`recut`).  Cells go in blocks of
    ``block_cells``; ``buffer`` (grown when short, then kept) holds a block's
    candidates."""
    cells = coarse.lower.shape[0]
    probabilities = np.asarray(probabilities, dtype=np.float64)
    quantile_count = probabilities.size
    width = max(quantile_count, coarse.lower.shape[1])
    lower = np.full((cells, width), np.inf)
    upper = np.full((cells, width), -np.inf)
    for first in range(0, cells, block_cells):
        span = slice(first, min(first + block_cells, cells))
        needed = int(inside[span].sum())
        if buffer is None or buffer.size < needed:
            buffer = np.empty(needed)                   # kept for the next blocks
        numbers = (count - nans[span]).astype(np.float64)[:, None]      # (cell, 1)
        low_rank, high_rank = bracket_ranks(numbers, probabilities)
        values, found = order_statistics(
            parts, span, below, inside,
            np.concatenate([np.maximum(low_rank, 0),
                            np.minimum(high_rank, numbers.astype(np.int64) - 1)], axis=1),
            buffer, read)
        low = np.where(low_rank >= 0, values[:, :quantile_count], -np.inf)
        high = np.where(high_rank <= numbers - 1, values[:, quantile_count:], np.inf)
        known = ((found[:, :quantile_count] | (low_rank < 0))
                 & (found[:, quantile_count:] | (high_rank > numbers - 1)))
        coarse_low = coarse.lower[span][:, None, :]
        coarse_high = coarse.upper[span][:, None, :]
        contained = ((coarse_low <= low[:, :, None]) & (high[:, :, None] <= coarse_high)
                     ).any(axis=2)
        refined = (known & contained).all(axis=1) & (numbers[:, 0] >= 2)
        rows = np.arange(span.start, span.stop)
        lower[rows[refined], :quantile_count] = low[refined]
        upper[rows[refined], :quantile_count] = high[refined]
        kept = rows[~refined]
        lower[kept, :coarse.lower.shape[1]] = coarse.lower[kept]
        upper[kept, :coarse.lower.shape[1]] = coarse.upper[kept]
    return merged_brackets(lower, upper)


@numba.njit(cache=True, nogil=True)
def _recut(values, offsets, below, coarse_lower, coarse_upper, lower, upper,
           new_offsets, new_below, out):
    """Cut each cell's candidates of the coarse intervals again with the finer
    ``lower``/``upper`` (each inside one coarse interval); returns values kept, or -1
    when a fine interval lies inside no coarse one."""
    cells, coarse_count = coarse_lower.shape
    fine_count = lower.shape[1]
    kept = 0
    for c in range(cells):
        for j in range(fine_count):
            new_offsets[c * fine_count + j] = kept
            low = lower[c, j]
            high = upper[c, j]
            if low > high:          # an empty slot
                continue
            k = 0
            while k < coarse_count and not (coarse_lower[c, k] <= low
                                            and high <= coarse_upper[c, k]):
                k += 1
            if k == coarse_count:
                return -1
            under = below[c, k]
            for i in range(offsets[c * coarse_count + k], offsets[c * coarse_count + k + 1]):
                value = values[i]
                under += value < low
                out[kept] = value                       # kept only if inside: no branch
                kept += (value >= low) & (value <= high)
            new_below[c, j] = under
    new_offsets[cells * fine_count] = kept
    return kept


def recut(part: Candidates, coarse: Brackets, fine: Brackets) -> Candidates:
    """The candidates a chunk cut with ``coarse`` (``part``, values loaded) would have
    had if cut with ``fine``, every interval of which lies inside a coarse one
    (:func:`refined_brackets`): the same arrays as :func:`chunk_candidates` with
    ``fine`` on the chunk's whole values."""
    cells, intervals = fine.lower.shape
    below = np.zeros((cells, intervals), np.int64)
    offsets = np.empty(cells * intervals + 1, np.int64)
    out = np.empty(part.values.size + 1)
    kept = _recut(np.asarray(part.values), np.asarray(part.offsets), np.asarray(part.below),
                  coarse.lower, coarse.upper, fine.lower, fine.upper, offsets, below, out)
    if kept < 0:
        raise ValueError("the fine brackets are not inside the coarse ones")
    return Candidates(below, np.asarray(part.nans), offsets, out[:kept].copy())
