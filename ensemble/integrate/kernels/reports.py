"""What a kernel keeps at each reported time: plain functions (the tests can run them as
they are), compiled once for all kernels (:mod:`.shared`).

A kernel runs in one of two modes, chosen by its ``compare`` argument: it stores every
member's state and flow counts at each reported time (report-major arrays, members
innermost), or, for the step check's refined run, it compares the state with the
trajectories of the run at h (``reference``) as it goes and keeps only each member's
largest scaled difference, the operations of :func:`ensemble.integrate.refine.step_error`
in its order, so the same bits.  Either way it sets the status bits of the reported
states.  Every loop has the members innermost and the states outside.
"""

from __future__ import annotations

import math

from ensemble.integrate.kernels.scalars import _max
from ensemble.records import BELOW_NEGATIVE_ATOL, NON_FINITE


def first_report(y0, y, m0, width, compare, reference, atol, rtol, gain, state_out,
                 flow_out, error_out, status, low):
    """At t = 0, for the block of ``width`` members from member ``m0``: load the initial
    state into ``y``, report it (flow counts NaN) or start the comparison, and set the
    status bits of the start."""
    for s in range(y.shape[0]):
        for b in range(width):
            y[s, b] = y0[s, m0 + b]
    if compare:
        for b in range(min(width, reference.shape[2] - m0)):
            error_out[m0 + b] = -math.inf
        compare_states(0, y, m0, width, reference, atol, rtol, gain, error_out)
    else:
        for s in range(y.shape[0]):
            for b in range(width):
                state_out[0, s, m0 + b] = y[s, b]
        for e in range(flow_out.shape[1]):
            for b in range(width):
                flow_out[0, e, m0 + b] = math.nan
    below(y, width, atol, low)
    for b in range(width):
        status[m0 + b] = BELOW_NEGATIVE_ATOL if low[b] else 0


def report(k, y, fc, bad, m0, width, compare, reference, atol, rtol, gain, state_out,
           flow_out, error_out, status, low):
    """At report ``k``: store state and flow counts (or, comparing, fold the scaled
    differences from ``reference`` into ``error_out``), and set the status bits."""
    if compare:
        compare_states(k, y, m0, width, reference, atol, rtol, gain, error_out)
    else:
        for s in range(y.shape[0]):
            for b in range(width):
                state_out[k, s, m0 + b] = y[s, b]
        for e in range(fc.shape[0]):
            for b in range(width):
                flow_out[k, e, m0 + b] = fc[e, b]
    below(y, width, atol, low)
    for b in range(width):
        if low[b]:
            status[m0 + b] |= BELOW_NEGATIVE_ATOL
        if bad[b]:
            status[m0 + b] |= NON_FINITE


def below(y, width, atol, low):
    """``low[b]``: whether a state of member b is below -atol."""
    for b in range(width):
        low[b] = False
    for s in range(y.shape[0]):
        for b in range(width):
            low[b] = low[b] or y[s, b] < -atol


def compare_states(k, y, m0, width, reference, atol, rtol, gain, error_out):
    """Fold each member's scaled difference from ``reference`` at report ``k`` into
    ``error_out`` (members past the reference's are padding): NaN once any value is NaN,
    as :func:`ensemble.integrate.refine.step_error`'s maximum gives."""
    for s in range(y.shape[0]):
        for b in range(min(width, reference.shape[2] - m0)):
            scale = atol + rtol * abs(y[s, b])
            difference = abs(reference[k, s, m0 + b] - y[s, b]) / (gain * scale)
            error_out[m0 + b] = _max(error_out[m0 + b], difference)

