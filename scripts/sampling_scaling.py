"""How the parameter design scales: cost of a chunk deep in a large ensemble.

For each sampling method, on an illustrative SEIR scenario (invented numbers) with
``--members`` members, prints

- the time of ``make_design`` for a chunk at the end of the ensemble over the time for the
  same-sized chunk at its start (near 1: a chunk's cost does not grow with its position);
- the peak memory traced while designing the last chunk (``tracemalloc``; numpy reports to
  it) over the bytes of one float64 array across the whole ensemble (well below 1 for
  ``random``: nothing is allocated per ensemble member; Latin hypercube keeps one
  permutation per column, Sobol' only its engine);
- members designed per second.

Usage: python scripts/sampling_scaling.py [--members 1000000] [--chunk 1000]
"""

from __future__ import annotations

import argparse
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

from ensemble.examples import seir_text
from ensemble.model.lower import lower_model
from ensemble.sampling import make_design
from ensemble.scenario.load import load_scenario


def timed(function, repeats: int = 5) -> float:
    """Best of ``repeats`` wall-clock times of ``function()``, seconds."""
    best = np.inf
    for _ in range(repeats):
        start = time.perf_counter()
        function()
        best = min(best, time.perf_counter() - start)
    return best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=1_000_000)
    parser.add_argument("--chunk", type=int, default=1000)
    options = parser.parse_args()
    members, chunk = options.members, options.chunk
    print(f"members {members}, chunk {chunk}")
    print(f"{'method':<16}{'end/start time':>16}{'peak/ensemble':>16}{'members/s':>14}")
    with tempfile.TemporaryDirectory() as directory:
        for method in ("random", "latin-hypercube", "sobol"):
            path = Path(directory) / f"{method}.toml"
            path.write_text(seir_text(members=members, days=100, sampling=method,
                                      population=100000, seed=1, name="scaling"))
            scenario = load_scenario(path)
            variant = scenario.variants[0]
            model = lower_model(scenario, variant)
            first = np.arange(chunk)
            last = np.arange(members - chunk, members)

            def design(indices: np.ndarray):
                return make_design(scenario, variant, model, indices)

            design(first)  # warm caches (Latin hypercube permutations, Sobol' tables)
            start_time, end_time = timed(lambda: design(first)), timed(lambda: design(last))
            tracemalloc.start()
            design(last)
            peak = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
            print(f"{method:<16}{end_time / start_time:>16.2f}{peak / (8 * members):>16.3f}"
                  f"{chunk / end_time:>14.3g}")


if __name__ == "__main__":
    main()
