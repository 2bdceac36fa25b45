"""make_design on scenarios read by the loader and lowered by lower_model.

Values are checked against hand computations with numpy on the same draws, and the
design's invariants (chunking, common random numbers, the initial-state rules of
``initial`` in the project's reference, ``ensemble/scenario/reference.md``) against the
scenario file's contract.
"""

from __future__ import annotations

import math
import tracemalloc

import numpy as np
import pytest

from ensemble.model.lower import lower_model
from ensemble.sampling import Design, make_design
from support import load_text

METHODS = ("random", "latin-hypercube", "sobol")

# Illustrative, invented numbers throughout.
SEIR = """
[scenario]
name = "design-seir"
days = 30
members = {members}
seed = 4711

[model]
compartments = ["S", "E", "I", "R"]
population = 52000
initial = {{ S = "rest", E = 40, I = "seed_infectious" }}

[[model.flows]]
from = "S"
to = "E"
rate = "beta * contact_scale * S * I / N"

[[model.flows]]
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
from = "I"
to = "R"
rate = "I / infectious_days"

[parameters]
beta = "R0 / infectious_days"
R0 = {{ dist = "uniform", low = 1.2, high = 1.9 }}
latent_days = {{ dist = "gamma", mean = 2.5, sd = 0.6 }}
infectious_days = {{ dist = "lognormal", mean = 4.0, sd = 1.0, low = 1.0 }}
seed_infectious = {{ dist = "uniform", low = 5, high = 25 }}
relax = {{ dist = "beta", mean = 0.8, sd = 0.1 }}
contact_scale = 1.0
{extra}
[sampling]
method = "{method}"

[[variants]]
name = "no-change"

[[variants]]
name = "distancing"
parameters = {{ contact_scale = {{ schedule = [[0, 1.0], [10, 0.7], [20, "0.7 + 0.3 * relax"]] }} }}

[[variants]]
name = "unit-R0"
parameters = {{ R0 = {{ dist = "uniform", low = 0, high = 1 }} }}
"""

AGE = """
[scenario]
name = "design-age"
days = 10
members = {members}
seed = 99

[model]
compartments = ["S", "E", "I", "R"]
groups = ["child", "adult", "old"]
population = [2000, 5000, 1500]
initial = {{ S = "rest", E = [1, 2, 0], I = "seeds" }}

[model.matrices]
contact = [[8.0, 3.0, 1.0], [3.0, 6.0, 1.5], [1.0, 1.5, 3.0]]

[[model.flows]]
from = "S"
to = "E"
rate = "susceptibility * S * (contact @ (I / N)) * scale"

[[model.flows]]
from = "E"
to = "I"
rate = "E / 3"

[[model.flows]]
from = "I"
to = "R"
rate = "I * gamma_rate"

[parameters]
susceptibility = {{ dist = "beta", mean = 0.5, sd = 0.1, per_group = true }}
seeds = {{ dist = "uniform", low = 0, high = {seed_high}, per_group = true }}
pressure = "contact @ susceptibility"
scale = "0.05 / sum(pressure)"
gamma_rate = "1 / infectious_days"
infectious_days = {{ dist = "normal", mean = 5, sd = 1, low = 2 }}
wave = "1 + 0.2 * sin(2 * pi * t / 365)"
elementwise = "exp(-infectious_days) + log(infectious_days) * sqrt(infectious_days) + sin(infectious_days) * cos(pi * infectious_days) + infectious_days ** 1.3 + max(infectious_days, 5) - min(infectious_days, 5) / abs(infectious_days - 5)"

[sampling]
method = "{method}"
{variants}
"""


def load(tmp_path, template: str, members: int = 1000, method: str = "random", **fields):
    return load_text(tmp_path, template.format(members=members, method=method, **fields),
                     f"scenario-{method}-{members}")


def seir(tmp_path, members=1000, method="random", extra=""):
    return load(tmp_path, SEIR, members, method, extra=extra)


def age(tmp_path, members=1000, method="random", seed_high=20, variants=""):
    return load(tmp_path, AGE, members, method, seed_high=seed_high, variants=variants)


def design(scenario, variant_index: int, members) -> Design:
    variant = scenario.variants[variant_index]
    return make_design(scenario, variant, lower_model(scenario, variant), np.asarray(members))


def assert_same_design(whole: Design, parts: list[Design]):
    """Bit-for-bit equality of a design and the concatenation of designs of its parts."""
    def joined(get):
        return np.concatenate([get(p) for p in parts], axis=-1)

    assert np.array_equal(whole.member_index, joined(lambda d: d.member_index))
    assert np.array_equal(whole.parameters, joined(lambda d: d.parameters))
    assert np.array_equal(whole.initial, joined(lambda d: d.initial), equal_nan=True)
    assert np.array_equal(whole.invalid_start, joined(lambda d: d.invalid_start))
    for k, values in enumerate(whole.schedule_values):
        assert np.array_equal(values, joined(lambda d: d.schedule_values[k]))
    assert whole.reported.keys() == parts[0].reported.keys()
    for name, values in whole.reported.items():
        assert np.array_equal(values, joined(lambda d: d.reported[name]))
    assert np.array_equal(whole.basic_reproduction_number,
                          joined(lambda d: d.basic_reproduction_number), equal_nan=True)


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize("template", ["seir", "age"])
def test_design_does_not_depend_on_chunking(tmp_path, method, template):
    """make_design for [0, 1000) equals [0, 300) + [300, 1000) bit for bit; a scattered
    subset equals the same members of the whole."""
    sc = (seir if template == "seir" else age)(tmp_path, 1000, method)
    for v in range(len(sc.variants)):
        whole = design(sc, v, np.arange(1000))
        assert_same_design(whole, [design(sc, v, np.arange(300)),
                                   design(sc, v, np.arange(300, 1000))])
        picked = np.array([999, 0, 1, 2, 640])
        assert_same_design(
            Design(picked, whole.parameters[:, picked],
                   tuple(s[:, picked] for s in whole.schedule_values),
                   whole.initial[:, picked], whole.invalid_start[picked],
                   {n: v[..., picked] for n, v in whole.reported.items()},
                   whole.basic_reproduction_number[picked]),
            [design(sc, v, picked)])


@pytest.mark.parametrize("method", METHODS)
def test_common_random_numbers_between_variants(tmp_path, method):
    """A parameter a variant leaves alone has the same draws in every variant, and an
    overriding distribution maps the same uniform column: U(1.2, 1.9) = 1.2 + 0.7 U(0, 1)
    member by member (inverse-CDF sampling, e.g. Devroye 1986, Non-Uniform Random Variate
    Generation, ch. 2)."""
    sc = seir(tmp_path, 512, method)
    base, distancing, unit = (design(sc, v, np.arange(512)).reported for v in range(3))
    for name in ("latent_days", "infectious_days", "seed_infectious", "relax"):
        assert np.array_equal(base[name], distancing[name])
        assert np.array_equal(base[name], unit[name])
    assert np.allclose(base["R0"], 1.2 + 0.7 * unit["R0"], rtol=1e-14, atol=0)
    assert np.all((unit["R0"] > 0) & (unit["R0"] < 1))


def test_derived_parameters_in_dependency_order(tmp_path):
    """beta = R0 / infectious_days is defined before its inputs in the file; each member's
    value is the IEEE quotient of that member's draws."""
    sc = seir(tmp_path, 200)
    d = design(sc, 0, np.arange(200))
    assert np.array_equal(d.reported["beta"], d.reported["R0"] / d.reported["infectious_days"])
    assert np.all(d.reported["infectious_days"] >= 1.0)


def test_parameter_rows_follow_the_compiled_slots(tmp_path):
    sc = age(tmp_path, 100)
    variant = sc.variants[0]
    model = lower_model(sc, variant)
    d = make_design(sc, variant, model, np.arange(100))
    assert d.parameters.shape == (len(model.parameter_slots), 100)
    groups = sc.model.groups
    for row, slot in enumerate(model.parameter_slots):
        name, _, label = slot.partition("[")
        value = d.reported[name]
        expected = value[groups.index(label.rstrip("]"))] if label else value
        assert np.array_equal(d.parameters[row], expected), slot


def test_vector_derived_values_against_numpy_linear_algebra(tmp_path):
    """pressure = contact @ susceptibility and scale = 0.05 / sum(pressure), per member,
    against numpy's matrix product (numpy.matmul) of the same draws."""
    sc = age(tmp_path, 300)
    d = design(sc, 0, np.arange(300))
    contact = np.array(sc.model.matrices["contact"])
    susceptibility = d.reported["susceptibility"]
    assert susceptibility.shape == (3, 300)
    expected = contact @ susceptibility
    assert np.allclose(d.reported["pressure"], expected, rtol=1e-14, atol=0)
    assert np.allclose(d.reported["scale"], 0.05 / expected.sum(axis=0), rtol=1e-14, atol=0)
    assert "wave" not in d.reported  # uses t: time-varying, left to the compiled rates


def test_schedule_knots_evaluated_per_member(tmp_path):
    """Knot values that are expressions of parameters are evaluated member by member."""
    sc = seir(tmp_path, 100)
    variant = sc.variants[1]
    model = lower_model(sc, variant)
    d = make_design(sc, variant, model, np.arange(100))
    (slot_index,) = [k for k, s in enumerate(model.schedule_slots)
                     if s.parameter == "contact_scale"]
    knots = d.schedule_values[slot_index]
    assert knots.shape == (3, 100)
    assert np.array_equal(knots[0], np.ones(100))
    assert np.array_equal(knots[1], np.full(100, 0.7))
    assert np.array_equal(knots[2], 0.7 + 0.3 * d.reported["relax"])
    assert "contact_scale" not in d.reported


def test_initial_state_with_rest_and_expressions(tmp_path):
    """S takes the rest of each group's population (the reference, ``initial``)."""
    sc = age(tmp_path, 50)
    variant = sc.variants[0]
    model = lower_model(sc, variant)
    d = make_design(sc, variant, model, np.arange(50))
    by_label = dict(zip(model.state_labels, d.initial))
    population = dict(zip(sc.model.groups, sc.model.population))
    assert not d.invalid_start.any()
    for g, group in enumerate(sc.model.groups):
        seeds = d.reported["seeds"][g]
        assert np.array_equal(by_label[f"I[{group}]"], seeds)
        assert np.array_equal(by_label[f"E[{group}]"], np.full(50, [1.0, 2.0, 0.0][g]))
        assert np.array_equal(by_label[f"R[{group}]"], np.zeros(50))
        assert np.allclose(by_label[f"S[{group}]"] + by_label[f"E[{group}]"] + seeds,
                           population[group], rtol=1e-15)


def test_impossible_drawn_start_is_flagged_with_nan(tmp_path):
    """A drawn start above the group's population is impossible: the member is flagged
    and holds NaN; the other members are untouched (the reference, ``initial`` and
    status bit 8)."""
    sc = age(tmp_path, 400, seed_high=3000)
    d = design(sc, 0, np.arange(400))
    seeds = d.reported["seeds"]
    too_many = (seeds + np.array([[1.0], [2.0], [0.0]])
                > np.array(sc.model.population)[:, None]).any(axis=0)
    assert too_many.any() and not too_many.all()
    assert np.array_equal(d.invalid_start, too_many)
    assert np.isnan(d.initial[:, too_many]).all()
    assert np.isfinite(d.initial[:, ~too_many]).all()


@pytest.mark.parametrize("method", ["random", "latin-hypercube"])
def test_adding_a_parameter_changes_no_other_draw(tmp_path, method):
    plain = design(seir(tmp_path, 300, method), 0, np.arange(300)).reported
    grown = design(seir(tmp_path, 300, method,
                        extra='waning = { dist = "gamma", mean = 200, sd = 50 }'),
                   0, np.arange(300)).reported
    assert "waning" in grown
    for name, values in plain.items():
        assert np.array_equal(values, grown[name]), name


def test_random_raising_members_keeps_existing_members(tmp_path):
    small = design(seir(tmp_path, 100), 0, np.arange(100))
    large = design(seir(tmp_path, 5000), 0, np.arange(5000))
    for name, values in small.reported.items():
        assert np.array_equal(values, large.reported[name][:100]), name
    assert np.array_equal(small.initial, large.initial[:, :100])


def test_chunk_far_into_a_large_ensemble_allocates_per_chunk(tmp_path):
    """A chunk of 1000 members at the end of 10^6 (random sampling) allocates per chunk,
    not per ensemble: peak traced allocation (tracemalloc, which numpy reports to) stays far
    below one float64 array over the ensemble (8 MB)."""
    sc = seir(tmp_path, 1_000_000)
    variant = sc.variants[1]
    model = lower_model(sc, variant)
    tracemalloc.start()
    try:
        d = make_design(sc, variant, model, np.arange(999_000, 1_000_000))
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert d.parameters.shape[1] == d.initial.shape[1] == 1000
    assert peak < 1_000_000


def test_variant_matrix_override_reaches_derived_values(tmp_path):
    """A variant's matrix replaces the model's in derived parameters: with the identity,
    pressure = susceptibility."""
    sc = age(tmp_path, 64, variants="""
[[variants]]
name = "base"

[[variants]]
name = "no-mixing"
matrices = { contact = [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]] }
""")
    base, no_mixing = (design(sc, v, np.arange(64)).reported for v in range(2))
    assert np.array_equal(no_mixing["pressure"], no_mixing["susceptibility"])
    assert np.array_equal(base["susceptibility"], no_mixing["susceptibility"])
    assert not np.array_equal(base["pressure"], no_mixing["pressure"])


@pytest.mark.parametrize("initial, all_valid", [
    ('{ S = "1000 - seed_infectious", I = "seed_infectious" }', True),
    ('{ S = 990, I = "seed_infectious" }', False),
])
def test_start_without_rest_must_add_up_to_the_population(tmp_path, initial, all_valid):
    """Without "rest" the starts must add up to the population (the reference,
    ``initial``: relative tolerance 1e-9); a member whose drawn starts do not is an impossible start."""
    scenario = load_text(tmp_path, f"""
        [scenario]
        name = "no-rest"
        days = 5
        members = 50

        [model]
        compartments = ["S", "I"]
        population = 1000
        initial = {initial}

        [[model.flows]]
        from = "S"
        to = "I"
        rate = "0.3 * S * I / N"

        [parameters]
        seed_infectious = {{ dist = "uniform", low = 5, high = 15 }}
    """, "no-rest")
    d = design(scenario, 0, np.arange(50))
    assert np.array_equal(d.invalid_start, np.full(50, not all_valid))
    assert np.isnan(d.initial[:, d.invalid_start]).all()


def test_elementwise_functions_against_the_math_module(tmp_path):
    """Each function of the expression language, member by member, against Python's math
    module (C library functions): exp, log, sqrt, sin, cos, pow, max, min, abs, pi."""
    d = design(age(tmp_path, 200), 0, np.arange(200)).reported
    for x, value in zip(d["infectious_days"], d["elementwise"]):
        expected = (math.exp(-x) + math.log(x) * math.sqrt(x) + math.sin(x) * math.cos(math.pi * x)
                    + x ** 1.3 + max(x, 5.0) - min(x, 5.0) / abs(x - 5.0))
        assert value == pytest.approx(expected, rel=1e-13)
