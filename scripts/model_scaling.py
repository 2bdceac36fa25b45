"""How the lowered model and its numpy evaluator scale with the number of groups.

On an illustrative age-structured SEIR (invented numbers: a dense random contact matrix,
infection ``beta * S * (contacts @ (I / N))``) with G = 4, 8, 16, 32 groups, prints per G

- the time of ``lower_model`` plus building the numpy evaluator, and its ratio to the
  previous G (the rates hold G^2 products and their Jacobian 4 G^2 partials, each of
  a few nodes, so a ratio near 2^2 = 4 per doubling is the expected growth, up to
  about 2^3 = 8 where whole rate trees of O(G) nodes are visited per state);
- the time of one ``rates`` call per member and flow element (it grows about linearly
  with G, since each infection rate is a sum over G groups);
- the peak memory traced during one ``rates`` call over the bytes of its output (the
  evaluator allocates one work array, so the ratio is the work rows over the rate rows,
  a small constant that does not grow with the member count).

Usage: python scripts/model_scaling.py [--members 2000]
"""

from __future__ import annotations

import argparse
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

from ensemble.examples import age_seir_text
from ensemble.model import RateFunctions, lower_model
from ensemble.scenario.load import load_scenario


def scenario_text(n_groups: int, seed: int = 1) -> str:
    """The illustrative SEIR with ``n_groups`` groups of 1000 and a dense random contact
    matrix (invented numbers)."""
    rng = np.random.default_rng(seed)
    contacts = rng.uniform(0.1, 3.0, size=(n_groups, n_groups))
    return age_seir_text([f"g{g}" for g in range(n_groups)], [1000] * n_groups, contacts,
                         name="model-scaling")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=2000)
    args = parser.parse_args()
    previous = None
    print(f"{'G':>3} {'lower s':>10} {'ratio':>6} {'rates ns/(member*flow)':>23} "
          f"{'peak/output':>12} {'jacobian nnz':>13}")
    with tempfile.TemporaryDirectory() as directory:
        for n_groups in (4, 8, 16, 32):
            path = Path(directory) / f"g{n_groups}.toml"
            path.write_text(scenario_text(n_groups))
            scenario = load_scenario(path)
            start = time.perf_counter()
            model = lower_model(scenario, scenario.variants[0])
            functions = RateFunctions(model)
            build = time.perf_counter() - start
            rng = np.random.default_rng(2)
            y = rng.uniform(10, 300, size=(model.n_states, args.members))
            p = rng.uniform(0.01, 5.0, size=(len(model.parameter_slots), args.members))
            s = np.empty((0, args.members))
            out = np.empty((model.n_flow_elements, args.members))
            functions.rates(0.0, y, p, s, out)
            repeats = 10
            start = time.perf_counter()
            for _ in range(repeats):
                functions.rates(0.0, y, p, s, out)
            per_value = (time.perf_counter() - start) / repeats / out.size
            tracemalloc.start()
            functions.rates(0.0, y, p, s, out)
            peak = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
            ratio = "" if previous is None else f"{build / previous:6.1f}"
            print(f"{n_groups:>3} {build:>10.3f} {ratio:>6} {per_value * 1e9:>23.1f} "
                  f"{peak / out.nbytes:>12.2f} {functions.nnz:>13}")
            previous = build


if __name__ == "__main__":
    main()
