"""Peak resident memory of a large `ensemble run`, against the project's 2 GB goal.

Writes an illustrative SEIR scenario (invented numbers) with 200,000 members over 365
days, ``keep_members = false`` and the step check on, runs ``ensemble run`` on it in a
subprocess, samples the resident memory of the whole process tree (the driver and its
dask workers) with psutil, and prints the peak (also the driver's and the largest
worker's), its ratio to 2 GB, and the wall time split into computing and writing.

The sum of the processes' resident sets counts pages they share more than once, so the
figure is an upper bound.

Usage::

    python scripts/memory.py [--members 200000] [--days 365] [--workers N]
                             [--backend numpy|compiled] [--keep DIR] [--measures]

``--measures`` adds three briefing measures to the scenario (infectious persons, exposed
or infectious persons, new infections per week), whose bands are computed as those of
``state``.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import psutil

from ensemble.examples import seir_text

MEASURES = """
[[measures]]
name = "infectious"
of = "I"
threshold = 1000

[[measures]]
name = "infected"
of = "E + I"

[[measures]]
name = "infections"
of = "infection"
window = 7
"""
"""Illustrative measures of the SEIR scenario (``--measures``)."""

GOAL_BYTES = 2 * 10**9
"""The project's goal: a 200,000-member SEIR over 365 days runs in under 2 GB resident
memory."""


def sample(root: psutil.Process) -> tuple[int, int, int]:
    """Resident bytes of the whole tree under ``root``, of ``root`` alone (the driver), and
    of its largest descendant (a dask worker); 0 for processes already gone."""
    total = driver = largest = 0
    for process in [root, *root.children(recursive=True)]:
        try:
            rss = process.memory_info().rss
        except (psutil.NoSuchProcess, psutil.AccessDenied):
            continue
        total += rss
        if process.pid == root.pid:
            driver = rss
        else:
            largest = max(largest, rss)
    return total, driver, largest


def watch_stderr(process: subprocess.Popen, began: float, marks: dict[str, float]) -> None:
    """Echo the run's standard error and note when it starts writing the result."""
    for line in process.stderr:
        sys.stderr.write(line)
        if "writing" in line:
            marks["writing"] = time.monotonic() - began


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=200_000)
    parser.add_argument("--days", type=int, default=365)
    parser.add_argument("--workers", type=int, default=None)
    parser.add_argument("--backend", default=None)
    parser.add_argument("--keep", type=Path, default=None,
                        help="directory to run in and keep (default: a temporary one)")
    parser.add_argument("--measures", action="store_true",
                        help="add three measures to the scenario")
    options = parser.parse_args()

    with tempfile.TemporaryDirectory(prefix="ensemble-memory-") as temporary:
        directory = options.keep or Path(temporary)
        directory.mkdir(parents=True, exist_ok=True)
        scenario = directory / "memory-check.toml"
        scenario.write_text(seir_text(members=options.members, days=options.days,
                                      population=250000, seed=2027, keep_members=False,
                                      output="memory-check.nc", name="memory-check")
                            + (MEASURES if options.measures else ""))
        command = [sys.executable, "-c", "from ensemble.cli import main; main()", "run",
                   str(scenario), "--force"]
        if options.workers is not None:
            command += ["--workers", str(options.workers)]
        if options.backend is not None:
            command += ["--backend", options.backend]

        began = time.monotonic()
        process = subprocess.Popen(command, cwd=directory, stderr=subprocess.PIPE, text=True)
        marks: dict[str, float] = {}
        echo = threading.Thread(target=watch_stderr, args=(process, began, marks))
        echo.start()
        root = psutil.Process(process.pid)
        peaks = [0, 0, 0]
        while process.poll() is None:
            peaks = [max(old, new) for old, new in zip(peaks, sample(root))]
            time.sleep(0.1)
        wall = time.monotonic() - began
        echo.join()

    total, driver, worker = peaks
    print(f"members {options.members}, days {options.days}, measures "
          f"{'3' if options.measures else 'none'}, exit status {process.returncode}")
    print(f"peak resident memory of the process tree: {total / 1e9:.2f} GB "
          f"(driver {driver / 1e9:.2f} GB, largest worker {worker / 1e9:.2f} GB)")
    print(f"ratio to the 2 GB goal: {total / GOAL_BYTES:.2f} (must be below 1)")
    writing = marks.get("writing")
    split = f" (computing {writing:.1f} s, writing the result {wall - writing:.1f} s)" \
        if writing is not None else ""
    print(f"wall time: {wall:.1f} s{split}")
    return process.returncode


if __name__ == "__main__":
    sys.exit(main())
