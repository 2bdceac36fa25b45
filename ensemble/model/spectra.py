"""Eigenvalues of small matrices, one per member: the spectral radius of the expression
language (``spectral_radius(M)``) and of the next-generation matrix
(:mod:`ensemble.model.reproduction`).

The spectral radius of a square matrix is the largest modulus of its eigenvalues; for a
non-negative matrix it is itself an eigenvalue, the Perron root (Horn & Johnson 2013,
*Matrix Analysis*, 2nd ed., theorem 8.3.1).  Eigenvalues come from LAPACK's ``geev``
through :func:`numpy.linalg.eigvals`, one member's matrix at a time within a batched call,
so a member's value does not depend on the other members of its chunk.
"""

from __future__ import annotations

import numpy as np


def spectral_radii(matrices: np.ndarray) -> np.ndarray:
    """The spectral radius of each matrix of a (M, n, n) stack, (M,) float64.

    A matrix with an infinite or NaN entry, or whose eigenvalues LAPACK cannot find,
    has NaN for its radius (the member is then flagged where its value is used); a 0 x 0
    matrix has NaN too.
    """
    matrices = np.asarray(matrices, dtype=np.float64)
    radii = np.full(matrices.shape[0], np.nan)
    finite = np.isfinite(matrices).all(axis=(1, 2))
    if not finite.any() or matrices.shape[1] == 0:
        return radii
    try:
        radii[finite] = np.abs(np.linalg.eigvals(matrices[finite])).max(axis=1)
    except np.linalg.LinAlgError:   # the QR iteration failed for some matrix: one by one
        for m in np.flatnonzero(finite):
            try:
                radii[m] = np.abs(np.linalg.eigvals(matrices[m])).max()
            except np.linalg.LinAlgError:
                radii[m] = np.nan
    return radii
