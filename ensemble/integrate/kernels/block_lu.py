"""Block LU with partial pivoting, vectorised across the members of a block.

The Newton matrices of a block of members are stored (n, n, B), members innermost, so
that every loop over members is a straight SIMD loop.  A matrix is factored by Gaussian
elimination with partial pivoting (Golub & Van Loan 2013, *Matrix Computations*, 4th
ed., sec. 3.4; section cited from memory), touching only the static pattern of its
non-zeros and their fill-in (:mod:`.sparsity`) while no member needs a row interchange.

These are plain Python functions: the tests run them as they are, and :mod:`.shared`
compiles them once for the implicit methods' kernels.
"""

from __future__ import annotations


def factor_pivoting(matrix, first, pivots, pivot_size, factor, trouble, columns):
    """Columns ``first`` .. n-1 of the LU factorisation with partial pivoting (Golub & Van
    Loan 2013, sec. 3.4) of ``matrix[:, :, b]`` for every member b of a block, in place,
    the members loop innermost so that it vectorises.

    The general path of :func:`factor_block`, taken from the first column where some
    member needs a row interchange.  Row k's interchange is recorded in ``pivots[k, b]``
    and applied to columns k .. n-1 (the multipliers stay where they were computed, as
    :func:`solve_factored` replays them); the multipliers replace the entries below the
    diagonal.  Updates whose multiplier, or whose pivot-row entry, is zero for every
    member of the block are skipped: they would leave every finite entry unchanged.  Sets
    ``trouble[b]`` to 1 where a pivot is exactly zero (singular: LAPACK ``gesv``'s test)
    unless it is already set.  ``pivot_size`` and ``factor`` are (B,) work arrays,
    ``columns`` an (n,) int64 one.
    """
    n = matrix.shape[0]
    width = matrix.shape[2]
    for k in range(first, n):
        for b in range(width):
            pivots[k, b] = k
            pivot_size[b] = abs(matrix[k, k, b])
        for i in range(k + 1, n):
            for b in range(width):
                size = abs(matrix[i, k, b])
                if size > pivot_size[b]:
                    pivot_size[b] = size
                    pivots[k, b] = i
        swaps = 0
        for b in range(width):
            if pivot_size[b] == 0.0 and trouble[b] == 0:
                trouble[b] = 1
            swaps += pivots[k, b] != k
        if swaps:
            for j in range(k, n):
                for b in range(width):
                    other = pivots[k, b]
                    held = matrix[k, j, b]
                    matrix[k, j, b] = matrix[other, j, b]
                    matrix[other, j, b] = held
        used = 0
        for j in range(k + 1, n):
            nonzero = 0
            for b in range(width):
                nonzero += matrix[k, j, b] != 0.0
            if nonzero:
                columns[used] = j
                used += 1
        for i in range(k + 1, n):
            nonzero = 0
            for b in range(width):
                factor[b] = matrix[i, k, b] / matrix[k, k, b]
                matrix[i, k, b] = factor[b]
                nonzero += factor[b] != 0.0
            if nonzero == 0:
                continue
            for c in range(used):
                j = columns[c]
                for b in range(width):
                    matrix[i, j, b] -= factor[b] * matrix[k, j, b]


def factor_block(matrix, lower_start, lower, upper_start, upper, pivots, pivot_size, factor,
                 trouble, columns):
    """LU factorisation with partial pivoting of ``matrix[:, :, b]`` for every member b of
    a block, in place; returns the first column where some member needed a row
    interchange (n if none), which :func:`solve_factored` takes.

    Gaussian elimination with partial pivoting (Golub & Van Loan 2013, sec. 3.4) on a
    matrix whose entries outside a static pattern are zero: ``lower[lower_start[k]:
    lower_start[k + 1]]`` are the rows below k, ``upper[upper_start[k]:upper_start[k +
    1]]`` the columns right of k, of the pattern's non-zeros once the fill of elimination
    without interchanges is added (:func:`.sparsity.factor_pattern`), both increasing.
    While no member needs an interchange (no entry below the diagonal larger in magnitude
    than the pivot: the test of partial pivoting), only the pattern is touched; from the
    first column where one does, :func:`factor_pivoting` takes over (entries outside the
    pattern may then be non-zero: the caller clears the matrix before its next use).
    Both paths do the same operations in the same order on a member that needs no
    interchange, so its factors do not depend on the other members of its block.  The
    multipliers replace the entries below the diagonal.

    ``trouble[b]`` is 2 where the matrix holds a non-finite entry, 1 where a pivot is
    exactly zero (singular: LAPACK ``gesv``'s test), else 0.  ``pivots`` is an (n, B)
    int64 array, ``pivot_size`` and ``factor`` (B,) work arrays, ``columns`` an (n,) int64
    one.
    """
    n = matrix.shape[0]
    width = matrix.shape[2]
    for b in range(width):
        trouble[b] = 0
        pivot_size[b] = 0.0
    for k in range(n):
        for b in range(width):
            pivot_size[b] += matrix[k, k, b] - matrix[k, k, b]
        for e in range(lower_start[k], lower_start[k + 1]):
            i = lower[e]
            for b in range(width):
                pivot_size[b] += matrix[i, k, b] - matrix[i, k, b]
        for e in range(upper_start[k], upper_start[k + 1]):
            j = upper[e]
            for b in range(width):
                pivot_size[b] += matrix[k, j, b] - matrix[k, j, b]
    for b in range(width):
        if pivot_size[b] != 0.0:
            trouble[b] = 2
    for k in range(n):
        swaps = 0
        for e in range(lower_start[k], lower_start[k + 1]):
            i = lower[e]
            for b in range(width):
                swaps += abs(matrix[i, k, b]) > abs(matrix[k, k, b])
        if swaps:
            factor_pivoting(matrix, k, pivots, pivot_size, factor, trouble, columns)
            return k
        for b in range(width):
            if matrix[k, k, b] == 0.0 and trouble[b] == 0:
                trouble[b] = 1
        for e in range(lower_start[k], lower_start[k + 1]):
            i = lower[e]
            for b in range(width):
                factor[b] = matrix[i, k, b] / matrix[k, k, b]
                matrix[i, k, b] = factor[b]
            for c in range(upper_start[k], upper_start[k + 1]):
                j = upper[c]
                for b in range(width):
                    matrix[i, j, b] -= factor[b] * matrix[k, j, b]
    return n


def solve_factored(matrix, rhs, lower_start, lower, upper_start, upper, first, pivots):
    """Solve ``A x = rhs[:, b]`` for every member b of a block, in place, with the factors
    of A left in ``matrix`` by :func:`factor_block` (which returned ``first``).

    Forward substitution replays the elimination on the right-hand side (the pattern's
    rows up to column ``first``, then every row with the recorded interchanges), and back
    substitution runs over the pattern's columns, or over every column once rows were
    interchanged (Golub & Van Loan 2013, sec. 3.1 and 3.4).  The operations on ``rhs``
    are those elimination would do on it alongside the matrix, in the same order.
    """
    n = matrix.shape[0]
    width = matrix.shape[2]
    for k in range(first):
        for e in range(lower_start[k], lower_start[k + 1]):
            i = lower[e]
            for b in range(width):
                rhs[i, b] -= matrix[i, k, b] * rhs[k, b]
    for k in range(first, n):
        for b in range(width):
            other = pivots[k, b]
            held = rhs[k, b]
            rhs[k, b] = rhs[other, b]
            rhs[other, b] = held
        for i in range(k + 1, n):
            for b in range(width):
                rhs[i, b] -= matrix[i, k, b] * rhs[k, b]
    for i in range(n - 1, -1, -1):
        if first == n:
            for c in range(upper_start[i], upper_start[i + 1]):
                j = upper[c]
                for b in range(width):
                    rhs[i, b] -= matrix[i, j, b] * rhs[j, b]
        else:
            for j in range(i + 1, n):
                nonzero = 0
                for b in range(width):
                    nonzero += matrix[i, j, b] != 0.0
                if nonzero:
                    for b in range(width):
                        rhs[i, b] -= matrix[i, j, b] * rhs[j, b]
        for b in range(width):
            rhs[i, b] /= matrix[i, i, b]
