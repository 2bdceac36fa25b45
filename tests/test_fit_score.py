"""The weighted interval score and interval coverage (Bracher, Ray, Gneiting & Reich 2021,
"Evaluating epidemic forecasts in an interval format", PLoS Comput. Biol. 17:e1008618),
and ``ensemble score`` on a real result file.

The worked examples are computed by hand from the paper's equations 1 (interval score)
and 2 (weighted interval score with w_0 = 1/2 and w_k = alpha_k / 2); the arithmetic is
written out beside each expected value.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from ensemble import api
from ensemble.about import CAUTION
from ensemble.errors import UsageError
from ensemble.fit.score import central_intervals, interval_coverage, weighted_interval_score
from support import load_text, run_cli

LEVELS = np.array([0.05, 0.25, 0.5, 0.75, 0.95])
QUANTILES = np.array([2.0, 5.0, 8.0, 12.0, 20.0])
"""A small worked example: median 8, 50% interval [5, 12], 90% interval [2, 20]."""


@pytest.mark.parametrize("observed, expected", [
    # above every quantile, y = 22 (Bracher et al. 2021, eq. 1 and 2, by hand):
    #   median term 0.5 * |22 - 8| = 7
    #   alpha 0.1: IS = (20 - 2) + (2 / 0.1) * (22 - 20) = 58, weighted 0.05 * 58 = 2.9
    #   alpha 0.5: IS = (12 - 5) + (2 / 0.5) * (22 - 12) = 47, weighted 0.25 * 47 = 11.75
    #   WIS = (7 + 2.9 + 11.75) / (2 + 0.5) = 8.66
    (22.0, 8.66),
    # inside both intervals, y = 6: (0.5 * 2 + 0.05 * 18 + 0.25 * 7) / 2.5 = 1.46
    (6.0, 1.46),
    # below every quantile, y = 1:
    #   0.5 * 7 = 3.5; 0.05 * (18 + 20 * 1) = 1.9; 0.25 * (7 + 4 * 4) = 5.75
    #   WIS = 11.15 / 2.5 = 4.46
    (1.0, 4.46),
    # between the 90% and 50% ends, y = 3: 0.5 * 5 = 2.5; 0.05 * 18 = 0.9;
    #   0.25 * (7 + 4 * 2) = 3.75; WIS = 7.15 / 2.5 = 2.86
    (3.0, 2.86),
])
def test_weighted_interval_score_equals_the_hand_computation(observed, expected):
    assert weighted_interval_score(QUANTILES, LEVELS, observed) == pytest.approx(
        expected, rel=1e-12)


def test_a_point_projection_scores_its_absolute_error():
    # Bracher et al. 2021, eq. 1 and 2, by hand: when every quantile is the point m,
    # each interval's width is 0 and (alpha / 2) IS_alpha = |y - m|, so
    # WIS = (0.5 |y - m| + |y - m|) / (1 + 0.5) = |y - m|; here |10 - 4| = 6
    levels = np.array([0.25, 0.5, 0.75])
    quantiles = np.array([4.0, 4.0, 4.0])
    assert weighted_interval_score(quantiles, levels, 10.0) == pytest.approx(6.0)


def test_coverage_marks_each_interval_and_missing_observations():
    nominal, inside = interval_coverage(np.tile(QUANTILES, (4, 1)), LEVELS,
                                        np.array([22.0, 6.0, 3.0, np.nan]))
    np.testing.assert_allclose(nominal, [0.9, 0.5])          # widest first
    # 22 is outside both; 6 inside both; 3 inside [2, 20] only; NaN is not scored
    np.testing.assert_array_equal(inside, [[0, 0], [1, 1], [1, 0], [np.nan, np.nan]])


def test_levels_without_a_partner_are_not_intervals():
    intervals = central_intervals(np.array([0.025, 0.1, 0.5, 0.9]))
    np.testing.assert_allclose(intervals.alphas, [0.2])
    with pytest.raises(ValueError, match="0.5 quantile"):
        weighted_interval_score(np.array([1.0, 2.0]), np.array([0.1, 0.9]), 1.0)


SCENARIO = """\
# Illustrative only: invented numbers.
[scenario]
name = "scored"
start = 2027-03-01
days = 35
members = 30
seed = 11

[model]
compartments = ["S", "I", "R"]
population = 5000
initial = { S = "rest", I = 10 }

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
beta = { dist = "uniform", low = 0.3, high = 0.5 }

[[variants]]
name = "usual"

[[variants]]
name = "lower"
parameters = { beta = { dist = "uniform", low = 0.2, high = 0.3 } }

[solver]
method = "rk4"
step = 0.25

[[measures]]
name = "cases"
of = "infection"
window = 7
"""


@pytest.fixture(scope="module")
def result(tmp_path_factory):
    directory = tmp_path_factory.mktemp("scored")
    scenario = load_text(directory, SCENARIO, "scored")
    return api.run(scenario, output=directory / "scored.nc", workers=0, progress=False,
                   backend="numpy")


def test_score_of_a_result_follows_the_formula_on_its_quantiles(result, tmp_path):
    observed = tmp_path / "observed.csv"
    observed.write_text("date,value\n2027-03-15,90\n2027-03-22,\n2027-03-29,40\n")
    text = api.score(result, observed, after="2027-03-08")
    with xr.open_dataset(result, decode_times=False) as dataset:
        bands = dataset["measure_cases_quantile"].load()
    levels = bands["quantile"].values
    for variant, name in enumerate(["usual", "lower"]):
        block = text.split(f"variant {name}\n")[1]
        rows = block.splitlines()[1:4]
        for row, (week, value) in zip(rows, [(1, 90.0), (2, np.nan), (3, 40.0)]):
            q = bands.isel(variant=variant).sel(time_7d=7.0 * (week + 1)).values
            cells = row.split()
            assert float(cells[0]) == 7 * week                      # days after --after
            assert float(cells[2]) == pytest.approx(q[levels == 0.5][0], abs=0.05)
            if np.isnan(value):
                assert cells[3] == "-"
                continue
            # eq. 2 of Bracher et al. 2021 written out over the default levels
            # (0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975): intervals 95%, 90%, 50%
            total = 0.5 * abs(value - q[3])
            for alpha, low, high in ((0.05, q[0], q[6]), (0.1, q[1], q[5]),
                                     (0.5, q[2], q[4])):
                total += alpha / 2 * ((high - low) + 2 / alpha * max(low - value, 0)
                                      + 2 / alpha * max(value - high, 0))
            assert float(cells[3]) == pytest.approx(total / 3.5, abs=0.05)
            assert cells[4:] == ["in" if q[i] <= value <= q[6 - i] else "out"
                                 for i in range(3)]


@pytest.mark.parametrize("text, where", [
    ("date,value\n2027-03-09,30\n", "line 2, date"),          # not a window's end
    ("date,value\n2027-03-08,-3\n", "line 2, value"),          # negative count
    ("date,value\n2027-03-08,2.5\n", "line 2, value"),         # not a whole count
    ("date,value\n2027-03-08,3\nMarch 15,4\n", "line 3, date"),
    ("day,count\n2027-03-08,3\n", "line 1"),
    ("date,value\n2027-03-08,3\n2027-03-08,4\n", "line 3, date"),
])
def test_bad_counts_are_refused_naming_the_line(result, tmp_path, text, where):
    observed = tmp_path / "observed.csv"
    observed.write_text(text)
    with pytest.raises(UsageError) as caught:
        api.score(result, observed)
    assert str(observed) in str(caught.value) and where in str(caught.value)
    finished = run_cli("score", result, observed, cwd=tmp_path)
    assert finished.returncode == 2 and where in finished.stderr


def test_the_score_command_prints_the_table_and_ends_with_the_caution(result, tmp_path):
    observed = tmp_path / "observed.csv"
    observed.write_text("date,value\n2027-03-15,90\n2027-03-29,40\n")
    done = run_cli("score", result, observed, "--after", "2027-03-08", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith(api.score(result, observed, after="2027-03-08"))
    assert done.stdout.rstrip().endswith(CAUTION)


def test_comment_lines_are_skipped_and_lines_keep_their_numbers(result, tmp_path):
    observed = tmp_path / "observed.csv"
    observed.write_text("# invented counts\ndate,value\n# a note\n2027-03-08,3\n"
                        "2027-03-10,4\n")
    with pytest.raises(UsageError, match="line 5, date"):
        api.score(result, observed)


def test_unknown_measure_is_refused(result, tmp_path):
    observed = tmp_path / "observed.csv"
    observed.write_text("date,value\n2027-03-08,3\n")
    with pytest.raises(UsageError, match="--measure.*no flow measure"):
        api.score(result, observed, measure="admissions")
