"""An observed measure as it would be observed (``measure_<name>_as_observed``,
:mod:`ensemble.output.as_observed`): its marginal against ``scipy.stats`` (``poisson``;
``nbinom`` with n = k, p = k / (k + mean), the mean-dispersion form of Lloyd-Smith et al.
2005, Nature 438:355-359), its bits whatever the chunks, and the coverage of its central
intervals (Bracher, Ray, Gneiting & Reich 2021, PLoS Comput. Biol. 17:e1008618: the
central (1 - alpha) interval runs from the alpha/2 to the 1 - alpha/2 quantile) against
counts drawn from the model with its noise.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from scipy import stats

from ensemble import api
from ensemble.output import brackets as brackets_module
from ensemble.output.as_observed import observed_count_quantile
from ensemble.output.finish import Finisher
from support import load_text

SCENARIO = """\
# Illustrative only: invented numbers.
[scenario]
name = "noisy"
days = 42
members = {members}
seed = {seed}

[model]
compartments = ["S", "I", "R"]
population = 100000
initial = {{ S = "rest", I = 50 }}

[[model.flows]]
name = "infection"
from = "S"
to = "I"
rate = "beta * S * I / N"

[[model.flows]]
from = "I"
to = "R"
rate = "I / 5"

[parameters]
beta = {beta}
rho = {rho}

[solver]
method = "rk4"
step = 0.5
report_every = 1

[output]
quantiles = [0.05, 0.25, 0.5, 0.75, 0.95]

[[measures]]
name = "cases"
of = "infection"
window = 7

[[observations]]
file = "cases.csv"
measure = "cases"
distribution = "{distribution}"
{dispersion}reporting = "rho"
"""

DRAWN = dict(beta='{ dist = "uniform", low = 0.3, high = 0.6 }',
             rho='{ dist = "uniform", low = 0.2, high = 0.4 }')


def _scenario(tmp_path, name="noisy", members=200, seed=5, distribution="negative-binomial",
              dispersion="dispersion = 8\n", **parameters):
    values = {**DRAWN, **parameters}
    return load_text(tmp_path, SCENARIO.format(members=members, seed=seed,
                                               distribution=distribution,
                                               dispersion=dispersion, **values), name)


def test_the_quantile_function_is_scipys():
    """scipy.stats' ppf of the same distributions, 0 for a mean of 0, NaN for NaN."""
    u = np.array([0.01, 0.3, 0.5, 0.77, 0.999])
    mean = np.array([0.4, 3.0, 50.0, 800.0, 12000.0])
    np.testing.assert_array_equal(observed_count_quantile(u, mean, "poisson"),
                                  stats.poisson.ppf(u, mean))
    k = 3.5
    np.testing.assert_array_equal(
        observed_count_quantile(u, mean, "negative-binomial", k),
        stats.nbinom.ppf(u, k, k / (k + mean)))
    np.testing.assert_array_equal(
        observed_count_quantile(np.array([0.5, 0.5]), np.array([0.0, np.nan]), "poisson"),
        [0.0, np.nan])
    # the Poisson's own search, over means from 0.01 to 10^6 and draws in the tails
    generator = np.random.default_rng(1)
    u = np.concatenate([generator.uniform(size=20000), [1e-12, 1 - 1e-12]])
    mean = np.exp(generator.uniform(np.log(0.01), np.log(1e6), u.size))
    np.testing.assert_array_equal(observed_count_quantile(u, mean, "poisson"),
                                  stats.poisson.ppf(u, mean))


@pytest.mark.parametrize("distribution, dispersion", [("poisson", ""),
                                                      ("negative-binomial",
                                                       "dispersion = 4\n")])
def test_one_members_counts_follow_the_observation_distribution(tmp_path, distribution,
                                                                 dispersion):
    """Members with the same parameters differ only by their noise, so their counts of a
    window are draws of the observation distribution with mean rho x (scipy.stats,
    chi-square goodness of fit over bins of about a tenth of the mass each)."""
    scenario = _scenario(tmp_path, members=4000, distribution=distribution,
                         dispersion=dispersion, beta="0.45", rho="0.3")
    dataset = api.simulate(scenario, backend="numpy")
    for window in (1, 3):
        latent = dataset["measure_cases"].isel(variant=0, time_7d=window).values
        assert np.ptp(latent) == 0.0                    # the same measure in every member
        mean = 0.3 * latent[0]
        law = (stats.poisson(mean) if distribution == "poisson"
               else stats.nbinom(4.0, 4.0 / (4.0 + mean)))
        counts = dataset["measure_cases_as_observed"].isel(variant=0, time_7d=window).values
        edges = np.unique(law.ppf(np.linspace(0.1, 0.9, 9)))
        inner = np.searchsorted(edges, counts, side="left")     # bin b: edges[b-1] < y <= edges[b]
        observed = np.bincount(inner, minlength=edges.size + 1)
        cdf = law.cdf(edges)
        expected = counts.size * np.diff(np.concatenate(([0.0], cdf, [1.0])))
        assert stats.chisquare(observed, expected).pvalue > 1e-3
        # and the draws differ between windows (not one draw per member)
    noise = dataset["measure_cases_as_observed"].isel(variant=0).values
    assert np.corrcoef(noise[:, 1], noise[:, 3])[0, 1] < 0.1


def test_the_series_has_the_same_bits_whatever_the_chunks(tmp_path):
    """Chunks of 7 and of every member, and the in-memory ensemble, give the same counts
    (each member's draws depend on its index alone; common practice, no source)."""
    scenario = _scenario(tmp_path, members=60)
    values = []
    for chunk in (7, 60):
        path = api.run(scenario, output=tmp_path / f"chunk{chunk}.nc", workers=0,
                       progress=False, backend="numpy", chunk=chunk)
        with xr.open_dataset(path, decode_times=False) as dataset:
            values.append((dataset["measure_cases_as_observed"].values,
                           dataset["measure_cases_as_observed_quantile"].values))
    memory = api.simulate(scenario, backend="numpy")
    values.append((memory["measure_cases_as_observed"].values,
                   memory["measure_cases_as_observed_quantile"].values))
    for members, bands in values[1:]:
        np.testing.assert_array_equal(members, values[0][0])
        np.testing.assert_array_equal(bands, values[0][1])
    # the counts are whole and scatter around reporting x measure
    counts = values[0][0]
    assert np.all(counts == np.round(counts)) and not np.array_equal(
        counts, np.round(memory["measure_cases"].values * memory["param_rho"].values[
            ..., np.newaxis]))


def test_central_intervals_cover_counts_drawn_from_the_model_at_their_level(tmp_path):
    """Counts drawn from the model with its noise (the members of a second ensemble,
    another seed) fall inside the 50 % and 90 % central intervals of the predictive
    bands at about those rates (Bracher et al. 2021 for the intervals); bounds: the
    binomial 99.9 % interval of 400 draws (scipy.stats.binom), which also holds the
    Monte Carlo error of quantiles of 4,000 members (common practice, no source)."""
    bands = api.simulate(_scenario(tmp_path, "bands", members=4000, seed=11),
                         backend="numpy")["measure_cases_as_observed_quantile"]
    truths = api.simulate(_scenario(tmp_path, "truths", members=400, seed=12),
                          backend="numpy")["measure_cases_as_observed"]
    levels = list(bands["quantile"].values)
    for window in (1, 2, 4):
        counts = truths.isel(variant=0, time_7d=window).values
        quantile = bands.isel(variant=0, time_7d=window).values
        for nominal, (low, high) in ((0.5, (0.25, 0.75)), (0.9, (0.05, 0.95))):
            lower, upper = quantile[levels.index(low)], quantile[levels.index(high)]
            inside = int(np.sum((counts >= lower) & (counts <= upper)))
            least, most = stats.binom.interval(0.999, counts.size, nominal)
            assert least <= inside <= most, (window, nominal, inside)


def test_score_judges_counts_by_the_predictive_band(tmp_path):
    """``ensemble score`` of a measure the scenario observes reads the quantiles of the
    counts as observed: its medians are theirs (those of the measure itself differ)."""
    scenario = _scenario(tmp_path, members=60)
    path = api.run(scenario, output=tmp_path / "run.nc", workers=0, progress=False,
                   backend="numpy")
    later = tmp_path / "later.csv"
    later.write_text("date,value\n14,300\n21,900\n")
    text = api.score(path, later)
    assert "measure cases as observed (observation noise included)" in text
    with xr.open_dataset(path, decode_times=False) as dataset:
        medians = [dataset[f"measure_cases{suffix}_quantile"].sel(quantile=0.5).isel(
            variant=0, time_7d=[1, 2]).values for suffix in ("_as_observed", "")]
    rows = text.split("variant baseline\n")[1].splitlines()[1:3]
    shown = np.array([float(row.split()[2]) for row in rows])
    np.testing.assert_allclose(shown, np.round(medians[0], 1))
    assert not np.allclose(shown, np.round(medians[1], 1))


def test_bands_past_the_pilot_are_those_of_every_member(tmp_path, monkeypatch):
    """Without kept members, chunks past the pilot (lowered to 6 members) keep only the
    candidates of the series as observed for its quantiles: its bands equal
    ``numpy.quantile`` (Hyndman and Fan 1996, definition 7) over every member of the
    same scenario run with its members kept, bit for bit."""
    monkeypatch.setattr(brackets_module, "PILOT_MEMBER_COUNT", 6)
    monkeypatch.setattr(brackets_module, "REFINE_PILOTS", 2)
    selected = []
    select = Finisher._selected_quantiles

    def recording(self, variable, *arguments):
        selected.append(variable.name)
        return select(self, variable, *arguments)

    monkeypatch.setattr(Finisher, "_selected_quantiles", recording)
    bands = {}
    for keep in (True, False):
        directory = tmp_path / f"kept-{keep}"
        directory.mkdir()
        scenario = _scenario(directory, members=40)
        if not keep:
            text = (directory / "noisy.toml").read_text().replace(
                "[output]\n", "[output]\nkeep_members = false\n")
            scenario = load_text(directory, text, "noisy")
        path = api.run(scenario, output=directory / "noisy.nc", workers=0, progress=False,
                       backend="numpy", chunk=5)
        with xr.open_dataset(path, decode_times=False) as dataset:
            bands[keep] = dataset["measure_cases_as_observed_quantile"].values
            if keep:
                members = dataset["measure_cases_as_observed"].values
                levels = dataset["quantile"].values
    assert "measure_cases_as_observed" in selected
    expected = np.moveaxis(np.quantile(members, levels, axis=1), 0, 1)
    np.testing.assert_array_equal(bands[True], expected)
    np.testing.assert_array_equal(bands[False], expected)
