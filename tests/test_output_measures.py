"""The scenario's measures in the result file: quantile bands, per-member metrics,
windows with their bounds, censored peaks and differences between variants, each checked
against a computation by hand from every member's kept trajectories.

References: quantiles against ``numpy.quantile`` (its default "linear" method is
definition 7 of Hyndman and Fan 1996, "Sample quantiles in statistical packages", The
American Statistician 50(4)); window bounds and ``cell_methods`` as CF conventions 1.10
define them (Eaton et al. 2022, sec. 7.1 and 7.3); every other expectation is the
definition in the project's reference (``ensemble/scenario/reference.md``,
``[[measures]]`` and result file), computed here independently with xarray.
"""

from __future__ import annotations

import netCDF4
import numpy as np
import pytest
import xarray as xr

from ensemble import api
from ensemble.errors import ScenarioError
from ensemble.output import brackets as brackets_module
from ensemble.output.finish import Finisher
from support import GROUPED_TOML, load_text

MEASURES = """
[[measures]]
name = "infected"
of = "I"
threshold = 40
units = "1"

[[measures]]
name = "young_ever"
of = "I + R"
groups = ["young"]

[[measures]]
name = "infections"
of = "infection"
window = 5
groups = "each"
threshold = 30
"""


def _scenario_text(members: int, keep_members: bool) -> str:
    text = GROUPED_TOML.format(start="start = 2027-02-01", members=members,
                               keep_members=str(keep_members).lower(), compression=1)
    text = text.replace('[[variants]]\nname = "usual"',
                        '[[variants]]\nname = "usual"\ntitle = "Contacts as usual"')
    text += '\n[[variants]]\nname = "half-contacts"\n' \
            'matrices = { contacts = [[1.5, 0.5], [0.5, 1.0]] }\n'
    return text.replace('compare_to = "usual"',
                        'compare_to = "usual"\npairs = [["half-contacts", "fewer-contacts"]]'
                        ) + MEASURES


def _run(directory, keep_members: bool):
    scenario = directory / "measured.toml"
    scenario.write_text(_scenario_text(24, keep_members), encoding="utf-8")
    path = api.run(scenario, output=directory / "measured.nc", workers=0, progress=False,
                   backend="numpy", chunk=7)
    return path


@pytest.fixture(scope="module")
def kept(tmp_path_factory):
    path = _run(tmp_path_factory.mktemp("kept"), keep_members=True)
    with xr.open_dataset(path, decode_times=False) as dataset:
        yield dataset.load(), path


@pytest.fixture(scope="module")
def not_kept(tmp_path_factory):
    path = _run(tmp_path_factory.mktemp("not-kept"), keep_members=False)
    with xr.open_dataset(path, decode_times=False) as dataset:
        yield dataset.load()


def _included(dataset: xr.Dataset) -> np.ndarray:
    """(variant, member) the members behind the quantiles: as many per variant as
    ``members_in_summary`` says, and here every member (no bit is set)."""
    status = dataset["status"].values
    assert (status == 0).all(), "the invented scenario flags no member"
    return status == 0


def _by_hand(dataset: xr.Dataset) -> dict[str, xr.DataArray]:
    """Each measure's (variant, member, [group], time) values from the kept
    trajectories, as the reference defines them."""
    state, flow = dataset["state"], dataset["flow_count"]
    infections = flow.isel(flow=0)
    # windows of 5 days from the start: days (0, 5] and (5, 10]; the last 2 days are cut
    windows = xr.concat([infections.isel(time=slice(1 + 5 * k, 6 + 5 * k)).sum("time")
                         for k in range(2)], dim="window")
    return {"infected": state.isel(compartment=1).sum("group"),
            "young_ever": (state.isel(compartment=1) + state.isel(compartment=2)
                           ).isel(group=0),
            "infections": windows.transpose("variant", "member", "group", "window")}


def test_bands_are_the_quantiles_of_the_kept_members(kept):
    dataset, _ = kept
    probabilities = dataset["quantile"].values
    for name, values in _by_hand(dataset).items():
        expected = np.quantile(values.values, probabilities, axis=1)   # numpy definition 7
        expected = np.moveaxis(expected, 0, 1)
        np.testing.assert_allclose(dataset[f"measure_{name}_quantile"].values, expected,
                                   rtol=1e-12, atol=1e-9, err_msg=name)
        np.testing.assert_allclose(dataset[f"measure_{name}"].values, values.values,
                                   rtol=1e-12, atol=1e-9, err_msg=name)


def test_windows_carry_cf_bounds_and_sum_their_days(kept):
    dataset, path = kept
    np.testing.assert_array_equal(dataset["time_5d"].values, [5.0, 10.0])
    np.testing.assert_array_equal(dataset["time_5d_bounds"].values, [[0, 5], [5, 10]])
    with netCDF4.Dataset(path) as nc:
        assert nc["time_5d"].bounds == "time_5d_bounds"
        assert nc["time_5d"].units == nc["time"].units
        assert nc["measure_infections"].cell_methods == "time_5d: sum"
        assert nc["measure_infections_quantile"].dimensions == (
            "variant", "quantile", "group", "time_5d")
        assert nc["measure_infected"].units == "1"


def test_metrics_of_each_member(kept):
    dataset, _ = kept
    by_hand = _by_hand(dataset)
    infected = by_hand["infected"].values
    np.testing.assert_allclose(dataset["measure_infected_peak_value"], infected.max(-1))
    times = dataset["time"].values
    np.testing.assert_array_equal(dataset["measure_infected_peak_time"],
                                  times[infected.argmax(-1)])
    # days above 40 persons: one report interval (1 day) per reported time above it
    np.testing.assert_array_equal(dataset["measure_infected_days_above"],
                                  (infected > 40).sum(-1))
    windows = by_hand["infections"].values
    np.testing.assert_allclose(dataset["measure_infections_peak_value"], windows.max(-1))
    np.testing.assert_array_equal(dataset["measure_infections_peak_time"],
                                  np.array([5.0, 10.0])[windows.argmax(-1)])
    np.testing.assert_array_equal(dataset["measure_infections_days_above"],
                                  5 * (windows > 30).sum(-1))
    # the total counts every interval of the horizon, the days the windows cut included
    total = dataset["flow_count"].isel(flow=0, time=slice(1, None)).sum("time").values
    np.testing.assert_allclose(dataset["measure_infections_total"], total, rtol=1e-12)
    probabilities = dataset["quantile"].values
    np.testing.assert_allclose(dataset["measure_infections_total_quantile"],
                               np.moveaxis(np.quantile(total, probabilities, axis=1), 0, 1),
                               rtol=1e-12)


def test_censored_peaks_and_their_share(kept):
    dataset, _ = kept
    for name, values in _by_hand(dataset).items():
        index = values.values.argmax(-1)
        censored = (index == 0) | (index == values.shape[-1] - 1)
        np.testing.assert_array_equal(dataset[f"measure_{name}_peak_censored"], censored)
        share = censored.mean(axis=1)
        np.testing.assert_allclose(dataset[f"measure_{name}_censored_share"], share)
    # the young's infected-or-recovered only rises: its peak is the last day, always
    assert (dataset["measure_young_ever_censored_share"] == 1).all()


def test_differences_between_pairs_of_variants(kept):
    dataset, _ = kept
    assert list(dataset["pair_name"].values) == [
        "fewer-contacts minus usual", "half-contacts minus usual",
        "half-contacts minus fewer-contacts"]
    peaks = dataset["measure_infected_peak_value"].values
    expected = np.stack([peaks[1] - peaks[0], peaks[2] - peaks[0], peaks[2] - peaks[1]])
    np.testing.assert_allclose(dataset["measure_infected_peak_value_difference"], expected)
    np.testing.assert_allclose(
        dataset["measure_infected_peak_value_difference_quantile"],
        np.moveaxis(np.quantile(expected, dataset["quantile"].values, axis=1), 0, 1))
    assert list(dataset["variant_title"].values) == [
        "Contacts as usual", "fewer-contacts", "half-contacts"]


def test_without_kept_members_the_summaries_are_the_same_bits(kept, not_kept):
    dataset, _ = kept
    assert "measure_infected" not in not_kept and "state" not in not_kept
    summaries = [name for name in not_kept.data_vars if name.startswith("measure_")]
    assert len(summaries) > 20
    for name in summaries:
        np.testing.assert_array_equal(not_kept[name].values, dataset[name].values,
                                      err_msg=name)


def test_bands_past_the_pilot_are_those_of_every_member(tmp_path, monkeypatch):
    """Without kept members, the chunks past a variant's pilot keep only each measure's
    candidates for the quantiles (the pilot lowered to 6 members, refined brackets from
    12): the bands equal ``numpy.quantile`` (Hyndman and Fan 1996, definition 7) over
    every member of the same scenario run with its members kept, bit for bit."""
    monkeypatch.setattr(brackets_module, "PILOT_MEMBER_COUNT", 6)
    monkeypatch.setattr(brackets_module, "REFINE_PILOTS", 2)
    selected = []
    select = Finisher._selected_quantiles

    def recording(self, variable, *arguments):
        selected.append(variable.name)
        return select(self, variable, *arguments)

    monkeypatch.setattr(Finisher, "_selected_quantiles", recording)
    paths = {}
    for keep in (True, False):
        directory = tmp_path / f"kept-{keep}"
        directory.mkdir()
        scenario = directory / "measured.toml"
        scenario.write_text(_scenario_text(40, keep), encoding="utf-8")
        paths[keep] = api.run(scenario, output=directory / "measured.nc", workers=0,
                              progress=False, backend="numpy", chunk=5)
    # every measure of every variant went through the candidates, none with kept members
    assert sorted(set(selected)) == ["flow_count", "measure_infected",
                                     "measure_infections", "measure_young_ever", "state"]
    assert selected.count("measure_infected") == 3
    with xr.open_dataset(paths[True], decode_times=False) as kept, \
            xr.open_dataset(paths[False], decode_times=False) as cut:
        assert "measure_infected" not in cut
        included = _included(kept)
        assert included.all() and kept.sizes["member"] == 40
        for name in ("infected", "young_ever", "infections"):
            values = kept[f"measure_{name}"].values
            expected = np.moveaxis(np.quantile(values, kept["quantile"].values, axis=1),
                                   0, 1)
            np.testing.assert_array_equal(cut[f"measure_{name}_quantile"].values, expected,
                                          err_msg=name)


@pytest.mark.parametrize("measure, key, message", [
    ('name = "m"\nof = "X + I"', "measures[0].of", "is not a compartment or a flow"),
    ('name = "m"\nof = "sum(I)"', "measures[0].of", "cannot call sum()"),
    ('name = "m"\nof = "I"\nwindow = 2', "measures[0].window", "only a flow's measure"),
    ('name = "m"\nof = "infection"\nwindow = 1.5', "measures[0].window",
     "whole number of report intervals"),
    ('name = "m"\nof = "infection"\nwindow = 13', "measures[0].window", "longer than"),
    ('name = "m"\nof = "I"\ngroups = ["middle"]', "measures[0].groups[0]",
     "unknown group"),
    ('name = "m"\nof = "I"\ngroups = "every"', "measures[0].groups", '"sum", "each"'),
])
def test_bad_measures_are_refused_naming_the_key(tmp_path, measure, key, message):
    text = GROUPED_TOML.format(start="", members=4, keep_members="true", compression=1)
    with pytest.raises(ScenarioError) as raised:
        load_text(tmp_path, text + f"\n[[measures]]\n{measure}\n")
    assert raised.value.key == key and message in str(raised.value)


def test_a_pair_must_name_two_different_variants(tmp_path):
    text = GROUPED_TOML.format(start="", members=4, keep_members="true", compression=1)
    text = text.replace('compare_to = "usual"', 'pairs = [["usual", "usual"]]')
    with pytest.raises(ScenarioError) as raised:
        load_text(tmp_path, text)
    assert raised.value.key == "output.pairs[0]"
