"""What a kernel keeps at each reported time.

A kernel runs in one of two modes, chosen by its ``compare`` argument: it stores every
member's state and flow counts at each reported time (report-major arrays, members
innermost), or, for the step check's refined run, it compares the state with the
trajectories of the run at h (``reference``) as it goes and keeps only each member's
largest scaled difference, the operations of :func:`ensemble.integrate.refine.step_error`
in its order, so the same bits.  Either way it sets the status bits of the reported
states.  Every loop has the members innermost and the states outside, so the code is the
same whatever the number of states, and the compiler vectorises it.
"""

from __future__ import annotations


def first_report() -> list[str]:
    """At t = 0, for the block of ``width`` members starting at member ``m0``: load the
    initial state into ``y``, report it (flow counts NaN) or start the comparison, and
    set the status bits of the start."""
    lines = ["    for s in range(n_states):",
             "        for b in range(width):",
             "            y[s, b] = y0[s, m0 + b]",
             "    if compare:",
             "        for b in range(min(width, reference.shape[2] - m0)):",
             "            error_out[m0 + b] = -math.inf"]
    lines += comparison(" " * 8, "0")
    lines += ["    else:",
              "        for s in range(n_states):",
              "            for b in range(width):",
              "                state_out[0, s, m0 + b] = y[s, b]",
              "        for e in range(n_elements):",
              "            for b in range(width):",
              "                flow_out[0, e, m0 + b] = math.nan"]
    lines += status_bits("    ", "= BELOW_NEGATIVE_ATOL if low[b] else 0")
    return lines


def report(indent: str) -> list[str]:
    """At report ``k``: store state and flow counts (or, comparing, fold the scaled
    differences from ``reference`` into ``error_out``), and set the status bits."""
    lines = [f"{indent}if compare:"]
    lines += comparison(indent + "    ", "k")
    lines += [f"{indent}else:",
              f"{indent}    for s in range(n_states):",
              f"{indent}        for b in range(width):",
              f"{indent}            state_out[k, s, m0 + b] = y[s, b]",
              f"{indent}    for e in range(n_elements):",
              f"{indent}        for b in range(width):",
              f"{indent}            flow_out[k, e, m0 + b] = fc[e, b]"]
    lines += status_bits(indent, "|= BELOW_NEGATIVE_ATOL if low[b] else 0")
    lines += [f"{indent}for b in range(width):",
              f"{indent}    if bad[b]:",
              f"{indent}        status[m0 + b] |= NON_FINITE"]
    return lines


def status_bits(indent: str, update: str) -> list[str]:
    """``status[m] <update>``, ``low[b]`` telling whether a state is below -atol."""
    return [f"{indent}for b in range(width):",
            f"{indent}    low[b] = False",
            f"{indent}for s in range(n_states):",
            f"{indent}    for b in range(width):",
            f"{indent}        low[b] = low[b] or y[s, b] < -atol",
            f"{indent}for b in range(width):",
            f"{indent}    status[m0 + b] {update}"]


def comparison(indent: str, report_index: str) -> list[str]:
    """Fold each member's scaled difference from ``reference`` at report
    ``report_index`` into ``error_out`` (members past the reference's are padding): NaN
    once any value is NaN, as :func:`ensemble.integrate.refine.step_error`'s maximum
    gives."""
    return [f"{indent}for s in range(n_states):",
            f"{indent}    for b in range(min(width, reference.shape[2] - m0)):",
            f"{indent}        scale = atol + rtol * abs(y[s, b])",
            f"{indent}        error_out[m0 + b] = _max(error_out[m0 + b], "
            f"abs(reference[{report_index}, s, m0 + b] - y[s, b]) / (gain * scale))"]
