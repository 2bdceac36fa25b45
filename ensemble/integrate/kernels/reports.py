"""What a kernel keeps at each reported time.

A kernel runs in one of two modes, chosen by its ``compare`` argument: it stores every
member's state and flow counts at each reported time (report-major arrays, members
innermost), or, for the step check's refined run, it compares the state with the
trajectories of the run at h (``reference``) as it goes and keeps only each member's
largest scaled difference, the operations of :func:`ensemble.integrate.refine.step_error`
in its order, so the same bits.  Either way it sets the status bits of the reported
states.  Each loop over members is straight-line code, so the compiler vectorises it.
"""

from __future__ import annotations


def first_report() -> list[str]:
    """At t = 0, for the block starting at member ``m0``: load the initial state into
    ``y``, report it (flow counts NaN) or start the comparison, and set the status
    bits of the start."""
    lines = ["    for b in range(BLOCK):",
             "        for s in range(N_STATES):",
             "            y[s, b] = y0[s, m0 + b]",
             "    if compare:",
             "        for b in range(min(BLOCK, reference.shape[2] - m0)):",
             "            error_out[m0 + b] = -math.inf"]
    lines += comparison(" " * 8, "0")
    lines += ["    else:",
              "        for b in range(BLOCK):",
              "            for s in range(N_STATES):",
              "                state_out[0, s, m0 + b] = y0[s, m0 + b]",
              "            for f in range(N_FLOWS):",
              "                flow_out[0, f, m0 + b] = math.nan",
              "    for b in range(BLOCK):",
              "        low = False",
              "        for s in range(N_STATES):",
              "            low = low or y0[s, m0 + b] < -atol",
              "        status[m0 + b] = BELOW_NEGATIVE_ATOL if low else 0"]
    return lines


def report(indent: str, n_states: int) -> list[str]:
    """At report ``k``: store state and flow counts (or, comparing, fold the scaled
    differences from ``reference`` into ``error_out``), and set the status bits."""
    lines = [f"{indent}if compare:"]
    lines += comparison(indent + "    ", "k")
    lines += [f"{indent}else:",
              f"{indent}    for b in range(BLOCK):",
              f"{indent}        m = m0 + b"]
    lines += [f"{indent}        state_out[k, {s}, m] = y[{s}, b]" for s in range(n_states)]
    lines += [f"{indent}        for f in range(N_FLOWS):",
              f"{indent}            flow_out[k, f, m] = fc[f, b]",
              f"{indent}for b in range(BLOCK):",
              f"{indent}    m = m0 + b",
              f"{indent}    low = False"]
    lines += [f"{indent}    low = low or y[{s}, b] < -atol" for s in range(n_states)]
    lines += [f"{indent}    if low:",
              f"{indent}        status[m] |= BELOW_NEGATIVE_ATOL",
              f"{indent}    if bad[b]:",
              f"{indent}        status[m] |= NON_FINITE"]
    return lines


def comparison(indent: str, report_index: str) -> list[str]:
    """Fold each member's scaled difference from ``reference`` at report
    ``report_index`` into ``error_out`` (members past the reference's are padding): NaN
    once any value is NaN, as :func:`ensemble.integrate.refine.step_error`'s maximum
    gives.  States outside, members inside: short code whatever the number of states."""
    return [f"{indent}for s in range(N_STATES):",
            f"{indent}    for b in range(min(BLOCK, reference.shape[2] - m0)):",
            f"{indent}        scale = atol + rtol * abs(y[s, b])",
            f"{indent}        error_out[m0 + b] = _max(error_out[m0 + b], "
            f"abs(reference[{report_index}, s, m0 + b] - y[s, b]) / (gain * scale))"]
