"""A fit's result presented: ``ensemble plot`` draws the counts the fit saw (and counts
given with ``--observed``) as points on the observed measure's fan chart, at the end of
each count's window, on every variant's panel; ``ensemble summary`` prints the prior and
posterior quantiles of every drawn parameter.

The expected points are read from the counts written by the test itself; the prior
quantiles come from scipy.stats and the posterior ones from numpy.quantile over the
members stored in the file.
"""

from __future__ import annotations

import datetime

import matplotlib.pyplot as plt
import numpy as np
import pytest
from scipy import stats

from ensemble import api
from ensemble.present.plot import band_quantiles, fan_chart, fitted_observations
from support import run_cli
from test_fit_run import COUNTS, SCENARIO

LATER = "date,value\n2027-03-29,300\n2027-04-05,250\n"
"""Invented counts after those the fit saw (weeks ending days 28 and 35)."""


def _rows(text: str) -> tuple[np.ndarray, np.ndarray]:
    """(dates as datetime64[ns], values) of a counts text date,value."""
    rows = [line.split(",") for line in text.splitlines()[1:]]
    return (np.array([datetime.date.fromisoformat(d) for d, _ in rows], dtype="datetime64[ns]"),
            np.array([float(v) for _, v in rows]))


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    directory = tmp_path_factory.mktemp("fit-present")
    (directory / "cases.csv").write_text(COUNTS)
    (directory / "later.csv").write_text(LATER)
    (directory / "fitted.toml").write_text(SCENARIO)
    api.fit(directory / "fitted.toml", output=directory / "fitted.nc", particles=60,
            backend="numpy")
    return directory


def _points(figure, gid: str):
    found = [line for axis in figure.axes for line in axis.get_lines()
             if line.get_gid() == gid]
    assert len(found) == 1, gid
    return found[0].get_xdata(), found[0].get_ydata()


def test_the_fan_chart_draws_the_counts_the_fit_saw_on_every_panel(fitted):
    dates, values = _rows(COUNTS)
    with api.open_result(fitted / "fitted.nc") as dataset:
        observed = fitted_observations(dataset)
        assert list(observed) == ["cases"]
        figure = fan_chart(dataset, "cases", band_quantiles(dataset, (50, 90)),
                           observed["cases"])
        windows = dataset["time_7d"].values
        bounds = dataset["time_7d_bounds"].values
        median = dataset["measure_cases_quantile"].sel(quantile=0.5).values
        lines = [line for line in figure.axes[0].get_lines() if line.get_label() == "median"]
    try:
        # each count is the count of a window of the measure (its date the window's end:
        # 7, 14 and 21 days), drawn in the middle of that window
        assert set(dates) <= set(windows)
        middles = dates - np.timedelta64(84, "h")
        for panel in ("0-0", "0-1"):        # both variants' panels
            x, y = _points(figure, f"observed-fitted-{panel}")
            np.testing.assert_array_equal(np.asarray(x, dtype="datetime64[ns]"), middles)
            np.testing.assert_array_equal(y, values)
        # the median's step over a window spans it, from its start to its end, so the
        # point lies on the step of the value it is compared with
        x = np.asarray(lines[0].get_xdata(), dtype="datetime64[ns]")
        np.testing.assert_array_equal(x, np.append(bounds[:, 0], bounds[-1, 1]))
        assert lines[0].get_drawstyle() == "steps-post"
        for middle in middles:
            window = np.searchsorted(x, middle) - 1
            assert bounds[window, 0] < middle < bounds[window, 1]
            assert lines[0].get_ydata()[window] == median[0, window]
    finally:
        plt.close(figure)


def test_plot_draws_later_counts_and_names_them_in_the_svg(fitted, tmp_path):
    written = api.plot(fitted / "fitted.nc", tmp_path, observed=fitted / "later.csv")
    svg = (tmp_path / "cases-fan.svg").read_text()
    assert tmp_path / "cases-fan.svg" in written
    for kind in ("fitted", "later"):
        for panel in ("0-0", "0-1"):
            assert f'id="observed-{kind}-{panel}"' in svg
    assert 'id="observed-later' not in (tmp_path / "cases-peaks.svg").read_text()


def test_later_counts_are_placed_at_their_dates(fitted):
    from ensemble.present.plot import LaterCounts, later_observations

    dates, values = _rows(LATER)
    counts = LaterCounts("later.csv", tuple(d.astype("datetime64[D]").item() for d in dates),
                         values, (2, 3))
    with api.open_result(fitted / "fitted.nc") as dataset:
        name, points = later_observations(dataset, counts, ())
    assert name == "cases"
    np.testing.assert_array_equal(points.times, dates)
    np.testing.assert_array_equal(points.values, values)


def test_later_counts_off_the_windows_are_refused_naming_the_line(fitted, tmp_path):
    (tmp_path / "off.csv").write_text("date,value\n2027-03-29,300\n2027-03-30,250\n")
    done = run_cli("plot", str(fitted / "fitted.nc"), "-o", str(tmp_path / "figures"),
                   "--observed", str(tmp_path / "off.csv"), cwd=tmp_path)
    assert done.returncode == 2
    assert "off.csv: line 3" in done.stderr and "2027-03-30" in done.stderr
    assert not (tmp_path / "figures").exists()


def test_summary_of_a_fit_gives_prior_and_posterior_quantiles(fitted):
    text = api.summarize(fitted / "fitted.nc")
    lines = text.splitlines()
    heading = next(i for i, line in enumerate(lines) if line.startswith("parameters fitted"))
    cells = next(line for line in lines[heading:] if line.split()[:1] == ["beta"]).split()
    # the prior uniform(0.2, 0.8)'s quantiles (scipy.stats.uniform.ppf), then the
    # members' (numpy.quantile, Hyndman & Fan 1996 definition 7)
    prior = stats.uniform.ppf([0.05, 0.5, 0.95], loc=0.2, scale=0.6)
    with api.open_result(fitted / "fitted.nc") as dataset:
        members = dataset["param_beta"].isel(variant=0).values
    posterior = np.quantile(members, [0.05, 0.5, 0.95])
    np.testing.assert_allclose([float(c) for c in cells[1:]], [*prior, *posterior],
                               rtol=5e-4)
    assert lines[-1].startswith("Model projections")      # the caution stays last
    # with --only the table is left out, as every row not asked for
    assert "parameters fitted" not in api.summarize(fitted / "fitted.nc", only=["cases"])


def test_threads_and_a_resumed_projection_give_the_same_file(fitted, tmp_path,
                                                              monkeypatch):
    import xarray as xr

    import ensemble.run.executors as executors

    arguments = dict(particles=60, backend="numpy", chunk=20)
    threaded = api.fit(fitted / "fitted.toml", output=tmp_path / "threaded.nc", workers=2,
                       **arguments)
    projected = executors.compute_chunk
    calls: list[tuple[int, int, int]] = []

    def stopping_after_two(scenario, model, key, *rest):
        if len(calls) == 2 and not resumed:
            raise KeyboardInterrupt     # stands for a kill while the projection runs
        calls.append(key)
        return projected(scenario, model, key, *rest)

    monkeypatch.setattr(executors, "compute_chunk", stopping_after_two)
    resumed = False
    target = tmp_path / "resumed.nc"
    with pytest.raises(KeyboardInterrupt):
        api.fit(fitted / "fitted.toml", output=target, workers=0, **arguments)
    assert not target.exists()
    saved, calls[:] = list(calls), []
    resumed = True
    api.fit(fitted / "fitted.toml", output=target, resume=True, workers=0, **arguments)
    # two variants of three chunks each: the two saved before the stop are not redone
    assert len(saved) == 2 and set(saved).isdisjoint(calls[:4]) and len(calls) >= 4
    assert not (tmp_path / "resumed.nc.fit-partial").exists()
    with xr.open_dataset(fitted / "fitted.nc", decode_times=False) as whole, \
            xr.open_dataset(threaded, decode_times=False) as by_threads, \
            xr.open_dataset(target, decode_times=False) as again:
        for name in whole.variables:
            for other in (by_threads, again):
                np.testing.assert_array_equal(other[name].values, whole[name].values,
                                              err_msg=name)
