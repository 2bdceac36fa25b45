"""Symbolic factorisation of the Newton matrix: the order of its unknowns and the
non-zeros of its LU factors, computed once when a kernel is generated.
"""

from __future__ import annotations


def elimination_order(pattern: list[set[int]]) -> list[int]:
    """An order of the unknowns that limits fill-in: greedy minimum Markowitz count
    ``(r - 1)(c - 1)`` over the remaining diagonal pivots, with the fill each elimination
    creates (Markowitz 1957, "The elimination form of the inverse and its application to
    linear programming"; Duff, Erisman & Reid 2017, *Direct Methods for Sparse Matrices*,
    2nd ed.).  ``pattern[i]`` holds the columns of row i's structural non-zeros."""
    rows = [set(row) | {i} for i, row in enumerate(pattern)]
    remaining = set(range(len(rows)))
    order = []
    while remaining:
        def count(p: int) -> tuple[int, int]:
            row = len(rows[p] & remaining) - 1
            column = sum(1 for i in remaining if p in rows[i]) - 1
            return row * column, p
        pivot = min(remaining, key=count)
        remaining.discard(pivot)
        for i in remaining:
            if pivot in rows[i]:
                rows[i] |= rows[pivot] & remaining
        order.append(pivot)
    return order


def factor_pattern(pattern: list[set[int]]) -> tuple[list[int], list[int], list[int],
                                                     list[int]]:
    """The non-zeros of the LU factors of a matrix with non-zeros ``pattern`` (row i's
    columns, the diagonal implied) eliminated in its own order without interchanges:
    symbolic factorisation (Duff, Erisman & Reid 2017, ch. 9, cited from memory).

    Returns ``lower_start, lower, upper_start, upper`` in the compressed form
    :func:`factor_block` reads: the rows below k holding a non-zero in column k, and the
    columns right of k holding one in row k, each increasing.
    """
    rows = [set(row) | {i} for i, row in enumerate(pattern)]
    lower_start, lower, upper_start, upper = [0], [], [0], []
    for k in range(len(rows)):
        right = sorted(j for j in rows[k] if j > k)
        below = [i for i in range(k + 1, len(rows)) if k in rows[i]]
        for i in below:
            rows[i].update(right)
        lower += below
        upper += right
        lower_start.append(len(lower))
        upper_start.append(len(upper))
    return lower_start, lower, upper_start, upper
