"""Time and peak memory of `ensemble fit` at scale: the invented demo scenarios/seir-fit.toml
(an SEIR with four uncertain parameters, ten weekly counts) with 20,000 particles, the
compiled backend, on the default local workers (dask threads of this process, one per
core, so the peak memory below is the whole fit's). Prints each round, the wall time of
the sampler and of the whole fit (kernel compilation excluded: one small fit first fills
the kernel cache), and the peak resident memory. The goal it is measured against: two
minutes on 2 cores.

Usage: .venv/bin/python scripts/fit_scale.py [PARTICLES]
"""

from __future__ import annotations

import resource
import sys
import tempfile
import time
from pathlib import Path

from ensemble import api

SCENARIO = Path(__file__).resolve().parent.parent / "scenarios" / "seir-fit.toml"


def main() -> None:
    particles = int(sys.argv[1]) if len(sys.argv) > 1 else 20_000
    with tempfile.TemporaryDirectory() as directory:
        api.fit(SCENARIO, output=Path(directory) / "warm.nc", particles=50)
        rounds = []
        began = time.perf_counter()
        api.fit(SCENARIO, output=Path(directory) / "fit.nc", particles=particles,
                report=lambda number, done: rounds.append(
                    (number, done, time.perf_counter() - began)))
        total = time.perf_counter() - began
    for number, done, at in rounds:
        print(f"round {number}: temperature {done.temperature:.4g}, effective size "
              f"{done.effective_size:.0f}, acceptance {100 * done.acceptance:.0f}%, "
              f"at {at:.1f} s")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"{particles} particles: sampler {rounds[-1][2]:.1f} s, whole fit with the "
          f"posterior's projection and file {total:.1f} s (goal 120 s), peak memory "
          f"{peak:.0f} MiB")


if __name__ == "__main__":
    main()
