"""What a fit learnt: the prior and posterior quantiles of every drawn parameter, the
text ``ensemble fit`` prints last and ``ensemble summary`` prints for a fit's result.

The prior quantiles are the parameter's distribution's own (its quantile function at
the probabilities, :func:`ensemble.distributions.inverse_cdf`); the posterior ones are
those of the fitted result's members (``param_<name>``, first variant), by numpy's
default quantile definition as elsewhere in the result.  A fit's result keeps the prior
quantiles it was given (:func:`prior_variables`), so that its summary needs only the
file.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ensemble.distributions import inverse_cdf
from ensemble.sampling.uniform import uncertain_columns
from ensemble.scenario.schema import Scenario, element_distribution

PROBABILITIES = (0.05, 0.5, 0.95)


def prior_quantiles(scenario: Scenario) -> list[tuple[str, str, int, np.ndarray]]:
    """(label, parameter, element, prior quantiles at :data:`PROBABILITIES`) of each
    drawn parameter of the first variant (a parameter drawn per group: one per group,
    labelled ``name[element]``)."""
    variant = scenario.variants[0]
    parameters = scenario.variant_parameters(variant)
    found = []
    for name, element in uncertain_columns(scenario):
        distribution = element_distribution(parameters[name].form, element)
        if distribution is None:
            continue
        prior = inverse_cdf(distribution.family, distribution.arguments,
                            distribution.truncation, np.array(PROBABILITIES))
        per_group = parameters[name].shape != "scalar"
        label = f"{name}[{element}]" if per_group else name
        found.append((label, name, int(element), np.asarray(prior, dtype=float)))
    return found


def prior_variables(scenario: Scenario) -> dict[str, xr.DataArray]:
    """The prior quantiles of :func:`prior_quantiles` as variables of a fit's result:
    ``fit_parameter`` (label), ``fit_parameter_name``, ``fit_parameter_element`` and
    ``fit_prior_quantile`` over ``fit_parameter`` and ``fit_probability``."""
    rows = prior_quantiles(scenario)
    dims = ("fit_parameter",)
    return {
        "fit_parameter_label": xr.DataArray(np.array([r[0] for r in rows], dtype=str), dims=dims,
                                            attrs={"long_name": "drawn parameter fitted"}),
        "fit_parameter_name": xr.DataArray(np.array([r[1] for r in rows], dtype=str), dims=dims,
                                           attrs={"long_name": "its parameter's name"}),
        "fit_parameter_element": xr.DataArray(
            np.array([r[2] for r in rows], dtype=np.int32), dims=dims,
            attrs={"long_name": "its group's index for a parameter drawn per group"}),
        "fit_prior_quantile": xr.DataArray(
            np.array([r[3] for r in rows], dtype=float).reshape(len(rows),
                                                                len(PROBABILITIES)),
            dims=(*dims, "fit_probability"),
            coords={"fit_probability": np.array(PROBABILITIES)},
            attrs={"long_name": "quantile of the parameter's prior distribution"}),
    }


def prior_and_posterior(scenario: Scenario, dataset: xr.Dataset) -> str:
    """A table of each drawn parameter's prior and posterior 5%, 50% and 95% quantiles
    in the first variant (a parameter drawn per group: a row per group)."""
    return _table([(label, prior, _posterior(dataset, name, element))
                   for label, name, element, prior in prior_quantiles(scenario)
                   if f"param_{name}" in dataset])


def stored_prior_and_posterior(dataset: xr.Dataset) -> str:
    """The table of :func:`prior_and_posterior` from a fit's result alone (the prior
    quantiles it keeps); empty text for a result without them."""
    if "fit_prior_quantile" not in dataset:
        return ""
    rows = []
    for index in range(dataset.sizes["fit_parameter"]):
        name = str(dataset["fit_parameter_name"].values[index])
        if f"param_{name}" in dataset:
            rows.append((str(dataset["fit_parameter_label"].values[index]),
                         dataset["fit_prior_quantile"].values[index],
                         _posterior(dataset, name,
                                    int(dataset["fit_parameter_element"].values[index]))))
    return _table(rows)


def _posterior(dataset: xr.Dataset, name: str, element: int) -> np.ndarray:
    """The quantiles at :data:`PROBABILITIES` of the members' values of ``name``
    (``element``'s for a parameter per group), first variant."""
    values = dataset[f"param_{name}"].isel(variant=0)
    if "group" in values.dims:
        values = values.isel(group=element)
    return np.quantile(np.asarray(values.values, dtype=float), PROBABILITIES)


def _table(rows: list[tuple[str, np.ndarray, np.ndarray]]) -> str:
    """Aligned text of (label, prior quantiles, posterior quantiles) rows."""
    heads = [f"{100 * p:g}%" for p in PROBABILITIES]
    cells = [["parameter", *(f"prior {h}" for h in heads),
              *(f"posterior {h}" for h in heads)]]
    cells += [[label, *(f"{v:.4g}" for v in prior), *(f"{v:.4g}" for v in posterior)]
              for label, prior, posterior in rows]
    widths = [max(len(row[i]) for row in cells) for i in range(len(cells[0]))]
    lines = ["  ".join(cell.ljust(w) if i == 0 else cell.rjust(w)
                       for i, (cell, w) in enumerate(zip(row, widths))) for row in cells]
    return "\n".join(lines) + "\n"
