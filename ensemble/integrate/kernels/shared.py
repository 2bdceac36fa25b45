"""The functions every kernel calls whatever its model, compiled once per installation.

The schedule values in force, the state update, the members no longer finite
(:mod:`.scalars`), the reports (:mod:`.reports`), the weighted sums of a staged explicit
step (:func:`.explicit.combine`) and the block LU (:mod:`.block_lu`) do not depend on the
model.  They are written as plain Python in those modules (the tests run them as they
are) and compiled here by numba with ``cache=True``, so numba keeps their machine code in
its own cache (``__pycache__`` beside those modules, or under ``NUMBA_CACHE_DIR``) and a
new kernel only links them in: the time a modeller waits for a new or edited model is the
kernel's own.  Each is compiled with its calls of the others bound to their compiled
forms: the same code, read in a namespace whose names are the compiled functions.

:data:`DIGEST` names the sources of all of them; it is part of every kernel's text, so a
kernel compiled with other versions of them is never loaded from the kernel cache.
"""

from __future__ import annotations

import hashlib
import inspect
import math
import types
from collections.abc import Callable

from numba import njit

from ensemble.integrate.kernels import block_lu, explicit, reports, scalars
from ensemble.records import BELOW_NEGATIVE_ATOL, NON_FINITE

_PLAIN: tuple[Callable, ...] = (
    scalars.schedule_values, scalars.apply_moves, scalars.mark_bad,
    reports.first_report, reports.report, reports.below, reports.compare_states,
    explicit.combine,
    block_lu.factor_pivoting, block_lu.factor_block, block_lu.solve_factored)
"""The plain functions compiled here."""

DIGEST = hashlib.sha256("".join(inspect.getsource(function) for function in
                                (scalars._max, *_PLAIN)).encode()).hexdigest()[:16]
"""A digest of the sources of the functions compiled here (and of the maximum they use)."""

_namespace: dict[str, object] = {"math": math, "BELOW_NEGATIVE_ATOL": BELOW_NEGATIVE_ATOL,
                                 "NON_FINITE": NON_FINITE}


def _compiled(function: Callable, **options) -> Callable:
    """``function`` compiled by numba, its global names read in :data:`_namespace`."""
    rebound = types.FunctionType(function.__code__, _namespace, function.__name__,
                                 function.__defaults__, function.__closure__)
    rebound.__module__, rebound.__qualname__ = function.__module__, function.__qualname__
    rebound.__doc__ = function.__doc__
    compiled = njit(error_model="numpy", **options)(rebound)
    _namespace[function.__name__] = compiled
    return compiled


_compiled(scalars._max, inline="always")
schedule_values, apply_moves, mark_bad, first_report, report, below, compare_states, \
    combine, factor_pivoting, factor_block, solve_factored = (
        _compiled(function, cache=True, boundscheck=False) for function in _PLAIN)

NAMES = tuple(function.__name__ for function in _PLAIN)
"""The names a kernel imports from here."""
