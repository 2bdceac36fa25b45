"""Order statistics by selection (ensemble/output/rank_select.py) against numpy's sort:
the value of rank k is the k-th element of ``numpy.sort`` of the same values, for random,
heavily tied, ascending and descending values (the inputs that slow or break a careless
quickselect; Hoare 1961, Musser 1997)."""

from __future__ import annotations

import numpy as np
import pytest

from ensemble.output.rank_select import select_in_place, select_ranks_of_groups

KINDS = {
    "random": lambda rng, n: rng.random(n),
    "three values": lambda rng, n: rng.integers(0, 3, n).astype(float),
    "ascending": lambda rng, n: np.sort(rng.random(n)),
    "descending": lambda rng, n: np.sort(rng.random(n))[::-1].copy(),
    "all equal": lambda rng, n: np.full(n, 2.5),
}


@pytest.mark.parametrize("kind", KINDS.values(), ids=KINDS.keys())
def test_the_value_of_each_rank_is_that_of_the_sorted_values(kind):
    rng = np.random.default_rng(11)
    for n in [1, 2, 3, 16, 17, 40, 257, 1000]:
        values = kind(rng, n)
        for rank in sorted({0, 1, n // 3, n // 2, n - 2, n - 1} & set(range(n))):
            work = values.copy()
            found = select_in_place(work, 0, n, rank)
            assert found == np.sort(values)[rank]
            assert (work[:rank] <= found).all() and (work[rank + 1:] >= found).all()
            np.testing.assert_array_equal(np.sort(work), np.sort(values))


def test_ranks_of_groups_match_the_sort():
    rng = np.random.default_rng(12)
    sizes = rng.integers(1, 300, 40)
    starts = np.concatenate([[0], np.cumsum(sizes)])
    values = np.round(rng.normal(size=starts[-1]), 1)      # many ties
    groups, positions = [], []
    for group, size in enumerate(sizes):
        for rank in sorted({0, size // 4, size // 4 + 1, size - 1} & set(range(size))):
            groups.append(group)
            positions.append(rank)
    groups, positions = np.array(groups), np.array(positions)
    picked = np.empty(groups.size)
    select_ranks_of_groups(values.copy(), starts, groups, positions, picked)
    expected = [np.sort(values[starts[g]:starts[g + 1]])[p] for g, p in zip(groups, positions)]
    np.testing.assert_array_equal(picked, expected)
