"""Code finding the schedule values in force at a stage, by the rules of the numpy
reference (:mod:`ensemble.integrate.reference`, "Schedules").

Slot i of the model's schedules is passed to the kernel as two arrays: ``days_i`` (the
knots' step indices for a "step" slot, their days for a "linear" one) and ``values_i``
(knots by members).  Where a stage falls among the knots is the same for every member, so
it is found once per step or stage, outside the members loop (with the lookups of
:mod:`.scalars`); only the values are read per member.
"""

from __future__ import annotations

from ensemble.model.lower import ScheduleSlot


class ScheduleCode:
    """Lines of kernel code reading the schedule slots ``slots``."""

    def __init__(self, slots: tuple[ScheduleSlot, ...]):
        self.slots = slots

    def arguments(self) -> list[str]:
        """The kernel's arguments holding the slots, in the order they are passed."""
        names = []
        for i in range(len(self.slots)):
            names += [f"days_{i}", f"values_{i}"]
        return names

    def step_prelude(self, indent: str) -> list[str]:
        """Per step, outside the members loop: the knot in force for every "step" slot."""
        lines = []
        for i, slot in enumerate(self.slots):
            if slot.between == "step":
                lines.append(f"{indent}knot_{i} = step_value_index(days_{i}, step)")
        return lines

    def stage_prelude(self, stage: str, time: str, indent: str) -> list[str]:
        """Per stage, outside the members loop: where each "linear" slot's stage time falls
        (``seg``: the knot interval; ``held``: before the first or from the last knot)."""
        lines = []
        for i, slot in enumerate(self.slots):
            if slot.between == "linear":
                lines += _segment_lines(i, len(slot.days) - 1, stage, time, indent)
        return lines

    def values(self, stage: str, used: set[int]) -> list[str]:
        """Per member and stage: the value of every used slot, as ``s<stage>_<slot>``."""
        lines = []
        for i in sorted(used):
            slot = self.slots[i]
            if slot.between == "step":
                lines.append(f"s{stage}_{i} = values_{i}[knot_{i}, m]")
            else:
                lines.append(f"lo = values_{i}[seg{stage}_{i}, m]")
                lines.append(f"hi = values_{i}[nxt{stage}_{i}, m]")
                lines.append(f"s{stage}_{i} = lo if held{stage}_{i} else "
                             f"(hi - lo) / gap{stage}_{i} * off{stage}_{i} + lo")
        return lines


def _segment_lines(i: int, last: int, stage: str, time: str, indent: str) -> list[str]:
    """Where ``time`` falls among the knots of "linear" slot ``i`` (whose last knot index is
    ``last``): its segment, offset into it and width, and the knot after it."""
    return [
        f"{indent}seg{stage}_{i} = interpolation_segment(days_{i}, {time})",
        f"{indent}held{stage}_{i} = seg{stage}_{i} < 0 or seg{stage}_{i} >= {last}",
        f"{indent}if held{stage}_{i}:",
        f"{indent}    seg{stage}_{i} = 0 if seg{stage}_{i} < 0 else {last}",
        f"{indent}    off{stage}_{i} = 0.0",
        f"{indent}    gap{stage}_{i} = 1.0",
        f"{indent}else:",
        f"{indent}    off{stage}_{i} = {time} - days_{i}[seg{stage}_{i}]",
        f"{indent}    gap{stage}_{i} = days_{i}[seg{stage}_{i} + 1] - "
        f"days_{i}[seg{stage}_{i}]",
        f"{indent}nxt{stage}_{i} = seg{stage}_{i} if held{stage}_{i} else "
        f"seg{stage}_{i} + 1",
    ]
