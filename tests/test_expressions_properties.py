"""Property tests: expression text never runs code, never hangs, and keeps Python's
precedence; the loader turns any mangled scenario into a Scenario or a ScenarioError.

Hypothesis (MacIver et al. 2019, "Hypothesis: A new approach to property-based testing",
JOSS 4(43):1891) generates the inputs.
"""

from __future__ import annotations

import ast
import builtins
import contextlib
import copy
import datetime
import math
import re
import tomllib
import warnings
from decimal import Decimal

import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from ensemble.scenario import ScenarioError
from ensemble.scenario.load import validate
from ensemble.scenario.expressions import (
    FUNCTIONS, MAX_DEPTH, MAX_LENGTH, Binary, Call, ExpressionError, Name, Negate, Number,
    names_in, parse,
)

FRAGMENTS = ["__", ".", "import", "__import__", "(", ")", "'os'", "system", "lambda",
             ":", "[", "]", "for", " in ", "**", "9" * 40, "9" * 400, "1e308", "1e999", "-", "+", "*",
             "/", "@", ",", "x", "S", "exp", "sum", "eval", "open", "getattr", "class",
             "__class__", "__subclasses__", "if", "else", "not", "==", "<", "{", "}", "\"",
             "\\", "\n", ";", "=", ":=", "yield", "await", "f'{x}'", "b''", "...", "0x1F",
             "1j", "True", "None", " "]

LIMITS = settings(max_examples=400, deadline=None, derandomize=True,
                  suppress_health_check=[HealthCheck.too_slow])


PARSER_IMPORTS = frozenset({"unicodedata"})
"""Modules Python's own parser imports (to normalise non-ASCII identifiers, PEP 3131)."""


class CodeWasRun(Exception):
    """Raised by the patched built-ins: an expression reached a code-running path."""


@contextlib.contextmanager
def _no_code_runs():
    """While active, refuse import, eval and exec, and allow compile only to an abstract
    syntax tree (what :func:`ast.parse` does).  Yields the list of refused attempts.

    Warnings are silenced inside, so that no warning machinery needs an import."""
    attempts: list[str] = []
    real = {name: getattr(builtins, name) for name in ("eval", "exec", "__import__",
                                                          "compile")}

    def refuse(name: str):
        def call(*args, **kwargs):
            if name == "__import__" and args and args[0] in PARSER_IMPORTS:
                return real[name](*args, **kwargs)
            attempts.append(f"{name}{args[:1]!r}")
            raise CodeWasRun(name)
        return call

    def ast_only(source, filename, mode, flags=0, *args, **kwargs):
        if not flags & ast.PyCF_ONLY_AST:
            attempts.append("compile")
            raise CodeWasRun("compile")
        return real["compile"](source, filename, mode, flags, *args, **kwargs)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            for name in ("eval", "exec", "__import__"):
                setattr(builtins, name, refuse(name))
            builtins.compile = ast_only
            yield attempts
        finally:
            for name, function in real.items():
                setattr(builtins, name, function)


def _only_language_nodes(node) -> bool:
    if isinstance(node, Number):
        return math.isfinite(node.value)
    if isinstance(node, Name):
        return node.id.isidentifier() and not node.id.startswith("__")
    if isinstance(node, Negate):
        return _only_language_nodes(node.operand)
    if isinstance(node, Binary):
        return (node.op in ("+", "-", "*", "/", "**", "@")
                and _only_language_nodes(node.left) and _only_language_nodes(node.right))
    if isinstance(node, Call):
        return (len(node.args) == FUNCTIONS.get(node.function, -1)
                and all(_only_language_nodes(a) for a in node.args))
    return False


def _parse_within_bounds(text: str):
    """Parse ``text``; the only outcomes are a tree of language nodes or ExpressionError.
    A hang would be stopped by the suite's per-test timeout (``timeout`` in
    pyproject.toml), not by a timed assertion here."""
    with _no_code_runs() as attempts:
        try:
            tree = parse(text)
        except ExpressionError:
            tree = None
    assert attempts == []
    if tree is not None:
        assert _only_language_nodes(tree)
    return tree


@LIMITS
@given(text=st.text(max_size=300))
def test_random_text_never_runs_code(text: str) -> None:
    _parse_within_bounds(text)


@LIMITS
@given(parts=st.lists(st.sampled_from(FRAGMENTS), max_size=40))
def test_dangerous_fragments_never_run_code(parts: list[str]) -> None:
    text = "".join(parts)
    tree = _parse_within_bounds(text)
    if tree is not None:
        assert not any(n.startswith("__") for n in names_in(tree))


@LIMITS
@given(depth=st.integers(0, 3000), opener=st.sampled_from(["(", "-(", "exp(", "-", "+"]))
def test_deep_nesting_is_refused_quickly(depth: int, opener: str) -> None:
    closer = ")" if opener.endswith("(") else ""
    text = opener * depth + "x" + closer * depth
    tree = _parse_within_bounds(text)
    if len(text) > MAX_LENGTH:
        assert tree is None
    if depth > MAX_DEPTH + 1 and opener in ("-(", "exp(", "-"):  # a node per level
        assert tree is None


@pytest.mark.parametrize("text", ["9 ** 9 ** 9 ** 9", "x ** 1e300", "x ** -1e300",
                                  "2 ** 99999999999", "1e999", "9" * 400,
                                  "0x" + "f" * 300, "(" * 200 + "1" + ")" * 200,
                                  "x" * (MAX_LENGTH + 1), "-" * 1990 + "1"])
def test_pathological_texts_finish(text: str) -> None:
    _parse_within_bounds(text)


# --------------------------------------------------- the tree keeps Python's precedence


_LEAVES = st.one_of(st.sampled_from(["a", "b", "c"]),
                    st.integers(1, 9).map(str),
                    st.sampled_from(["0.5", "2.5", "1e-2"]))


def _combine(children):
    return st.one_of(
        st.tuples(children, st.sampled_from(["+", "-", "*", "/"]), children)
        .map(lambda t: f"{t[0]} {t[1]} {t[2]}"),
        st.tuples(children, st.sampled_from(["2", "3", "-1", "0.5"]))
        .map(lambda t: f"{t[0]} ** {t[1]}"),
        children.map(lambda c: f"-{c}"),
        children.map(lambda c: f"({c})"),
        st.tuples(st.sampled_from(["exp", "sqrt", "abs", "sin", "cos", "log"]), children)
        .map(lambda t: f"{t[0]}({t[1]})"),
        st.tuples(st.sampled_from(["min", "max"]), children, children)
        .map(lambda t: f"{t[0]}({t[1]}, {t[2]})"),
    )


GRAMMAR = st.recursive(_LEAVES, _combine, max_leaves=12)
VALUES = {"a": 1.25, "b": -0.75, "c": 3.0}
_FUNCTIONS = {"exp": math.exp, "sqrt": math.sqrt, "abs": abs, "sin": math.sin,
              "cos": math.cos, "log": math.log, "min": min, "max": max}


def _evaluate(node) -> float:
    """A plain float evaluator of the tree (test-side, independent of the product)."""
    if isinstance(node, Number):
        return node.value
    if isinstance(node, Name):
        return VALUES[node.id]
    if isinstance(node, Negate):
        return -_evaluate(node.operand)
    if isinstance(node, Call):
        return _FUNCTIONS[node.function](*(_evaluate(a) for a in node.args))
    left, right = _evaluate(node.left), _evaluate(node.right)
    if node.op == "+":
        return left + right
    if node.op == "-":
        return left - right
    if node.op == "*":
        return left * right
    if node.op == "/":
        return left / right
    assert node.op == "**"
    return left ** right


@settings(max_examples=300, deadline=None, derandomize=True)
@given(text=GRAMMAR)
def test_tree_evaluates_like_python(text: str) -> None:
    """Operator precedence and associativity (``-2 ** 2 == -4``, ``a - b - c``,
    ``2 ** -1``) follow the Python Language Reference, section 6.17 "Operator
    precedence": the reference value is Python's own evaluation of the same generated
    (never user-supplied) text."""
    try:
        expected = eval(text, {"__builtins__": {}}, {**VALUES, **_FUNCTIONS})  # noqa: S307
    except (ArithmeticError, ValueError, TypeError):
        assume(False)
    assume(isinstance(expected, float | int) and math.isfinite(expected))
    tree = parse(text)
    assert names_in(tree) == {n for n in VALUES if re.search(rf"\b{n}\b", text)}
    try:
        got = _evaluate(tree)
    except (ArithmeticError, ValueError, TypeError):
        pytest.fail(f"tree of {text!r} fails where Python gives {expected!r}")
    assert got == pytest.approx(expected, rel=1e-12, abs=1e-300)


# ------------------------------------------------------------------ loader robustness


SCENARIO = """
[scenario]
name = "fuzz"
days = 10
start = 2027-01-04

[model]
compartments = ["S", "I", "R"]
groups = ["a", "b"]
population = [600, 400]
initial = { S = "rest", I = [3, 2] }
matrices = { contacts = [[3.0, 1.0], [1.0, 2.0]] }

[[model.flows]]
from = "S"
to = "I"
rate = "beta * S * (contacts @ (I / N))"

[[model.flows]]
from = "I"
to = "R"
rate = "gamma * I"

[parameters]
beta = { dist = "uniform", low = 0.01, high = 0.05 }
gamma = { dist = "gamma", mean = 0.1, sd = 0.02, low = 0.01, per_group = true }
scale = { schedule = [[0, 1.0], [2.5, 0.5]], between = "linear" }
R0 = "beta * 10 * scale"

[[variants]]
name = "v"
parameters = { beta = 0.02 }

[solver]
step = 0.5
check = { refine = 2 }

[output]
quantiles = [0.1, 0.9]
"""


def _paths(value, prefix=()):
    """Every location in the parsed TOML: dict keys and list indices."""
    yield prefix
    if isinstance(value, dict):
        for key, item in value.items():
            yield from _paths(item, (*prefix, key))
    elif isinstance(value, list):
        for index, item in enumerate(value):
            yield from _paths(item, (*prefix, index))


REPLACEMENTS = st.one_of(
    st.integers(-10**20, 10**20), st.booleans(), st.text(max_size=20),
    st.sampled_from(["rest", "S", "I", "beta", "contacts", "a", "step", "1e400", "t", "N",
                     "S.x", "__import__('os')", "contacts @ contacts", "sum(I)", "I / 0"]),
    st.decimals(allow_nan=True, allow_infinity=True, places=3),
    st.dates(), st.datetimes(), st.just([]), st.just({}),
    st.lists(st.integers(-3, 3), max_size=4),
    st.lists(st.lists(st.decimals(-2, 2, places=1), max_size=3), max_size=3),
    st.dictionaries(st.sampled_from(["dist", "schedule", "low", "high", "mean", "sd", "x"]),
                    st.integers(-2, 5), max_size=3),
)


@settings(max_examples=300, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_mangled_scenarios_give_scenario_or_scenario_error(data) -> None:
    """Replace or delete up to three values anywhere in a valid file: the loader returns
    a Scenario or raises ScenarioError, never anything else."""
    document = tomllib.loads(SCENARIO, parse_float=Decimal)
    for _ in range(data.draw(st.integers(1, 3))):
        locations = [p for p in _paths(document) if p]
        where = data.draw(st.sampled_from(locations))
        parent = document
        for step in where[:-1]:
            parent = parent[step]
        if data.draw(st.booleans()) and isinstance(parent, dict):
            del parent[where[-1]]
        else:
            parent[where[-1]] = copy.deepcopy(data.draw(REPLACEMENTS))
    try:
        validate(document, "fuzz.toml", SCENARIO)
    except ScenarioError as error:
        assert error.file == "fuzz.toml"
        assert str(error)


def test_the_unmangled_fuzz_scenario_is_valid() -> None:
    document = tomllib.loads(SCENARIO, parse_float=Decimal)
    scenario = validate(document, "fuzz.toml", SCENARIO)
    assert scenario.start == datetime.date(2027, 1, 4)
    assert scenario.parameters["R0"].shape == "scalar"
    assert [v.name for v in scenario.variants] == ["v"]
