"""What a fit learnt: the prior and posterior quantiles of every drawn parameter, the
text ``ensemble fit`` prints last.

The prior quantiles are the parameter's distribution's own (its quantile function at
the probabilities, :func:`ensemble.distributions.inverse_cdf`); the posterior ones are
those of the fitted result's members (``param_<name>``, first variant), by numpy's
default quantile definition as elsewhere in the result.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ensemble.distributions import inverse_cdf
from ensemble.sampling.uniform import uncertain_columns
from ensemble.scenario.schema import Scenario, element_distribution

PROBABILITIES = (0.05, 0.5, 0.95)


def prior_and_posterior(scenario: Scenario, dataset: xr.Dataset) -> str:
    """A table of each drawn parameter's prior and posterior 5%, 50% and 95% quantiles
    in the first variant (a parameter drawn per group: a row per group)."""
    variant = scenario.variants[0]
    parameters = scenario.variant_parameters(variant)
    heads = [f"{100 * p:g}%" for p in PROBABILITIES]
    rows = [["parameter", *(f"prior {h}" for h in heads), *(f"posterior {h}" for h in heads)]]
    for name, element in uncertain_columns(scenario):
        distribution = element_distribution(parameters[name].form, element)
        if distribution is None or f"param_{name}" not in dataset:
            continue
        prior = inverse_cdf(distribution.family, distribution.arguments,
                            distribution.truncation, np.array(PROBABILITIES))
        values = dataset[f"param_{name}"].isel(variant=0)
        if "group" in values.dims:
            values = values.isel(group=element)
        posterior = np.quantile(np.asarray(values.values, dtype=float), PROBABILITIES)
        label = f"{name}[{element}]" if "group" in dataset[f"param_{name}"].dims else name
        rows.append([label, *(f"{v:.4g}" for v in prior), *(f"{v:.4g}" for v in posterior)])
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    lines = ["  ".join(cell.ljust(w) if i == 0 else cell.rjust(w)
                       for i, (cell, w) in enumerate(zip(row, widths))) for row in rows]
    return "\n".join(lines) + "\n"
