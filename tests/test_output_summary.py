"""Per-member metrics and quantiles over members, as the result file holds them.

References: quantiles are checked against ``numpy.quantile`` (its default "linear"
method is definition 7 of Hyndman and Fan 1996, "Sample quantiles in statistical
packages", The American Statistician 50(4)); peaks, peak times and totals against values
worked out by hand for the made-up trajectories of ``support.made_up_members``.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from ensemble.run.journal import WorkJournal
from ensemble.output.metrics import member_metrics
from ensemble.output.quantiles import quantiles
from support import fill, grouped_scenario, layout_of


@pytest.fixture(scope="module")
def result(tmp_path_factory):
    """A finished file of made-up members (9 per variant, chunks of 4), opened raw (times
    as float days) together with its layout."""
    directory = tmp_path_factory.mktemp("summary")
    layout = layout_of(grouped_scenario(directory, members=9))
    journal = WorkJournal.open(directory / "result.nc", layout, resume=False, force=False)
    fill(journal, layout, chunk=4)
    path = journal.finish()
    with xr.open_dataset(path, decode_times=False) as dataset:
        yield dataset.load(), layout


def _included(status: np.ndarray) -> np.ndarray:
    """Members behind the quantiles, by the project's reference (result file): those
    without any status bit."""
    return status == 0


def test_peak_time_is_the_first_time_of_the_maximum():
    """Hand-worked: the maximum 3 is reached at t = 1 and t = 2; the first counts.  A
    trajectory with a NaN has neither peak nor peak time."""
    times = np.array([0.0, 1.0, 2.0, 3.0])
    state = np.array([[[1.0, 3.0, 3.0, 2.0], [1.0, np.nan, 0.0, 0.0]]])
    flow = np.array([[[np.nan, 2.0, 5.0, 5.0]]])
    metrics = member_metrics({"state": state, "flow_count": flow}, times)
    np.testing.assert_array_equal(metrics["peak_value"], [[3.0, np.nan]])
    np.testing.assert_array_equal(metrics["peak_time"], [[1.0, np.nan]])
    np.testing.assert_array_equal(metrics["flow_peak_value"], [[5.0]])
    np.testing.assert_array_equal(metrics["flow_peak_time"], [[2.0]])
    np.testing.assert_array_equal(metrics["total_flow"], [[12.0]])


def test_peaks_and_totals_of_made_up_members(result):
    """Hand-worked from the construction: the apex of member m, state row r, variant v
    is 100 + 10 m + r + v at report (m + r) mod n_reports (repeated at the last report,
    which must not count); every flow interval carries m + 1 + row / 10, so the first
    interval holds the peak and the total is that times n_reports - 1."""
    dataset, layout = result
    times = layout.times
    n_groups = layout.n_groups
    for v in range(len(layout.variants)):
        for m in range(layout.member_count):
            for row in range(layout.n_states):
                c, g = divmod(row, n_groups)
                assert dataset.peak_value.values[v, m, c, g] == 100 + 10 * m + row + v
                assert dataset.peak_time.values[v, m, c, g] == times[(m + row) % len(times)]
            for row in range(layout.n_flow_elements):
                f, g = divmod(row, n_groups)
                per_interval = m + 1 + row / 10
                assert dataset.flow_peak_value.values[v, m, f, g] == per_interval
                assert dataset.flow_peak_time.values[v, m, f, g] == times[1]
                assert dataset.total_flow.values[v, m, f, g] == pytest.approx(
                    per_interval * (len(times) - 1), rel=1e-15)


def test_flow_count_is_nan_first_and_sums_to_total_flow(result):
    """The project's reference (result file): flow_count covers (time - report_every,
    time], so nothing at the first time; over the horizon it adds up to total_flow."""
    dataset, _ = result
    assert np.isnan(dataset.flow_count.isel(time=0)).all()
    assert not np.isnan(dataset.flow_count.isel(time=slice(1, None))).any()
    np.testing.assert_allclose(dataset.flow_count.sum("time"), dataset.total_flow,
                               rtol=1e-14)


def test_trajectory_quantiles_equal_numpy_on_included_members(result):
    """state_quantile and flow_count_quantile: numpy.quantile over the members without
    any status bit (members 1, 2 and 3 here carry the non-finite, impossible-start and
    step-check bits), and the members left out counted by bit."""
    dataset, layout = result
    probabilities = dataset["quantile"].values
    for v in range(len(layout.variants)):
        keep = _included(dataset.status.values[v])
        assert keep.sum() == layout.member_count - 3 and not keep[1:4].any()
        for name in ("state", "flow_count"):
            expected = np.quantile(dataset[name].values[v][keep], probabilities, axis=0)
            np.testing.assert_array_equal(dataset[f"{name}_quantile"].values[v], expected)
    np.testing.assert_array_equal(dataset.members_in_summary, [layout.member_count - 3] * 2)
    # status_bit order: step_check_failed, state_below_minus_atol, non_finite_value,
    # impossible_drawn_start, newton_not_converged
    np.testing.assert_array_equal(dataset.members_left_out, [[1, 0, 1, 1, 0]] * 2)


@pytest.mark.parametrize("metric", ["peak_value", "peak_time", "flow_peak_value",
                                    "flow_peak_time", "total_flow"])
def test_metric_and_difference_quantiles_equal_numpy(result, metric):
    """<metric>_quantile over included members, and difference_quantile_<metric>: the
    quantiles of each member's metric minus the same member's in ``compare_to``."""
    dataset, layout = result
    probabilities = dataset["quantile"].values
    values = dataset[metric].values
    base = layout.variants.index(layout.scenario.output.compare_to)
    for v in range(len(layout.variants)):
        keep = _included(dataset.status.values[v])
        np.testing.assert_array_equal(dataset[f"{metric}_quantile"].values[v],
                                      np.quantile(values[v][keep], probabilities, axis=0))
        both = keep & _included(dataset.status.values[base])
        difference = values[v][both] - values[base][both]
        np.testing.assert_array_equal(dataset[f"difference_quantile_{metric}"].values[v],
                                      np.quantile(difference, probabilities, axis=0))
    # the made-up apex is one person higher in variant 1: a test that can fail
    if metric == "peak_value":
        assert (dataset["difference_quantile_peak_value"].values[1] == 1.0).all()


def test_quantiles_of_nobody_are_nan():
    """With every member excluded there is nothing to summarise: NaN, not an error."""
    empty = quantiles(np.empty((0, 3, 4)), [0.1, 0.9], axis=0)
    assert empty.shape == (2, 3, 4) and np.isnan(empty).all()


@pytest.mark.parametrize("count", [1, 2, 3, 10, 257, 4096])
def test_quantiles_have_numpys_bits(count):
    """Reference: ``numpy.quantile`` (default "linear", Hyndman and Fan 1996 definition 7),
    bit for bit, on every axis, for probabilities at 0, 1, between and exactly on order
    statistics, values spread over nine decades, and a NaN (which makes its column NaN)."""
    rng = np.random.default_rng(count)
    probabilities = [0.0, 0.025, 0.1, 0.25, 1 / 3, 0.5, 0.75, 0.975, 1.0]
    values = rng.lognormal(size=(4, count, 3)) * 10.0 ** rng.integers(-3, 6, size=(4, 1, 3))
    values[1, count // 2, 2] = np.nan
    for axis in range(3):
        expected = np.quantile(values, probabilities, axis=axis)
        for overwrite in (False, True):
            got = quantiles(values.copy(), probabilities, axis=axis, overwrite_input=overwrite)
            np.testing.assert_array_equal(got, expected)
