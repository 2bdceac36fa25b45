"""Peak resident memory of a large `ensemble run`, against the 2 GB goal of issue 4.

Writes an illustrative SEIR scenario (invented numbers) with 200,000 members over 365
days, ``members = false`` and the step check on, runs ``ensemble run`` on it in a
subprocess, samples the resident memory of the whole process tree (the driver and its
dask workers) with psutil, and prints the peak, its ratio to 2 GB, and the wall time.

The sum of the processes' resident sets counts pages they share more than once, so the
figure is an upper bound.

Usage::

    python scripts/memory.py [--members 200000] [--days 365] [--workers N]
                             [--backend numpy|compiled] [--keep DIR]
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import psutil

GOAL_BYTES = 2 * 10**9
"""Issue 4: a 200,000-member SEIR over 365 days must run in under 2 GB resident memory."""

SCENARIO = """\
[scenario]
name = "memory-check"
title = "Illustrative SEIR for the memory measurement (invented numbers)"
days = {days}
members = {members}
seed = 2027

[model]
compartments = ["S", "E", "I", "R"]
population = 250000
initial = {{ S = "rest", E = 20, I = "seed_infectious" }}

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "beta * S * I / N"

[[model.flows]]
name = "onset"
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
name = "recovery"
from = "I"
to = "R"
rate = "I / infectious_days"

[parameters]
R0 = {{ dist = "uniform", low = 1.2, high = 2.2 }}
latent_days = {{ dist = "gamma", mean = 3.0, sd = 0.7 }}
infectious_days = {{ dist = "lognormal", mean = 5.0, sd = 1.2 }}
seed_infectious = {{ dist = "uniform", low = 5, high = 40 }}
beta = "R0 / infectious_days"

[sampling]
method = "latin-hypercube"

[solver]
method = "rk4"
step = 0.25
check = {{ refine = 2, levels = 2 }}

[output]
path = "memory-check.nc"
members = false
"""


def tree_rss(root: psutil.Process) -> int:
    """Resident bytes of ``root`` and all its descendants (0 for those already gone)."""
    total = 0
    for process in [root, *root.children(recursive=True)]:
        try:
            total += process.memory_info().rss
        except (psutil.NoSuchProcess, psutil.AccessDenied):
            pass
    return total


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=200_000)
    parser.add_argument("--days", type=int, default=365)
    parser.add_argument("--workers", type=int, default=None)
    parser.add_argument("--backend", default=None)
    parser.add_argument("--keep", type=Path, default=None,
                        help="directory to run in and keep (default: a temporary one)")
    options = parser.parse_args()

    with tempfile.TemporaryDirectory(prefix="ensemble-memory-") as temporary:
        directory = options.keep or Path(temporary)
        directory.mkdir(parents=True, exist_ok=True)
        scenario = directory / "memory-check.toml"
        scenario.write_text(SCENARIO.format(members=options.members, days=options.days))
        command = [sys.executable, "-c", "from ensemble.cli import main; main()", "run",
                   str(scenario), "--force"]
        if options.workers is not None:
            command += ["--workers", str(options.workers)]
        if options.backend is not None:
            command += ["--backend", options.backend]

        began = time.monotonic()
        process = subprocess.Popen(command, cwd=directory)
        root = psutil.Process(process.pid)
        peak = 0
        while process.poll() is None:
            peak = max(peak, tree_rss(root))
            time.sleep(0.1)
        wall = time.monotonic() - began

    print(f"members {options.members}, days {options.days}, exit status {process.returncode}")
    print(f"peak resident memory of the process tree: {peak / 1e9:.2f} GB")
    print(f"ratio to the 2 GB goal: {peak / GOAL_BYTES:.2f} (must be below 1)")
    print(f"wall time: {wall:.1f} s")
    return process.returncode


if __name__ == "__main__":
    sys.exit(main())
