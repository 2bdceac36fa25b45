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
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from ensemble import api

FROZEN = Path(__file__).parent / "data" / "frozen"


@pytest.mark.parametrize("backend",
                         [pytest.param("numpy", marks=pytest.mark.slow), "compiled"])
@pytest.mark.parametrize("name", ["age", "seasonal"])
def test_numbers_are_those_written_before(tmp_path: Path, name: str, backend: str) -> None:
    written = api.run(FROZEN / f"{name}.toml", output=tmp_path / f"{name}-{backend}.nc",
                      backend=backend, workers=0, progress=False)
    with xr.open_dataset(FROZEN / f"{name}-{backend}.nc", decode_times=False) as before, \
            xr.open_dataset(written, decode_times=False) as now:
        numeric = [name for name, variable in before.variables.items()
                   if variable.dtype.kind in "iufb"]
        assert numeric, "the frozen file holds no numbers"
        for variable in numeric:
            assert variable in now.variables, f"{variable} is missing"
            old, new = before[variable].values, now[variable].values
            assert old.shape == new.shape, variable
            assert np.array_equal(old, new, equal_nan=old.dtype.kind == "f"), variable
