"""Flagged members are left out of the quantiles, and the file and the summary say how
many members the bands rest on and why the others were left out (the policy of the
project's reference, ``ensemble/scenario/reference.md``, result file: "The quantiles rest
on the members without any status bit").

The scenario is the illustrative SEIR town of ``support.write_scenario`` (invented
numbers) with a badly chosen step: Heun's method at half a day fails the step check for
some members and passes it for others.  The quantiles are compared with numpy.quantile's
default (linear, Hyndman & Fan 1996 definition 7) over the unflagged members, computed
here from the file's own per-member values.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from ensemble import api
from ensemble.records import STATUS_FLAGS, STEP_CHECK_FAILED
from support import write_scenario


@pytest.fixture(scope="module")
def badly_stepped(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The result file of the town run with Heun's method at a step of half a day."""
    directory = tmp_path_factory.mktemp("flagged")
    scenario = write_scenario(directory, members=40, days=60, method="heun", step=0.5)
    return api.run(scenario, output=directory / "result.nc", workers=0, backend="numpy",
                   progress=False)


def test_bands_rest_on_the_unflagged_members(badly_stepped: Path) -> None:
    with xr.open_dataset(badly_stepped, decode_times=False) as result:
        status = result["status"].values
        flagged = status != 0
        assert flagged.any() and (~flagged).any(axis=1).all(), \
            "the step must flag some members of each variant and not all"
        probabilities = result["quantile"].values
        for v in range(result.sizes["variant"]):
            kept = ~flagged[v]
            np.testing.assert_array_equal(
                result["peak_value_quantile"].values[v],
                np.quantile(result["peak_value"].values[v][kept], probabilities, axis=0))
            np.testing.assert_array_equal(
                result["state_quantile"].values[v],
                np.quantile(result["state"].values[v][kept], probabilities, axis=0))
            assert int(result["members_in_summary"].values[v]) == kept.sum()


def test_the_file_counts_the_members_left_out_by_bit(badly_stepped: Path) -> None:
    with xr.open_dataset(badly_stepped, decode_times=False) as result:
        status = result["status"].values
        words = [str(word) for word in result["status_bit_name"].values]
        assert words == [word for _, word in STATUS_FLAGS]
        assert words == result["status"].attrs["flag_meanings"].split()
        expected = np.stack([np.count_nonzero(status & bit, axis=1)
                             for bit, _ in STATUS_FLAGS], axis=1)
        np.testing.assert_array_equal(result["members_left_out"].values, expected)
        assert result["members_left_out"].dims == ("variant", "status_bit")


def test_summary_says_why_members_were_left_out(badly_stepped: Path) -> None:
    text = api.summarize(badly_stepped)
    with xr.open_dataset(badly_stepped, decode_times=False) as result:
        for v, name in enumerate(result["variant_name"].values):
            failed = int(np.count_nonzero(result["status"].values[v] & STEP_CHECK_FAILED))
            behind = int(result["members_in_summary"].values[v])
            assert (f"variant {name} ({behind} members in the quantiles; left out, by "
                    f"status bit: step_check_failed {failed})") in text
