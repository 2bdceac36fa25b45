"""Uniform columns: stratification, balance, independence of chunking and of other columns."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import stats

from ensemble.sampling.uniform import uncertain_columns, uniform_draws
from support import load_text

METHODS = ("random", "latin-hypercube", "sobol")

_files = itertools.count()

# Illustrative, invented numbers.
TEMPLATE = """
[scenario]
name = "uniform-test"
days = 10
members = {members}
seed = {seed}

[model]
compartments = ["S", "I", "R"]
{groups}
initial = {{ S = "rest", I = {infected} }}

[[model.flows]]
from = "S"
to = "I"
rate = "{infection}"

[[model.flows]]
from = "I"
to = "R"
rate = "I / 5"

[parameters]
{parameters}

[sampling]
method = "{method}"
{variants}
"""

THREE = """
a = { dist = "uniform", low = 0, high = 1 }
b = { dist = "normal", mean = 0, sd = 1 }
c = { dist = "gamma", mean = 2, sd = 1 }
k = 0.5
"""


def load(directory, method: str, members: int, seed: int = 11, parameters: str = THREE,
         groups: str = "population = 1000", infected: str = "10",
         infection: str = "k * a * b * c * S * I / N", variants: str = ""):
    return load_text(directory, TEMPLATE.format(
        members=members, seed=seed, groups=groups, infected=infected, infection=infection,
        parameters=parameters, method=method, variants=variants), f"uniform-{next(_files)}")


KEYS = [("a", 0), ("b", 0), ("c", 0)]


@pytest.mark.parametrize("members", [1000, 997, 1])
def test_latin_hypercube_one_point_per_stratum(tmp_path, members):
    """Every column holds exactly one point in each of the M strata [k/M, (k+1)/M)
    (McKay, Beckman & Conover 1979, Technometrics 21:239-245)."""
    sc = load(tmp_path, "latin-hypercube", members)
    columns = uniform_draws(sc, KEYS, np.arange(members))
    for u in columns.values():
        assert np.all((u > 0) & (u < 1))
        strata = np.floor(u * members).astype(int)
        assert np.array_equal(np.sort(strata), np.arange(members))
    if members > 1:  # the columns are different permutations
        assert not np.array_equal(np.argsort(columns[KEYS[0]]), np.argsort(columns[KEYS[1]]))


@pytest.mark.parametrize("m", [4, 10])
def test_sobol_balance_for_a_power_of_two(tmp_path, m):
    """The first 2^m scrambled Sobol' points are a (0, m, 1)-net in every coordinate: each
    half of [0, 1) holds half the points, and each interval [k/2^m, (k+1)/2^m) exactly one
    (Sobol' 1967, USSR Comput. Math. Math. Phys. 7:86-112; the net property survives linear
    matrix scrambling with a digital shift, Matousek 1998, J. Complexity 14:527-556, cited
    from memory)."""
    n = 2 ** m
    sc = load(tmp_path, "sobol", n)
    for u in uniform_draws(sc, KEYS, np.arange(n)).values():
        assert np.count_nonzero(u < 0.5) == n // 2
        assert np.array_equal(np.sort(np.floor(u * n).astype(int)), np.arange(n))
    # a chunked request gives the same points
    chunked = uniform_draws(sc, KEYS, np.arange(n // 2, n))
    whole = uniform_draws(sc, KEYS, np.arange(n))
    for key in KEYS:
        assert np.array_equal(chunked[key], whole[key][n // 2:])


def test_random_columns_are_uniform_and_independent(tmp_path):
    """Random columns pass KS against U(0, 1) (Kolmogorov 1933; Smirnov 1948) and two
    columns are uncorrelated (Spearman's rank test via scipy.stats.spearmanr)."""
    sc = load(tmp_path, "random", 5000)
    columns = uniform_draws(sc, KEYS, np.arange(5000))
    for u in columns.values():
        assert np.all((u > 0) & (u < 1))
        assert stats.kstest(u, "uniform").pvalue > 1e-3
    assert stats.spearmanr(columns[KEYS[0]], columns[KEYS[1]]).pvalue > 1e-3


@pytest.mark.parametrize("method", METHODS)
def test_draws_do_not_depend_on_chunking(tmp_path, method):
    """Members [0, 1000) equal [0, 300) + [300, 1000), and any scattered subset, bit for bit."""
    sc = load(tmp_path, method, 1000)
    whole = uniform_draws(sc, KEYS, np.arange(1000))
    head = uniform_draws(sc, KEYS, np.arange(300))
    tail = uniform_draws(sc, KEYS, np.arange(300, 1000))
    scattered = np.array([999, 3, 4, 5, 17, 500])
    subset = uniform_draws(sc, KEYS, scattered)
    for key in KEYS:
        assert np.array_equal(np.concatenate([head[key], tail[key]]), whole[key])
        assert np.array_equal(subset[key], whole[key][scattered])


def test_random_raising_members_keeps_existing_members(tmp_path):
    small = uniform_draws(load(tmp_path, "random", 500), KEYS, np.arange(500))
    large = uniform_draws(load(tmp_path, "random", 50_000), KEYS,
                          np.arange(50_000))
    for key in KEYS:
        assert np.array_equal(large[key][:500], small[key])


@pytest.mark.parametrize("method", ["random", "latin-hypercube"])
def test_adding_a_parameter_changes_no_other_column(tmp_path, method):
    base = load(tmp_path, method, 800)
    grown = load(tmp_path, method, 800,
                 parameters='zz = { dist = "uniform", low = 0, high = 1 }\n' + THREE,
                 infection="zz * k * a * b * c * S * I / N")
    before = uniform_draws(base, KEYS, np.arange(800))
    after = uniform_draws(grown, KEYS + [("zz", 0)], np.arange(800))
    for key in KEYS:
        assert np.array_equal(before[key], after[key])
    assert not np.array_equal(after[("zz", 0)], after[("a", 0)])


@pytest.mark.parametrize("method", METHODS)
def test_seed_changes_every_column(tmp_path, method):
    one = uniform_draws(load(tmp_path, method, 64, seed=1), KEYS, np.arange(64))
    two = uniform_draws(load(tmp_path, method, 64, seed=2), KEYS, np.arange(64))
    for key in KEYS:
        assert not np.array_equal(one[key], two[key])


def test_uncertain_columns_are_the_union_over_variants_in_file_order(tmp_path):
    """Sobol' dimensions: every parameter any variant draws, per group with per_group."""
    sc = load(tmp_path, "sobol", 16, groups='groups = ["young", "old"]\npopulation = [100, 200]',
              infected="[1, 1]", infection="a * b * c * d * S * I / N",
              parameters="""
                a = 1.0
                b = { dist = "uniform", low = 0, high = 1 }
                c = [1.0, 2.0]
                d = { value = 3.0, units = "1" }
              """,
              variants="""
                [[variants]]
                name = "v1"
                parameters = { c = { dist = "normal", mean = 1, sd = 1, per_group = true } }

                [[variants]]
                name = "v2"
                parameters = { a = { dist = "uniform", low = 0, high = 2 } }
              """)
    assert uncertain_columns(sc) == (("a", 0), ("b", 0), ("c", 0), ("c", 1))


def test_member_outside_the_ensemble_is_refused(tmp_path):
    sc = load(tmp_path, "random", 10)
    with pytest.raises(ValueError, match="member indices"):
        uniform_draws(sc, KEYS, np.array([10]))


def test_sobol_same_points_for_every_variant_subset_of_columns(tmp_path):
    """Asking for fewer columns does not move the Sobol' dimensions of the others."""
    sc = load(tmp_path, "sobol", 256)
    all_columns = uniform_draws(sc, KEYS, np.arange(256))
    only_c = uniform_draws(sc, [("c", 0)], np.arange(256))
    assert np.array_equal(only_c[("c", 0)], all_columns[("c", 0)])
