"""Whether a run can finish and be written, estimated before anything is computed.

A scenario can be valid and still impossible to run: a step of 1e-300 days asks for
more steps than any integer counter holds, a trillion members make a file no disk holds,
an output path that is a directory can never receive the result.  :func:`estimate` gives
the figures of a run (member-steps of integration, the driver's memory, the size of the
work directory and of the result file); :func:`refuse_infeasible` refuses, with those
figures, what cannot finish or be written (exit status 2, nothing computed), and
:func:`advice` says how to proceed with a run that is feasible but large.  ``ensemble
check`` prints the figures; ``ensemble run`` refuses before it starts.
"""

from __future__ import annotations

import math
import os
import shutil
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

import psutil

from ensemble.errors import ScenarioError, UsageError
from ensemble.scenario.schema import Scenario

MAX_STEPS_PER_REPORT = 10 ** 8
"""Most steps between two reported times: a hundred million (a step of under a
millisecond with daily reports) is beyond what any epidemic model needs, and the counters
of the integrators stay far from their limits (common practice, no source)."""

MAX_MEMBER_STEPS = 1e18
"""Most member-steps of a run (every run of the step check counted): more than a week on
ten thousand cores of the compiled kernels' pace on a small model (common practice, no
source)."""

ROW_STEPS_PER_CORE_SECOND = 2e8
"""A rough end-to-end pace of ``ensemble run`` with the compiled kernels, in row-steps
(member-steps times the rows of a member's state: compartments and flows in every group)
per core and second.  Measured on two cores (``scripts/benchmark.py``, step check on):
2.6e8 for 200,000 members of the four-compartment SEIR (7 rows, 11.7 s) and 2.0e8 for a
million members of the 16-group SEIR (112 rows, 20.6 minutes); the slower is kept.  Used
only to say how long a run may take."""

COMPRESSION_ALLOWANCE = 4.0
"""The result file is taken to be at least a quarter of its uncompressed size: zlib with
shuffling rarely shrinks float64 data further (common practice, no source)."""

LARGE_RUN_SECONDS = 3600.0
"""Runs estimated to take longer than this on this machine get advice on how to proceed."""

LARGE_FILE_BYTES = 10 * 2 ** 30
"""Result files estimated larger than this get advice on how to make them smaller."""

KEPT_WHOLE_MEMBERS = 8192
"""Members of each variant whose trajectories the work directory keeps whole when the
result keeps none (the README's "only the first 8,192 members of each variant are kept
whole"); of the others it keeps about :data:`CANDIDATE_SHARE`."""

CANDIDATE_SHARE = 0.2
"""The share of a later chunk's trajectories the work directory keeps as candidates for
the quantiles (the README: "about a fifth")."""


METRICS_PER_MEASURE_ROW = 5
"""Per-member values of each measure row: its peak, the peak's time, its total, the days
above its threshold and whether the peak is censored at the horizon."""


@dataclass(frozen=True)
class Estimate:
    """The figures of one run.

    Attributes
    ----------
    members : members computed per variant (a shard's, for a shard).
    variants : the variants.
    steps_per_report : integration steps between two reported times.
    member_steps : steps of integration over every member, variant and run of the step
        check (a run at h / r takes r times the steps).
    rows : the rows of a member's state (compartments and flows in every group).
    driver_bytes : memory the driver holds for every member's values at the finish.
    work_bytes : the work directory's saved chunks (uncompressed).
    file_bytes : the result file, uncompressed.
    """

    members: int
    variants: int
    steps_per_report: int
    member_steps: float
    rows: int
    driver_bytes: float
    work_bytes: float
    file_bytes: float

    @property
    def row_steps(self) -> float:
        """``member_steps`` times :attr:`rows`: the work the time estimate counts."""
        return self.member_steps * self.rows

    def hours(self, cores: int) -> float:
        """Rough hours of computing on ``cores`` cores."""
        return self.row_steps / (ROW_STEPS_PER_CORE_SECOND * max(cores, 1)) / 3600

    def lines(self, cores: int) -> list[str]:
        """The figures as lines for ``ensemble check``."""
        return [f"work          {self.member_steps:.3g} member-steps (about "
                f"{_duration(self.hours(cores) * 3600)} on {cores} core(s) of this machine; "
                "a rough pace)",
                f"memory        {_size(self.driver_bytes)} of per-member values at the finish",
                f"disk          {_size(self.work_bytes)} of saved chunks while running, a "
                f"result file of up to {_size(self.file_bytes)}"]


def estimate(scenario: Scenario, members: int | None = None) -> Estimate:
    """The figures of running ``scenario`` with ``members`` members per variant (default
    all): the rows of the result are its compartments and flows in every group (more
    with ``show_stages``, so the sizes are "about")."""
    members = scenario.member_count if members is None else members
    variants = len(scenario.variants)
    solver, check = scenario.solver, scenario.solver.check
    runs = 1
    if check.enabled:
        runs += check.refine + (check.refine ** 2 if check.levels == 3 else 0)
    model = scenario.model
    groups = len(model.groups) if model.groups else 1
    rows = (len(model.compartments) + len(model.flows)) * groups
    measure_series, measure_rows = _measure_sizes(scenario, groups)
    per_member = (3 * rows + METRICS_PER_MEASURE_ROW * measure_rows
                  + len(scenario.parameters) * groups + 4) * 8
    trajectory = (rows * scenario.n_reports + measure_series) * 8
    kept = 1.0
    if not scenario.output.keep_members and members > KEPT_WHOLE_MEMBERS:
        kept = (KEPT_WHOLE_MEMBERS + CANDIDATE_SHARE * (members - KEPT_WHOLE_MEMBERS)) / members
    count = float(variants) * members
    return Estimate(
        members=members, variants=variants, steps_per_report=solver.steps_per_report,
        member_steps=count * _as_float(scenario.days / solver.step) * runs, rows=rows,
        driver_bytes=count * per_member,
        work_bytes=count * (per_member + kept * trajectory),
        file_bytes=count * (per_member + (trajectory if scenario.output.keep_members else 0)))


def _measure_sizes(scenario: Scenario, groups: int) -> tuple[int, int]:
    """The values of one member's measure series (every row, every reported time or
    window) and the measures' rows: ``groups = "each"`` gives a row per group, a sum or
    a list of groups one row."""
    series = rows = 0
    for measure in scenario.measures:
        count = groups if measure.groups == "each" else 1
        times = (scenario.n_reports if measure.flow is None
                 else int(scenario.days / measure.window))
        rows += count
        series += count * times
    return series, rows


def refuse_infeasible(scenario: Scenario, figures: Estimate, output: Path | None = None,
                      resume: bool = False) -> None:
    """Raise :class:`~ensemble.errors.UsageError` (exit status 2) naming the figures when
    the run cannot finish or be written: too many steps between reports or in all, more
    per-member values than this machine's memory, an ``output`` that is a directory, or
    (unless it resumes work already on disk) more than the free space of its disk."""
    file = scenario.source.path
    if figures.steps_per_report > MAX_STEPS_PER_REPORT:
        raise ScenarioError(file, "solver.step", float(scenario.solver.step),
                         f"{_as_float(Fraction(figures.steps_per_report)):.3g} steps between "
                         "two reported times, "
                         f"more than {MAX_STEPS_PER_REPORT:.0e}: no run could finish",
                         "use a step that is a reasonable fraction of solver.report_every")
    if figures.member_steps > MAX_MEMBER_STEPS:
        raise ScenarioError(file, "scenario.members", figures.members,
                         f"{figures.member_steps:.3g} member-steps of integration, more than "
                         f"{MAX_MEMBER_STEPS:.0e} (over a week on ten thousand cores)",
                         "use fewer members, a shorter horizon or a larger step")
    memory = psutil.virtual_memory().total
    if figures.driver_bytes > memory:
        raise ScenarioError(file, "scenario.members", figures.members,
                         f"the finish holds {_size(figures.driver_bytes)} of per-member values, "
                         f"more than this machine's {_size(memory)} of memory",
                         "use fewer members per variant")
    if output is not None and output.is_dir():
        raise UsageError(str(output), "", None, "is a directory: the result is a file",
                         "give a file name, such as " + os.fspath(output / "result.nc"))
    if output is not None and not resume:
        free = shutil.disk_usage(_existing_parent(output)).free
        needed = figures.work_bytes + figures.file_bytes / COMPRESSION_ALLOWANCE
        if needed > free:
            raise UsageError(str(output), "", None,
                             f"the run needs about {_size(needed)} of disk ("
                             f"{_size(figures.work_bytes)} of saved chunks, a result file of "
                             f"at least {_size(figures.file_bytes / COMPRESSION_ALLOWANCE)}) "
                             f"and {_size(free)} are free there",
                             "free space, write elsewhere (-o), or keep fewer values "
                             "([output] keep_members = false)")


def advice(scenario: Scenario, figures: Estimate, cores: int, local: bool = True
           ) -> list[str]:
    """How to proceed with a run that is feasible but large: long on the ``cores`` of
    this machine (when it runs ``local``ly), or a large result file."""
    notes = []
    if local and figures.hours(cores) * 3600 > LARGE_RUN_SECONDS:
        notes.append(f"this run is about {figures.member_steps:.3g} member-steps, roughly "
                     f"{_duration(figures.hours(cores) * 3600)} on the {cores} core(s) of this "
                     "machine: a cluster shortens it (--cluster NAME, or ensemble "
                     "array-script for a job array), and a larger solver.step, if the step "
                     "check allows it, does too")
    if figures.file_bytes > LARGE_FILE_BYTES and scenario.output.keep_members:
        notes.append(f"the result file may reach {_size(figures.file_bytes)} with every "
                     "member's trajectories: [output] keep_members = false keeps the "
                     "quantiles and per-member values only")
    return notes


def machine_cores() -> int:
    """Cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not Linux
        return os.cpu_count() or 1


def section(figures: Estimate, advised: list[str], cores: int) -> str:
    """The figures and the advice as a section of ``ensemble check``'s text."""
    lines = ["feasibility", *(f"  {line}" for line in figures.lines(cores)),
             *(f"  - {note}" for note in advised)]
    return "\n".join(lines)


def _as_float(value: Fraction) -> float:
    """``value`` as a float, infinite beyond the largest one."""
    try:
        return float(value)
    except OverflowError:
        return math.inf


def _existing_parent(path: Path) -> Path:
    """The nearest directory of ``path`` (itself excluded) that exists."""
    parent = path.absolute().parent
    while not parent.exists():
        parent = parent.parent
    return parent


def _size(count: float) -> str:
    """A number of bytes for people: ``1.5 GB`` (powers of 1000)."""
    for unit in ("B", "kB", "MB", "GB", "TB", "PB"):
        if count < 1000 or unit == "PB":
            return f"{count:.3g} {unit}" if unit != "B" else f"{count:.0f} B"
        count /= 1000
    return f"{count:.3g} PB"


def _duration(seconds: float) -> str:
    """A rough duration: seconds, minutes, hours, days or years."""
    if not math.isfinite(seconds):
        return "forever"
    if seconds < 1:
        return "under a second"
    for limit, unit, size in ((120, "s", 1), (7200, "min", 60), (172800, "h", 3600),
                              (2 * 365 * 86400, "days", 86400)):
        if seconds < limit:
            return f"{seconds / size:.0f} {unit}"
    return f"{seconds / (365 * 86400):.3g} years"
