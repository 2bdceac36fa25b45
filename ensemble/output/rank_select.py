"""Order statistics by selection: the value of a given rank among many, found in place
without sorting them all.

Hoare's FIND (Hoare 1961, "Algorithm 65: Find", Communications of the ACM 4(7):321-322),
also called quickselect: partition the range around a pivot (the median of its first,
middle and last values, Singleton 1969, "Algorithm 347", Communications of the ACM
12(3):185-186) and go on in the part that holds the wanted rank, with Hoare's partition
so that runs of equal values split evenly.  Expected work is linear in the length, against
n log n for a sort; a range that does not shrink fast enough is sorted instead (Musser
1997, "Introspective sorting and selection algorithms", Software: Practice and Experience
27(8):983-993), which bounds the work by a sort's.

The value at a rank is the same whatever the method that finds it (a number has one
place in the order; equal numbers are interchangeable), so selection gives the bits of
reading the rank off a sort.  The ranges hold no NaN (callers leave them out).
"""

from __future__ import annotations

import numba
import numpy as np

SMALL_RANGE = 16
"""Ranges this short are sorted by insertion rather than partitioned (common practice,
no source)."""


@numba.njit(cache=True, nogil=True)
def _insertion_sort(values, low, high):
    """Sort ``values[low:high]`` in place."""
    for i in range(low + 1, high):
        value = values[i]
        j = i - 1
        while j >= low and values[j] > value:
            values[j + 1] = values[j]
            j -= 1
        values[j + 1] = value


@numba.njit(cache=True, nogil=True)
def select_in_place(values, low, high, index):
    """Rearrange ``values[low:high]`` so that ``values[index]`` holds the value of rank
    ``index - low`` in it, every value before it (within the range) is no larger and
    every value after it no smaller; return that value."""
    if index == low or index == high - 1:   # the least or the greatest: one scan
        best = index
        for i in range(low, high):
            if (values[i] < values[best]) if index == low else (values[i] > values[best]):
                best = i
        values[index], values[best] = values[best], values[index]
        return values[index]
    budget = 8
    length = high - low
    while length > 1:
        budget += 2
        length >>= 1
    while high - low > SMALL_RANGE:
        budget -= 1
        if budget < 0:
            values[low:high].sort()
            return values[index]
        middle = low + (high - low) // 2
        last = high - 1
        if values[middle] < values[low]:
            values[middle], values[low] = values[low], values[middle]
        if values[last] < values[middle]:
            values[last], values[middle] = values[middle], values[last]
            if values[middle] < values[low]:
                values[middle], values[low] = values[low], values[middle]
        pivot = values[middle]
        # values[low] <= pivot <= values[last] stop both scans within the range
        i = low
        j = last
        while True:
            i += 1
            while values[i] < pivot:
                i += 1
            j -= 1
            while values[j] > pivot:
                j -= 1
            if i >= j:
                break
            values[i], values[j] = values[j], values[i]
        # values[low..j] <= pivot <= values[j+1..high-1], with low <= j <= high - 2
        if index <= j:
            high = j + 1
        else:
            low = j + 1
    _insertion_sort(values, low, high)
    return values[index]


@numba.njit(cache=True, nogil=True)
def select_ranks_of_groups(values, starts, groups, positions, out):
    """``out[i]`` = the value of rank ``positions[i]`` in group ``groups[i]``, the group
    being ``values[starts[g]:starts[g + 1]]``; the entries come sorted by group, then by
    rank.  ``values`` is rearranged within each group."""
    i = 0
    count = groups.shape[0]
    while i < count:
        group = groups[i]
        low = starts[group]
        high = starts[group + 1]
        while i < count and groups[i] == group:
            index = starts[group] + positions[i]
            if index >= low:
                out[i] = select_in_place(values, low, high, index)
                low = index + 1
            else:       # the same rank again
                out[i] = values[index]
            i += 1

