"""Plain functions the kernels run; the tests can run them as they are.

The first three give the operations ``min``, ``max`` and ``sign`` of
:mod:`ensemble.model.ir` numpy's NaN rules (:data:`ensemble.model.ir.OPERATION_MEANINGS`);
:mod:`.source` copies their text into every kernel, where they are inlined.  The others
work between a kernel's loops over members, on data rather than on the model's trees, and
are compiled once for all kernels (:mod:`.shared`): the schedule values in force (the
rules of the numpy reference, :mod:`ensemble.integrate.reference`, "Schedules"), the
state update ``y (+) S inc``, and the members that stopped being finite.
"""

from __future__ import annotations

import math

INLINED = "@njit(inline='always', error_model='numpy')"
"""The decorator of the scalar operations: inlined where they are called."""

COMPILED = "@njit(error_model='numpy', boundscheck=False)"
"""The decorator of a kernel's generated functions: compiled on its own (numba's inlining
of large functions costs more compile time than it saves, measured)."""


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


def schedule_values(out, stage, step, time, knot_steps, knot_days, slot_knots, slot_linear,
                    knot_values, m0, width):
    """Write into ``out[stage, i, b]`` the value in force of every schedule slot i at a
    stage at ``time`` of step ``step``, for members ``m0 .. m0 + width - 1``.

    Slot i's knots are ``slot_knots[i] .. slot_knots[i + 1] - 1`` of ``knot_steps`` (their
    step indices), ``knot_days`` and ``knot_values`` (knots by members).  A "step" slot
    takes the value of its last knot whose step index is <= ``step`` (the first before the
    first knot); a "linear" one (``slot_linear[i]``) is interpolated at ``time`` on the
    knot interval holding it, ``(high - low) / gap * offset + low``, and held outside the
    knots: the rules and the arithmetic of the numpy reference.
    """
    for i in range(slot_knots.shape[0] - 1):
        start = slot_knots[i]
        count = slot_knots[i + 1] - start
        if slot_linear[i]:
            j = -1
            while j + 1 < count and knot_days[start + j + 1] <= time:
                j += 1
            if j < 0 or j >= count - 1:
                row = start if j < 0 else start + count - 1
                for b in range(width):
                    out[stage, i, b] = knot_values[row, m0 + b]
            else:
                offset = time - knot_days[start + j]
                gap = knot_days[start + j + 1] - knot_days[start + j]
                for b in range(width):
                    low = knot_values[start + j, m0 + b]
                    high = knot_values[start + j + 1, m0 + b]
                    out[stage, i, b] = (high - low) / gap * offset + low
        else:
            j = 0
            for k in range(1, count):
                if knot_steps[start + k] <= step:
                    j = k
            for b in range(width):
                out[stage, i, b] = knot_values[start + j, m0 + b]


def apply_moves(state, increment, out, touch_start, touch_element, touch_sign, width):
    """``out = state (+) S increment`` for the first ``width`` members (columns): state row
    s plus the signed increments of the flow elements touching it, the first one signed
    and each further one added, in increasing element order (the numpy reference's
    state update).  ``out`` must not be ``state``."""
    for s in range(state.shape[0]):
        first = touch_start[s]
        last = touch_start[s + 1]
        if first == last:
            for b in range(width):
                out[s, b] = state[s, b]
            continue
        element = touch_element[first]
        sign = touch_sign[first]
        for b in range(width):
            out[s, b] = sign * increment[element, b]
        for k in range(first + 1, last):
            element = touch_element[k]
            sign = touch_sign[k]
            for b in range(width):
                out[s, b] = out[s, b] + sign * increment[element, b]
        for b in range(width):
            out[s, b] = state[s, b] + out[s, b]


def mark_bad(state, flow_count, bad, check, width):
    """After a step: a member whose ``check`` (the sum of ``x - x`` over its new state,
    NaN once a value is not finite) is not 0 is bad from then on, and a bad member's state
    and flow counts are NaN (nothing to do while every member is finite)."""
    found = 0
    for b in range(width):
        if check[b] != 0.0:
            bad[b] = 1
        found += bad[b]
    if found == 0:
        return
    for s in range(state.shape[0]):
        for b in range(width):
            if bad[b]:
                state[s, b] = math.nan
    for e in range(flow_count.shape[0]):
        for b in range(width):
            if bad[b]:
                flow_count[e, b] = math.nan
