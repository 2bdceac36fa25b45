"""Peak memory of the work journal's finish step at full size.

Saves made-up chunks of a 200,000-member SEIR over 365 days (one variant, 366 reports)
into a work directory, then runs ``WorkJournal.finish`` in a fresh process and prints that
process's peak resident memory against the 2 GB goal, as a ratio, and the wall time.
The trajectories are random numbers: the quantiles' cost does not depend on the values,
but random values compress badly, so the file (with ``--keep-members``) is larger and
slower to write than a real one.  Needs about 4.5 GB of free disk.

    python scripts/finish_memory.py [--members 200000] [--keep-members] [--directory DIR]
"""

from __future__ import annotations

import argparse
import dataclasses
import resource
import subprocess
import sys
import tempfile
import time
from fractions import Fraction
from pathlib import Path

import numpy as np

GOAL_MIB = 2048
SCENARIO = Path(__file__).resolve().parent.parent / "scenarios" / "seir-demo.toml"
CHUNK = 5000


def _layout(members: int, keep_members: bool):
    """The demo scenario cut to one variant, 365 days and ``members`` members."""
    from ensemble.run.layout import lowered_models, result_layout
    from ensemble.scenario.load import load_scenario

    scenario = load_scenario(SCENARIO, member_count=members)
    scenario = dataclasses.replace(
        scenario, days=Fraction(365), variants=scenario.variants[:1],
        output=dataclasses.replace(scenario.output, keep_members=keep_members, compare_to=None))
    return result_layout(scenario, lowered_models(scenario), "0" * 64,
                         "scripts/finish_memory.py")


def _phase(phase: str, path: Path, members: int, keep_members: bool) -> None:
    """Run one phase in this process and print its peak resident memory in MiB."""
    from ensemble.records import ChunkResult
    from ensemble.run.journal import WorkJournal

    layout = _layout(members, keep_members)
    began = time.monotonic()
    if phase == "save":
        journal = WorkJournal.open(path, layout, resume=False, force=True)
        rng = np.random.default_rng(1)
        for first in range(0, members, CHUNK):
            end = min(first + CHUNK, members)
            size = end - first
            flow = rng.random((size, layout.n_flow_elements, layout.n_reports))
            flow[:, :, 0] = np.nan
            result = ChunkResult(
                members=np.arange(first, end),
                state=rng.random((size, layout.n_states, layout.n_reports)) * 1000,
                flow_count=flow, step_error=np.zeros(size),
                observed_order=np.full(size, np.nan),
                basic_reproduction_number=rng.random(size) + 1.0,
                status=np.zeros(size, np.uint8))
            journal.save((0, first, end), result,
                       {name: rng.random(size) for name in layout.parameters})
    else:
        WorkJournal.open(path, layout, resume=True, force=True).finish()
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"{phase} {peak:.0f} {time.monotonic() - began:.1f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=200_000)
    parser.add_argument("--keep-members", action="store_true",
                        help="write every member's trajectories too (output.keep_members = true)")
    parser.add_argument("--directory", type=Path, default=None,
                        help="where to put the work (default: a temporary directory)")
    parser.add_argument("--phase", choices=["save", "finish"], help=argparse.SUPPRESS)
    arguments = parser.parse_args()
    if arguments.phase:
        _phase(arguments.phase, arguments.directory / "result.nc", arguments.members,
               arguments.keep_members)
        return
    with tempfile.TemporaryDirectory(dir=arguments.directory) as directory:
        figures = {}
        for phase in ("save", "finish"):
            command = [sys.executable, __file__, "--phase", phase, "--directory", directory,
                       "--members", str(arguments.members)]
            if arguments.keep_members:
                command.append("--keep-members")
            done = subprocess.run(command, capture_output=True, text=True, check=True)
            name, peak, seconds = done.stdout.split()[-3:]
            figures[name] = (float(peak), float(seconds))
    peak, seconds = figures["finish"]
    print(f"members {arguments.members} x 4 states x 366 reports, keep members: "
          f"{arguments.keep_members}")
    print(f"finish: peak resident {peak:.0f} MiB, goal {GOAL_MIB} MiB, ratio "
          f"{peak / GOAL_MIB:.2f}; {seconds:.0f} s")
    print(f"save (made-up chunks of {CHUNK}): peak resident {figures['save'][0]:.0f} MiB")


if __name__ == "__main__":
    main()
