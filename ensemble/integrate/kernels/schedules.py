"""The schedules as a kernel reads them: every slot's knots and values packed into a few
arrays, and the calls that find the values in force at each stage of a step.

Where a stage falls among a slot's knots is the same for every member, so it is found
once per stage, outside the loops over members, by
:func:`~ensemble.integrate.kernels.scalars.schedule_values`, which writes the values of
every slot at every stage of the step into ``sv[stage, slot, member]``; the rates read
them from there.  The arrays hold data only, so the kernel's text does not depend on the
number of slots or knots.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ensemble.model.lower import ScheduleSlot

ARGUMENTS = ("knot_steps", "knot_days", "slot_knots", "slot_linear", "knot_values")
"""The kernel's arguments holding the schedules, in the order :func:`schedule_arrays`
gives them."""


def schedule_lines(stages: Sequence[tuple[str, str]], indent: str) -> list[str]:
    """Per step, outside the loops over members: the values in force at each stage
    (named ``time<stage>`` in the kernel), into ``sv``."""
    return [f"{indent}schedule_values(sv, {index}, step, time{stage}, "
            f"{', '.join(ARGUMENTS)}, m0, width)"
            for index, (stage, _) in enumerate(stages)]


def schedule_arrays(slots: Sequence[ScheduleSlot], values: Sequence[np.ndarray], step: float,
                    columns: np.ndarray | None) -> tuple[np.ndarray, ...]:
    """The arrays of :data:`ARGUMENTS` for ``slots`` with their per-member ``values``
    (knots by members): the knots' step indices ``rint(day / step)`` and days, where each
    slot's knots start, which slots are "linear", and the values of every knot in the
    kernel's member columns (``columns``: the member of each column, None for all in
    order)."""
    steps, days, starts, linear, rows = [], [], [0], [], []
    for slot, slot_values in zip(slots, values):
        steps.append(np.rint(slot.days / step).astype(np.int64))
        days.append(np.asarray(slot.days, dtype=np.float64))
        starts.append(starts[-1] + len(slot.days))
        linear.append(slot.between == "linear")
        rows.append(np.asarray(slot_values, dtype=np.float64))
    n_columns = (len(columns) if columns is not None
                 else (rows[0].shape[1] if rows else 0))
    knot_values = (np.concatenate(rows) if rows else np.empty((0, n_columns)))
    if columns is not None:
        knot_values = np.take(knot_values, columns, axis=1)
    return (np.concatenate(steps) if steps else np.empty(0, np.int64),
            np.concatenate(days) if days else np.empty(0),
            np.array(starts, np.int64), np.array(linear, np.uint8),
            np.ascontiguousarray(knot_values))
