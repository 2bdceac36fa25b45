"""Every number of a result file stays what it was when the code is reorganised.

``tests/data/frozen/`` holds two scenarios (an age-structured SEIR with a contact matrix,
a schedule and three variants; a seasonal SEIRS with births, Sobol' sampling, the
trapezoid rule and three check levels) and the result files that ``make.sh`` wrote from
them with both backends before the package's layout was changed.  Running the same
scenarios now must give the same bits in every data variable and coordinate.  Metadata
that records when and how a file was made (``history``, ``source``, ``scenario``,
``fingerprint``) is not compared.  This is a regression check against earlier output of
the project itself, not an outside source; the numbers were checked against published
results by the other tests when they were written.

The compiled backend's floating-point numbers are compared to 1e-12 relative rather than
bit for bit: its kernels now loop over groups and fill the Newton matrix of the implicit
methods term by term, which changes the order of some sums (the seasonal file's states
moved by at most 5e-16 relative).  Its integers (status bits, counts) and every number of
the numpy backend must stay exactly what they were.

One change of meaning since: the quantiles now rest on the members without any status
bit, where they used to keep members whose step check failed, that went below minus atol
or whose Newton iteration did not converge (the policy in the reference's result-file
section).  The seasonal files hold such members (their step check fails), so the quantile
variables and ``members_in_summary`` are compared only for the variants whose members
carry none of those bits (for the differences from ``compare_to``, when that variant's
do not either); every other number, the status bits included, is compared everywhere.

One change of form: a parameter given as a number (or a number per group) in every
variant is now stored once per variant, without the member dimension.  Such a variable
of the old files is compared with the new values broadcast over the members, so every
member's old value must equal its variant's one stored value.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from ensemble import api
from ensemble.records import BELOW_NEGATIVE_ATOL, NEWTON_NOT_CONVERGED, STEP_CHECK_FAILED

FROZEN = Path(__file__).parent / "data" / "frozen"

NEWLY_LEFT_OUT = STEP_CHECK_FAILED | BELOW_NEGATIVE_ATOL | NEWTON_NOT_CONVERGED
"""Status bits whose members the quantiles have left out since the files were written."""


def unchanged_variants(before: xr.Dataset, variable: str, compare_to: int | None
                       ) -> np.ndarray:
    """The variants whose values of ``variable`` the quantile policy leaves as they were
    (every variant for a variable that is no quantile); ``compare_to`` is the index of
    the variant the differences are taken from."""
    variants = before.sizes["variant"]
    if not (variable.endswith("_quantile") or variable.startswith("difference_quantile_")
            or variable == "members_in_summary"):
        return np.ones(variants, dtype=bool)
    clean = ~((before["status"].values & NEWLY_LEFT_OUT) != 0).any(axis=1)
    if variable.startswith("difference_quantile_") and compare_to is not None:
        clean &= clean[compare_to]
    return clean

STORED_ONCE = {"age": ["param_seed_share", "param_susceptibility"],
               "seasonal": ["param_birth_rate", "param_death_rate"]}
"""The parameters each frozen scenario gives as numbers (its [parameters] table)."""


@pytest.mark.parametrize("backend",
                         [pytest.param("numpy", marks=pytest.mark.slow), "compiled"])
@pytest.mark.parametrize("name", ["age", "seasonal"])
def test_numbers_are_those_written_before(tmp_path: Path, name: str, backend: str) -> None:
    scenario = api.load_scenario(FROZEN / f"{name}.toml")
    variant_names = [variant.name for variant in scenario.variants]
    compare_to = (variant_names.index(scenario.output.compare_to)
                  if scenario.output.compare_to else None)
    written = api.run(scenario, output=tmp_path / f"{name}-{backend}.nc",
                      backend=backend, workers=0, progress=False)
    with xr.open_dataset(FROZEN / f"{name}-{backend}.nc", decode_times=False) as before, \
            xr.open_dataset(written, decode_times=False) as now:
        numeric = [name for name, variable in before.variables.items()
                   if variable.dtype.kind in "iufb"]
        assert numeric, "the frozen file holds no numbers"
        stored_once = []
        for variable in numeric:
            assert variable in now.variables, f"{variable} is missing"
            new_values = now[variable]
            if "member" in before[variable].dims and "member" not in new_values.dims:
                stored_once.append(variable)        # a constant, now once per variant
                new_values = new_values.expand_dims(
                    member=before.sizes["member"]).transpose(*before[variable].dims)
            old, new = before[variable].values, new_values.values
            assert old.shape == new.shape, variable
            if "variant" in before[variable].dims:
                assert before[variable].dims[0] == "variant", variable
                kept = unchanged_variants(before, variable, compare_to)
                old, new = old[kept], new[kept]
            if backend == "compiled" and old.dtype.kind == "f":
                np.testing.assert_allclose(new, old, rtol=1e-12, atol=0, err_msg=variable)
            else:
                assert np.array_equal(old, new, equal_nan=old.dtype.kind == "f"), variable
        assert sorted(stored_once) == STORED_ONCE[name]
