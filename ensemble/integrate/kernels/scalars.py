"""Scalar functions whose source is copied into every kernel.

They are plain Python, so the tests can run them as they are; :mod:`.source` copies their
text into the kernel module under numba's ``njit``.  The first three give the operations
``min``, ``max`` and ``sign`` of :mod:`ensemble.model.ir` numpy's NaN rules
(:data:`ensemble.model.ir.OPERATION_MEANINGS`) and are inlined where they are called; the
last two find the schedule value in force, by the rules of the numpy reference
(:mod:`ensemble.integrate.reference`, "Schedules").
"""

from __future__ import annotations


def _min(a, b):
    """numpy.minimum: NaN if either argument is NaN."""
    if a != a:
        return a
    if b != b:
        return b
    return a if a <= b else b


def _max(a, b):
    """numpy.maximum: NaN if either argument is NaN."""
    if a != a:
        return a
    if b != b:
        return b
    return a if a >= b else b


def _sign(a):
    """numpy.sign: -1, 0 or +1, NaN for NaN."""
    if a > 0.0:
        return 1.0
    if a < 0.0:
        return -1.0
    return a if a != a else 0.0


OPERATION_HELPERS = {"min": _min, "max": _max, "sign": _sign}
"""Operations of the rate trees emitted as calls of a small inlined function, by the
operation's name (the call is the function's name)."""


def step_value_index(knot_steps, k):
    """Index of the knot in force during step ``k`` under ``between = "step"``: the last
    knot whose step index (``rint(day / h)``) is <= k, the first before the first knot."""
    index = 0
    for j in range(1, knot_steps.shape[0]):
        if knot_steps[j] <= k:
            index = j
    return index


def interpolation_segment(days, t):
    """``searchsorted(days, t, side="right") - 1``: the knot interval holding ``t`` (-1
    before the first knot, the last index from the last knot on)."""
    j = -1
    while j + 1 < days.shape[0] and days[j + 1] <= t:
        j += 1
    return j


SCHEDULE_LOOKUPS = (step_value_index, interpolation_segment)
"""Functions the kernels call, outside the members loop, to find the schedule values in
force at a stage."""
