"""The step check in plain words: how many members were flagged and why, the worst
estimated error, and a step that would pass.

A fixed-step method of order p has a global error close to C h^p for small steps h
(Hairer, Norsett & Wanner 1993, "Solving Ordinary Differential Equations I", sec. II.3),
so a member whose error estimate is E times the tolerance passes with a step about
h E^(-1/p); a safety factor (:data:`SAFETY`, common practice, no source) allows for the
estimate's own error.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from ensemble.methods import METHODS
from ensemble.records import STATUS_FLAGS

SAFETY = 0.8
"""The suggested step is this fraction of the step the error model predicts would just
pass (common practice for step-size control, no source)."""


def step_that_passes(step: float, worst_error: float, order: int) -> float:
    """A step whose error estimate would be at most the tolerance:
    ``SAFETY * step * worst_error ** (-1 / order)``."""
    return SAFETY * step * worst_error ** (-1.0 / order)


def advice(status: np.ndarray, step_error: np.ndarray, method: str, step: float
           ) -> list[str]:
    """Lines saying, when any member is flagged, the share flagged per reason, the
    worst ``step_error`` and the step that would pass; none when no member is."""
    status = np.asarray(status)
    flagged = status != 0
    if not flagged.any():
        return []
    count = status.size
    reasons = ", ".join(f"{word} {np.count_nonzero(status & bit) / count:.0%}"
                        for bit, word in STATUS_FLAGS if np.any(status & bit))
    lines = [f"{np.count_nonzero(flagged) / count:.0%} of the members are flagged and "
             f"left out of the quantiles ({reasons})"]
    errors = np.asarray(step_error, dtype=np.float64)
    finite = errors[np.isfinite(errors)]
    if finite.size and finite.max() > 1:
        worst = float(finite.max())
        order = METHODS[method].order if method in METHODS else None
        line = (f"the worst step_error is {worst:.3g} times the tolerance (at most 1 "
                "passes)")
        if order:
            better = step_that_passes(step, worst, order)
            line += (f"; with {method} (order {order}) a step of {better:.3g} days or "
                     f"less would pass: set [solver] step (now {step:g})")
        lines.append(line)
    return lines


def flagged_text(part, attrs: Mapping[str, object]) -> list[str]:
    """:func:`advice` for one variant of a result dataset, as indented lines."""
    if "status" not in part:
        return []
    step_error = part["step_error"].values if "step_error" in part else \
        np.full(part["status"].shape, np.nan)
    return ["  " + line for line in advice(
        part["status"].values, step_error, str(attrs.get("solver_method", "")),
        float(attrs.get("solver_step", np.nan)))]
