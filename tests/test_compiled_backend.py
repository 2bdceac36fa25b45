"""The compiled backend against the numpy reference, scipy, and itself.

The numpy stepper (:mod:`ensemble.integrate.reference`) is the readable statement of the
arithmetic; the generated kernels must give the same numbers to 1e-12 relative for
every method of the registry, with groups, a contact matrix, step and linear schedules
and a time-varying derived parameter, including the status bits.
"""

from __future__ import annotations

import dataclasses
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from ensemble.integrate.kernels.blocks import block_size
from ensemble.integrate.kernels.cache import KernelCache, cache_directory
from ensemble.integrate.kernels.form import KernelForm, structured_nodes
from ensemble.integrate.kernels.launch import (integrate_fixed_compiled, kernel_threads,
                                               set_kernel_threads, step_error_compiled)
from ensemble.integrate.kernels.source import KernelSource
from ensemble.integrate.reference import integrate_fixed
from ensemble.integrate.refine import step_error
from ensemble.methods import METHODS
from ensemble.model.grouped import Contract, GroupTotal, expand, grouped_rates
from ensemble.model.lower import lower_model
from ensemble.records import INVALID_START, NON_FINITE
from ensemble.sampling import make_design
from ensemble.scenario.load import load_scenario
from support import IMPLICIT, load_text, model_and_design

# Illustrative model, invented numbers: two groups, a contact matrix, waning immunity, a
# step schedule (school terms), a linear schedule (vaccination ramp), a seasonal derived
# parameter that depends on t, and a rate using every function of the language.
TWO_GROUP_SEIRS = """
[scenario]
name = "two-group"
days = 40
members = 24
seed = 11

[model]
compartments = ["S", "E", "I", "R"]
groups = ["young", "old"]
population = [6000, 4000]
initial = { S = "rest", E = [3, 1], I = [4, 2] }

[model.matrices]
contacts = [[6.0, 2.0], [2.0, 3.0]]

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "beta * seasonal * school * S * (contacts @ (I / N))"

[[model.flows]]
name = "onset"
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
name = "recovery"
from = "I"
to = "R"
rate = "I / infectious_days"

[[model.flows]]
name = "vaccination"
from = "S"
to = "R"
rate = "vaccination * S"

[[model.flows]]
name = "waning"
from = "R"
to = "S"
rate = "R / immunity_days * min(1.5, max(0.5, sqrt(abs(1 + 0.2 * sin(t / 5))) ** 1.5 * exp(-log(1 + R / N))))"

[parameters]
beta = { dist = "uniform", low = 0.03, high = 0.06 }
latent_days = { dist = "gamma", mean = 3.0, sd = 0.5 }
infectious_days = { dist = "uniform", low = 3.0, high = 6.0 }
immunity_days = 60.0
seasonal = "1 + 0.3 * cos(2 * pi * t / 30)"
school = { schedule = [[0, 1.0], [10, 0.4], [22.5, 1.0]], between = "step" }
vaccination = { schedule = [[5, 0.0], [15, "0.01 * beta / 0.05"], [30, 0.002]], between = "linear" }

[solver]
method = "rk4"
step = 0.25
report_every = 2.5
check = { atol = 0.01 }
"""

SEIR = """
[scenario]
name = "seir"
days = 60
members = 700
seed = 3

[model]
compartments = ["S", "E", "I", "R"]
population = 100000
initial = { S = "rest", E = 20, I = 10 }

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "R0 / infectious_days * S * I / N"

[[model.flows]]
name = "onset"
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
name = "recovery"
from = "I"
to = "R"
rate = "I / infectious_days"

[parameters]
R0 = { dist = "uniform", low = 1.3, high = 2.5 }
latent_days = { dist = "uniform", low = 2.0, high = 4.0 }
infectious_days = { dist = "uniform", low = 3.0, high = 6.0 }

[solver]
method = "rk4"
step = 0.25
"""


def _load(tmp_path, text: str, name: str):
    scenario = load_text(tmp_path, text, name)
    return (scenario, *model_and_design(scenario))


@pytest.fixture(scope="module")
def cache(tmp_path_factory):
    """A private kernel cache for this module."""
    directory = tmp_path_factory.mktemp("kernels")
    previous = os.environ.get("ENSEMBLE_KERNEL_CACHE")
    os.environ["ENSEMBLE_KERNEL_CACHE"] = str(directory)
    yield directory
    if previous is None:
        del os.environ["ENSEMBLE_KERNEL_CACHE"]
    else:
        os.environ["ENSEMBLE_KERNEL_CACHE"] = previous


@pytest.fixture(scope="module")
def two_group(tmp_path_factory, cache):
    scenario, model, design = _load(tmp_path_factory.mktemp("two"), TWO_GROUP_SEIRS, "two")
    # member 3: an impossible start; member 5: a rate that divides by zero (blows up)
    invalid = np.array(design.invalid_start, dtype=bool).copy()
    invalid[3] = True
    initial = np.array(design.initial).copy()
    initial[:, 3] = np.nan
    parameters = np.array(design.parameters).copy()
    parameters[model.parameter_slots.index("infectious_days"), 5] = 0.0
    design = dataclasses.replace(design, invalid_start=invalid, initial=initial,
                                 parameters=parameters)
    return scenario, model, design


def _run(integrate, scenario, model, design, method, step=None):
    solver = scenario.solver
    step = float(solver.step) if step is None else step
    return integrate(model, design, METHODS[method], step,
                     int(round(float(solver.report_every) / step)), scenario.n_reports,
                     solver.newton, solver.check.atol)


@pytest.mark.slow
@pytest.mark.parametrize("method", list(METHODS))
def test_compiled_matches_numpy_reference(two_group, method):
    """Same numbers as the numpy stepper to 1e-12 relative, NaN where it has NaN, and
    the same status bits, for every method."""
    scenario, model, design = two_group
    assert model.n_groups == 2 and {s.between for s in model.schedule_slots} == {"step",
                                                                                "linear"}
    reference = _run(integrate_fixed, scenario, model, design, method)
    compiled = _run(integrate_fixed_compiled, scenario, model, design, method)
    np.testing.assert_allclose(compiled.state, reference.state, rtol=1e-12, atol=0)
    np.testing.assert_allclose(compiled.flow_count, reference.flow_count, rtol=1e-12, atol=0)
    np.testing.assert_array_equal(compiled.status, reference.status)
    assert compiled.status[3] == INVALID_START
    assert compiled.status[5] & NON_FINITE
    assert np.isfinite(compiled.state[[0, 1, 2, 4]]).all()


@pytest.mark.parametrize("method", ["forward-euler", "rk4", "backward-euler"])
def test_step_check_compared_in_the_kernel_has_the_bits_of_step_error(two_group, method):
    """The refined run compared with the run at h as it goes gives the bits of
    :func:`ensemble.integrate.refine.step_error` on the two stored runs (Richardson's
    estimate), NaN for the invalid and the blown-up member, and the refined run's status
    bits; members need not fill the last block."""
    scenario, model, design = two_group
    solver = scenario.solver
    coarse = _run(integrate_fixed_compiled, scenario, model, design, method)
    half = float(solver.step) / 2
    refined = _run(integrate_fixed_compiled, scenario, model, design, method, step=half)
    with np.errstate(all="ignore"):
        expected = step_error(coarse.state, refined.state, 2, METHODS[method].order, 1e-3,
                              solver.check.atol)
    error, status = step_error_compiled(
        model, design, METHODS[method], half, int(round(float(solver.report_every) / half)),
        scenario.n_reports, solver.newton, solver.check.atol, coarse.state, 2,
        METHODS[method].order, 1e-3)
    assert design.member_index.size % block_size(model, METHODS[method]) != 0
    assert np.array_equal(error, expected, equal_nan=True)
    assert np.isnan(error[[3, 5]]).all() and np.isfinite(np.delete(error, [3, 5])).all()
    assert (error > 0).any()
    np.testing.assert_array_equal(status, refined.status)


def test_compiled_rk4_matches_scipy(tmp_path, cache):
    """RK4 at h = 0.25 d on SEIR against scipy's DOP853 at rtol 1e-11 (Hairer, Norsett &
    Wanner 1993, sec. II.5).  The classical method's global error scales as (h / tau)^4,
    tau >= 2 days the shortest time scale here, (0.125)^4 = 2.4e-4 times a modest
    constant: 2e-5 relative is a loose bound (common practice, no source)."""
    scenario, model, design = _load(tmp_path, SEIR, "seir")
    member_index = np.arange(0, 700, 100)
    subset = dataclasses.replace(
        design, member_index=design.member_index[member_index],
        parameters=design.parameters[:, member_index],
        initial=design.initial[:, member_index],
        invalid_start=design.invalid_start[member_index])
    trajectory = _run(integrate_fixed_compiled, scenario, model, subset, "rk4")
    slots = model.parameter_slots
    times = np.arange(scenario.n_reports, dtype=float)
    for column in range(len(member_index)):
        r0, latent, infectious = (subset.parameters[slots.index(name), column]
                                  for name in ("R0", "latent_days", "infectious_days"))

        def seir(t, y):
            s, e, i, r = y
            infection = r0 / infectious * s * i / y.sum()
            return [-infection, infection - e / latent, e / latent - i / infectious,
                    i / infectious]
        exact = solve_ivp(seir, (0, times[-1]), subset.initial[:, column], method="DOP853",
                          rtol=1e-11, atol=1e-8, t_eval=times).y
        np.testing.assert_allclose(trajectory.state[column], exact, rtol=2e-5, atol=1e-6)


def test_member_gets_same_bits_in_any_chunk_and_thread_count(tmp_path, cache):
    """Determinism (the project's reference, ``ensemble/scenario/reference.md``): a
    member's numbers do not depend on the chunk it is in, its position in the block, the
    padding, or the number of kernel threads."""
    scenario, model, design = _load(tmp_path, SEIR, "seir")

    def chunk(start, stop):
        rows = np.arange(start, stop)
        return dataclasses.replace(
            design, member_index=design.member_index[rows], parameters=design.parameters[:, rows],
            initial=design.initial[:, rows], invalid_start=design.invalid_start[rows])

    threads = kernel_threads()
    set_kernel_threads(2)
    whole = _run(integrate_fixed_compiled, scenario, model, design, "rk4")
    set_kernel_threads(1)
    try:
        for start, stop in [(3, 11), (511, 520), (600, 700)]:
            part = _run(integrate_fixed_compiled, scenario, model, chunk(start, stop), "rk4")
            assert np.array_equal(part.state, whole.state[start:stop])
            assert np.array_equal(part.flow_count[:, :, 1:], whole.flow_count[start:stop, :, 1:])
    finally:
        set_kernel_threads(threads)


@pytest.mark.slow
def test_second_process_loads_kernel_from_disk_without_compiling(tmp_path):
    """The generated text and numba's machine code are cached on disk: a fresh process
    running the same model finds the kernel file and gets a numba cache hit."""
    scenario_path = tmp_path / "seir.toml"
    scenario_path.write_text(textwrap.dedent(SEIR))
    program = textwrap.dedent(f"""
        import numpy as np
        from ensemble.scenario.load import load_scenario
        from ensemble.model.lower import lower_model
        from ensemble.sampling import make_design
        from ensemble.methods import METHODS
        from ensemble.integrate.kernels.cache import KernelCache
        from ensemble.integrate.kernels.launch import integrate_fixed_compiled
        scenario = load_scenario({str(scenario_path)!r}, member_count=8)
        model = lower_model(scenario, scenario.variants[0])
        design = make_design(scenario, scenario.variants[0], model, np.arange(8))
        integrate_fixed_compiled(model, design, METHODS["forward-euler"], 0.25, 4, 3,
                                 scenario.solver.newton, 0.01)
        module, _ = KernelCache.for_environment().load(model, METHODS["forward-euler"])
        print(sum(module.integrate_block.stats.cache_hits.values()),
              sum(module.integrate_block.stats.cache_misses.values()))
    """)
    environment = dict(os.environ, ENSEMBLE_KERNEL_CACHE=str(tmp_path / "kernels"))

    def run() -> tuple[int, int]:
        done = subprocess.run([sys.executable, "-c", program], env=environment,
                              capture_output=True, text=True, check=True)
        hits, misses = done.stdout.split()
        return int(hits), int(misses)

    assert run() == (0, 1)
    files = list((tmp_path / "kernels").glob("kernel_*.py"))
    assert len(files) == 1
    assert run() == (1, 0)
    assert list((tmp_path / "kernels").glob("kernel_*.py")) == files


def test_kernel_text_is_keyed_by_its_content(two_group):
    """Different methods give different kernel files; the same model and method the same
    file, whose text holds only generated identifiers and float literals."""
    _, model, _ = two_group
    cache = KernelCache.for_environment()
    rk4, heun = KernelSource(model, METHODS["rk4"]), KernelSource(model, METHODS["heun"])
    assert cache.path(rk4) != cache.path(heun)
    assert cache.path(rk4) == cache.path(KernelSource(model, METHODS["rk4"]))
    assert "beta" not in rk4.text and "import os" not in rk4.text
    module, source = cache.load(model, METHODS["rk4"])
    assert cache.path(source).read_text() == source.text


def test_cache_directory_follows_the_environment(monkeypatch, tmp_path):
    """``ENSEMBLE_KERNEL_CACHE`` names the directory; without it the kernels go under
    ``$XDG_CACHE_HOME``, whose default is ``~/.cache`` (XDG Base Directory Specification,
    freedesktop.org, version 0.8); one cache object per directory in a process."""
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    monkeypatch.delenv("XDG_CACHE_HOME", raising=False)
    monkeypatch.delenv("ENSEMBLE_KERNEL_CACHE", raising=False)
    assert cache_directory() == tmp_path / "home" / ".cache" / "ensemble" / "kernels"
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert cache_directory() == tmp_path / "xdg" / "ensemble" / "kernels"
    monkeypatch.setenv("ENSEMBLE_KERNEL_CACHE", str(tmp_path / "chosen"))
    assert KernelCache.for_environment().directory == tmp_path / "chosen"
    assert KernelCache.for_environment() is KernelCache.for_environment()


def test_kernel_file_is_written_once_and_whole(two_group, tmp_path):
    """A cache writes a kernel's file with no other file left beside it (no temporary;
    the directories are Python's and numba's caches), and a second cache of the same directory (another process) finds the file and does
    not rewrite it: numba keys its machine-code cache on the file's modification time."""
    _, model, _ = two_group
    directory = tmp_path / "kernels"
    _, source = KernelCache(directory).load(model, METHODS["heun"])
    written = KernelCache(directory).path(source)
    assert [path.name for path in directory.iterdir() if path.is_file()] == [written.name]
    assert written.read_text(encoding="utf-8") == source.text
    before = written.stat()
    module, _ = KernelCache(directory).load(model, METHODS["heun"])
    after = written.stat()
    assert (after.st_ino, after.st_mtime_ns) == (before.st_ino, before.st_mtime_ns)
    assert module.BLOCK == source.block


@pytest.mark.parametrize("method", IMPLICIT)
def test_implicit_member_gets_same_bits_in_any_chunk(two_group, method):
    """Determinism of the Newton iterations: a member's iterations, pivoting and
    convergence do not depend on the other members of its block (determinism in the
    project's reference, ``ensemble/scenario/reference.md``)."""
    scenario, model, design = two_group
    whole = _run(integrate_fixed_compiled, scenario, model, design, method)
    rows = np.arange(2, 9)
    part = dataclasses.replace(
        design, member_index=design.member_index[rows], parameters=design.parameters[:, rows],
        initial=design.initial[:, rows], invalid_start=design.invalid_start[rows],
        schedule_values=tuple(v[:, rows] for v in design.schedule_values))
    alone = _run(integrate_fixed_compiled, scenario, model, part, method)
    assert np.array_equal(alone.state, whole.state[rows], equal_nan=True)
    assert np.array_equal(alone.flow_count, whole.flow_count[rows], equal_nan=True)
    assert np.array_equal(alone.status, whole.status[rows])


# Illustrative model, invented numbers: five groups; a home matrix, a work matrix with
# empty rows (nobody of groups a and e works) scaled by a step schedule, the work matrix
# also alone (so a sum loses a term where its row is empty), a sum over groups, a
# susceptibility per group, a vaccination schedule per group (linear) and waning immunity.
FIVE_GROUPS = """
[scenario]
name = "five-groups"
days = 30
members = 20
seed = 5

[model]
compartments = ["S", "E", "I", "R"]
groups = ["a", "b", "c", "d", "e"]
population = [3000, 5000, 4000, 2000, 1000]
initial = { S = "rest", E = [2, 0, 1, 0, 0], I = [1, 2, 0, 1, 1] }

[model.matrices]
home = [[2.0, 1.0, 0.5, 0.2, 0.1], [1.0, 2.5, 0.8, 0.3, 0.0], [0.5, 0.8, 2.0, 0.6, 0.2],
        [0.2, 0.3, 0.6, 1.5, 0.5], [0.1, 0.0, 0.2, 0.5, 1.0]]
work = [[0, 0, 0, 0, 0], [0, 3.0, 1.0, 0, 0], [0, 1.0, 2.5, 0.5, 0], [0, 0, 0.5, 1.0, 0],
        [0, 0, 0, 0, 0]]

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "beta * susceptibility * S * ((home + open * work) @ (I / N) + work @ (E / N)) + spill * S * sum(I) / sum(N)"

[[model.flows]]
name = "onset"
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
name = "recovery"
from = "I"
to = "R"
rate = "I / infectious_days"

[[model.flows]]
name = "vaccination"
from = "S"
to = "R"
rate = "vaccination * S"

[[model.flows]]
name = "waning"
from = "R"
to = "S"
rate = "R / 60"

[parameters]
beta = { dist = "uniform", low = 0.02, high = 0.05 }
susceptibility = [0.6, 1.0, 1.0, 1.1, 1.3]
latent_days = { dist = "gamma", mean = 3.0, sd = 0.5 }
infectious_days = { dist = "uniform", low = 3.0, high = 6.0 }
spill = 0.01
open = { schedule = [[0, 1.0], [10, 0.3], [20, 1.0]], between = "step" }
vaccination = { schedule = [[5, [0.0, 0.0, 0.0, 0.0, 0.0]], [15, [0.001, 0.002, 0.003, 0.004, 0.01]]], between = "linear" }

[[variants]]
name = "usual"

[[variants]]
name = "other-contacts"
matrices = { home = [[1.5, 0.5, 0.5, 0.2, 0.1], [0.5, 2.0, 0.8, 0.3, 0.0], [0.5, 0.8, 1.0, 0.6, 0.2], [0.2, 0.3, 0.6, 1.5, 0.5], [0.1, 0.0, 0.2, 0.5, 2.0]], work = [[0, 0, 0, 0, 0], [0, 2.0, 0, 0, 0], [0, 0, 2.5, 0.5, 0], [0, 0, 0.5, 1.0, 0.5], [0, 0, 0, 0, 0]] }
parameters = { open = { schedule = [[0, 1.0], [15, 0.5]], between = "step" } }

[solver]
method = "rk4"
step = 0.25
report_every = 1
"""


@pytest.fixture(scope="module")
def five_groups(tmp_path_factory, cache):
    path = tmp_path_factory.mktemp("five") / "five.toml"
    path.write_text(textwrap.dedent(FIVE_GROUPS))
    scenario = load_scenario(str(path))
    models = [lower_model(scenario, variant) for variant in scenario.variants]
    designs = [make_design(scenario, variant, model, np.arange(scenario.member_count))
               for variant, model in zip(scenario.variants, models)]
    return scenario, models, designs


def test_grouped_rates_are_one_tree_per_flow(five_groups):
    """Every flow's five elements are one family whose tree, read at each group, is the
    group's own rate (checked by expansion when the family is found); the matrix products
    and the sums over groups are kept whole, so the kernel loops over groups and entries
    and its text depends neither on the groups' rows nor on the matrices' values: the
    variant with other matrices (another pattern of zeros in ``work``) and another
    schedule has the same kernel text, and a chunk's size does not enter it."""
    scenario, models, _ = five_groups
    grouped = grouped_rates(models[0])
    assert grouped.singles == () and len(grouped.families) == 5
    infection = grouped.families[0].template
    nodes = structured_nodes(infection)
    assert {type(node) for node in nodes} == {Contract, GroupTotal}
    assert sum(isinstance(node, Contract) for node in nodes) == 2
    for model in models:
        g = model.n_groups
        for family in grouped_rates(model).families:
            for group in range(g):
                assert expand(family.template, group, g) == model.rates[family.first + group]
    for method in METHODS.values():
        texts = {KernelSource(model, method).text for model in models}
        assert len(texts) == 1, method.name
    form = KernelForm(models[0], METHODS["rk4"])
    assert form.shape == "banded" and form.singles == ()
    assert KernelForm(models[0], METHODS["backward-euler"]).shape == "staged"


@pytest.mark.slow
@pytest.mark.parametrize("method", list(METHODS))
def test_grouped_kernels_match_numpy_reference(five_groups, method):
    """Both variants of the five-group model, every method: the kernels that loop over
    groups and over the matrices' entries give the numpy stepper's numbers to 1e-12
    relative, and the same status bits."""
    scenario, models, designs = five_groups
    for model, design in zip(models, designs):
        reference = _run(integrate_fixed, scenario, model, design, method)
        compiled = _run(integrate_fixed_compiled, scenario, model, design, method)
        np.testing.assert_allclose(compiled.state, reference.state, rtol=1e-12, atol=0)
        np.testing.assert_allclose(compiled.flow_count, reference.flow_count, rtol=1e-12,
                                   atol=0)
        np.testing.assert_array_equal(compiled.status, reference.status)
        assert np.isfinite(compiled.state).all()
        assert (compiled.state[:, 4 * 5 - 5:, -1] > 0).any()


@pytest.mark.parametrize("method", ["rk4", "trapezoid"])
def test_grouped_member_gets_same_bits_in_any_chunk_and_thread_count(five_groups, method):
    """Determinism (the project's reference): a member of the five-group model gets the
    same bits whatever its chunk, its lane in the block and the padding, and whatever the
    number of kernel threads."""
    scenario, models, designs = five_groups
    model, design = models[1], designs[1]
    threads = kernel_threads()
    set_kernel_threads(2)
    whole = _run(integrate_fixed_compiled, scenario, model, design, method)
    set_kernel_threads(1)
    try:
        for start, stop in [(0, 1), (3, 11), (7, 20)]:
            rows = np.arange(start, stop)
            part = dataclasses.replace(
                design, member_index=design.member_index[rows],
                parameters=design.parameters[:, rows], initial=design.initial[:, rows],
                invalid_start=design.invalid_start[rows],
                schedule_values=tuple(v[:, rows] for v in design.schedule_values))
            alone = _run(integrate_fixed_compiled, scenario, model, part, method)
            assert np.array_equal(alone.state, whole.state[rows])
            assert np.array_equal(alone.flow_count[:, :, 1:], whole.flow_count[rows, :, 1:])
    finally:
        set_kernel_threads(threads)


# Illustrative model, invented numbers: three age groups with ageing between them (a flow
# whose rate is a matrix) and an Erlang latent period (stages).
AGEING = """
[scenario]
name = "ageing"
days = 20
members = 12
seed = 8

[model]
compartments = ["S", "E", "I", "R"]
groups = ["young", "middle", "old"]
population = [3000, 4000, 2000]
stages = { E = 2 }
initial = { S = "rest", I = [2, 1, 1] }

[model.matrices]
contacts = [[3.0, 1.0, 0.5], [1.0, 2.0, 0.8], [0.5, 0.8, 1.5]]
ageing = [[0, 0.02, 0], [0, 0, 0.01], [0, 0, 0]]

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "beta * S * (contacts @ (I / N))"

[[model.flows]]
name = "onset"
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
name = "recovery"
from = "I"
to = "R"
rate = "I / 5"

[[model.flows]]
name = "ageing"
from = "S"
to = "S"
rate = "diag(S) @ ageing"

[parameters]
beta = { dist = "uniform", low = 0.03, high = 0.06 }
latent_days = { dist = "uniform", low = 2.0, high = 4.0 }

[solver]
method = "rk4"
step = 0.25
"""


@pytest.mark.slow
@pytest.mark.parametrize("method", ["rk4", "backward-euler"])
def test_single_elements_match_numpy_reference(tmp_path, cache, method):
    """Flow elements that belong to no family (ageing, a flow between groups) are written
    out one by one next to the families (the step through arrays): the numbers of the
    numpy stepper to 1e-12 relative, with stages in the latent period."""
    scenario, model, design = _load(tmp_path, AGEING, "ageing")
    form = KernelForm(model, METHODS[method])
    assert form.singles and form.families and form.shape == "staged"
    reference = _run(integrate_fixed, scenario, model, design, method)
    compiled = _run(integrate_fixed_compiled, scenario, model, design, method)
    np.testing.assert_allclose(compiled.state, reference.state, rtol=1e-12, atol=0)
    np.testing.assert_allclose(compiled.flow_count, reference.flow_count, rtol=1e-12, atol=0)
    np.testing.assert_array_equal(compiled.status, reference.status)
