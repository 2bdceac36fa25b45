"""The project's reference (``ensemble/scenario/reference.md``) documents what the code
accepts and writes: every key of every table the scenario loader checks, every
distribution family, integration method, function and built-in name of the expression
language, and every variable, attribute and status bit of the result file.

The keys come from the loader itself: :meth:`ensemble.scenario.reader.Reader.table`
refuses any key outside the ``allowed`` keys it is given, so the tests record what it is
given while a scenario that uses every table of the format is loaded.  A second test
reads the loader's source and fails if it checks a key that this scenario never reaches,
so a new table cannot escape the first test.  Each check also runs the other way: the
reference documents nothing the code does not accept.

In the reference, a table of keys is a Markdown table whose header starts with ``key``,
placed under a heading that names the scenario table in backticks (``### `[solver]` ``);
the other tables are found by their header's first word and their heading.
"""

from __future__ import annotations

import ast
import re
import textwrap
from collections import defaultdict
from dataclasses import dataclass
from pathlib import Path

import netCDF4
import pytest

import ensemble.scenario
from ensemble import api
from ensemble.distributions import FAMILIES
from ensemble.methods import METHODS
from ensemble.records import STATUS_FLAGS
from ensemble.scenario.expressions import BUILTIN_NAMES, FUNCTIONS
from ensemble.scenario.load import load_scenario
from ensemble.scenario.reader import Reader
from support import REPO, MarkdownTables, markdown_tables, ticked

PACKAGE = Path(ensemble.scenario.__file__).parent
REFERENCE = PACKAGE / "reference.md"

EVERY_TABLE = """\
# Illustrative only: invented numbers, written to reach every table the loader checks.
[scenario]
name = "every-table"
title = "Every table of the format (invented numbers)"
description = "A two-group SIR with deaths, all forms of parameters and two variants."
start = 2027-01-04
days = 10
members = 4
seed = 3

[model]
compartments = ["S", "I", "R", "D"]
groups = ["young", "old"]
population = [600, 400]
initial = { S = "rest", I = "seed * share" }
exclude_from_N = ["D"]

[model.matrices]
contacts = [[3.0, 1.0], [1.0, 2.0]]

[[model.flows]]
name = "infection"
from = "S"
to = "I"
rate = "beta * scale * S * (contacts @ (I / N))"

[[model.flows]]
from = "I"
to = "R"
rate = "(1 - fatality) * I / infectious_days"

[[model.flows]]
from = "I"
to = "D"
rate = "fatality * I / infectious_days"

[parameters]
beta = { dist = "normal", mean = 0.05, sd = 0.01, low = 0.01, units = "1", description = "chance of infection per contact" }
infectious_days = { value = 4.0, units = "day" }
fatality = { dist = "beta", mean = 0.01, sd = 0.004, per_group = true }
scale = { schedule = [[0, 1.0], [4, 0.6]], between = "linear" }
seed = 2.0
share = [1.0, 0.5]

[sampling]
method = "latin-hypercube"

[[variants]]
name = "usual"
title = "Contacts as usual"

[[variants]]
name = "fewer-contacts"
parameters = { beta = { dist = "uniform", low = 0.03, high = 0.05 }, infectious_days = { value = 3.5 }, scale = { schedule = [[0, 0.8]] } }
matrices = { contacts = [[2.0, 0.5], [0.5, 1.5]] }

[solver]
method = "heun"
step = 0.5
report_every = 1
check = { refine = 2, levels = 3 }
newton = { max_iter = 10 }

[output]
quantiles = [0.1, 0.5, 0.9]
keep_members = true
compare_to = "usual"

[compute]
chunk = 2

[[measures]]
name = "sick"
of = "I"
groups = "each"
threshold = 5
units = "1"
description = "infectious persons"

[[measures]]
name = "infections"
of = "infection"
groups = ["old"]
window = 2

[[observations]]
file = "infections.csv"
measure = "infections"
distribution = "negative-binomial"
dispersion = 10
reporting = 0.5
delay = 1
"""

SCENARIOS = sorted((REPO / "scenarios").glob("*.toml"))
"""The demo scenarios, loaded besides :data:`EVERY_TABLE`."""


# ------------------------------------------------------------------- the reference


@pytest.fixture(scope="module")
def documented() -> MarkdownTables:
    return markdown_tables(REFERENCE.read_text(encoding="utf-8"))


# -------------------------------------------------------------- what the loader checks


@dataclass(frozen=True)
class Visit:
    """One call of ``Reader.table``: the key path, the allowed keys, what they name
    (``"key"``, or ``"parameter"``/``"matrix"`` when the keys are the file's own names)
    and the table as written."""

    path: str
    allowed: tuple[str, ...]
    what: str
    value: object


def visits_while_loading(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> list[Visit]:
    """Every ``Reader.table`` call made while :data:`EVERY_TABLE` and the demo scenarios
    load."""
    real = Reader.table
    visits: list[Visit] = []

    def recording(self, value, path, allowed, what="key"):
        allowed = tuple(allowed)
        visits.append(Visit(path, allowed, what, value))
        return real(self, value, path, allowed, what)

    monkeypatch.setattr(Reader, "table", recording)
    every = tmp_path / "every-table.toml"
    every.write_text(EVERY_TABLE, encoding="utf-8")
    for path in (every, *SCENARIOS):
        load_scenario(path)
    return visits


def heading_of(path: str) -> str:
    """The reference's heading for a table at key path ``path``: ``[solver.check]``,
    ``[[model.flows]]`` for ``model.flows[2]``, ``[parameters]`` for a parameter's
    table (or one group's distribution in a list per group), in ``[parameters]`` or in a
    variant."""
    general = re.sub(r"\[\d+\]", "[]", path)
    if re.fullmatch(r"(variants\[\]\.)?parameters\.[^.]+(\.value\[\])?", general):
        return "[parameters]"
    if general.endswith("[]"):
        return f"[[{general[:-2]}]]"
    return f"[{general}]"


def own_keys(visit: Visit) -> set[str]:
    """The allowed keys of a visit that its table's section must document: all of them,
    but the keys of a distribution family (documented with the family)."""
    keys = set(visit.allowed)
    if isinstance(visit.value, dict) and visit.value.get("dist") in FAMILIES:
        family = FAMILIES[visit.value["dist"]]
        keys -= set(family.required) | set(family.optional)
    return keys


@pytest.fixture
def visits(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> list[Visit]:
    return visits_while_loading(tmp_path, monkeypatch)


def test_every_table_of_the_file_has_a_section(visits, documented) -> None:
    top = {key for visit in visits if visit.path == "" for key in visit.allowed}
    assert top, "the top of the file was never checked"
    listed = set(documented.names("1. The scenario file", "table"))
    for table in sorted(top):
        assert f"[{table}]" in documented.headings() or f"[[{table}]]" in \
            documented.headings(), f"the reference has no section for [{table}]"
        assert f"[{table}]" in listed or f"[[{table}]]" in listed, (
            f"[{table}] is missing from the reference's list of tables")


def test_every_key_the_loader_accepts_is_documented(visits, documented) -> None:
    accepted: dict[str, set[str]] = defaultdict(set)
    for visit in visits:
        if visit.path and visit.what == "key":
            accepted[heading_of(visit.path)] |= own_keys(visit)
    assert len(accepted) >= 10, sorted(accepted)
    for heading, keys in sorted(accepted.items()):
        written = set(documented.names(heading, "key"))
        assert keys - written == set(), (
            f"the reference's section {heading} lacks the key(s) {sorted(keys - written)}")
        assert written - keys == set(), (
            f"the reference's section {heading} documents {sorted(written - keys)}, "
            "which the loader does not accept there")


def _allowed_argument(call: ast.Call) -> ast.expr | None:
    """The ``allowed`` argument of a ``….table(value, path, allowed)`` call, or of a
    ``….attempt(….table, value, path, allowed)`` call."""
    if isinstance(call.func, ast.Attribute) and call.func.attr == "table":
        return call.args[2] if len(call.args) > 2 else None
    for index, argument in enumerate(call.args):
        if isinstance(argument, ast.Attribute) and argument.attr == "table":
            return call.args[index + 3] if len(call.args) > index + 3 else None
    return None


def keys_in_the_loader_source() -> set[str]:
    """Every key written literally in the ``allowed`` argument of a table check of the
    scenario package (tuples of strings, or module constants holding one)."""
    trees = [ast.parse(path.read_text(encoding="utf-8")) for path in PACKAGE.glob("*.py")]
    constants = {target.id: node.value for tree in trees for node in tree.body
                 if isinstance(node, ast.Assign) for target in node.targets
                 if isinstance(target, ast.Name)}
    keys = set()
    for tree in trees:
        for call in (node for node in ast.walk(tree) if isinstance(node, ast.Call)):
            allowed = _allowed_argument(call)
            if isinstance(allowed, ast.Name):
                allowed = constants.get(allowed.id)
            if isinstance(allowed, (ast.Tuple, ast.List)):
                keys |= {element.value for element in allowed.elts
                         if isinstance(element, ast.Constant) and isinstance(element.value, str)}
    return keys


def test_the_loaded_scenarios_reach_every_table_check(visits) -> None:
    """Otherwise a table added to the loader would escape the tests above: add it to
    EVERY_TABLE."""
    in_source = keys_in_the_loader_source()
    assert {"name", "days", "rate", "refine", "compare_to", "chunk"} <= in_source
    reached = {key for visit in visits for key in visit.allowed}
    assert in_source - reached == set(), (
        f"no loaded scenario reaches the check of {sorted(in_source - reached)}")


# ------------------------------------------------------- registries and the language


def test_every_distribution_family_is_documented(documented) -> None:
    rows = {ticked(row[0])[0]: row for row in documented.rows("Distributions", "family")}
    assert set(rows) == set(FAMILIES)
    for name, family in FAMILIES.items():
        required, optional = ticked(rows[name][1]), ticked(rows[name][2])
        truncation = ("low", "high") if family.truncatable else ()
        assert required == list(family.required), name
        assert optional == [*family.optional, *truncation], name


def test_every_method_is_documented_with_its_order(documented) -> None:
    rows = {ticked(row[0])[0]: row for row in documented.rows("Methods", "method")}
    assert set(rows) == set(METHODS)
    for name, method in METHODS.items():
        assert rows[name][1] == str(method.order), name


def test_every_function_is_documented_with_its_arguments(documented) -> None:
    rows = {ticked(row[0])[0]: row for row in documented.rows("Functions", "function")}
    assert set(rows) == set(FUNCTIONS)
    for name, count in FUNCTIONS.items():
        assert rows[name][1] == str(count), name


def test_every_built_in_name_is_documented(documented) -> None:
    assert set(documented.names("Names", "name")) == BUILTIN_NAMES


# ------------------------------------------------------------------ the result file


@dataclass(frozen=True)
class ResultFile:
    """What a result file holds: dimensions, variables, their attributes, and the global
    attributes."""

    dimensions: set[str]
    variables: set[str]
    variable_attributes: set[str]
    global_attributes: set[str]


@pytest.fixture(scope="module")
def result_file(tmp_path_factory: pytest.TempPathFactory) -> ResultFile:
    """The result of :data:`EVERY_TABLE` (groups, a start, a description, compare_to,
    every member kept; the numpy backend, which writes the same variables)."""
    directory = tmp_path_factory.mktemp("result")
    scenario = directory / "every-table.toml"
    scenario.write_text(EVERY_TABLE, encoding="utf-8")
    path = api.run(scenario, output=directory / "every-table.nc", workers=0,
                   progress=False, backend="numpy")
    with netCDF4.Dataset(path) as nc:
        return ResultFile(
            dimensions={_general(name) for name in nc.dimensions},
            variables={_general(re.sub(r"^param_.+", "param_<name>", name))
                       for name in nc.variables},
            variable_attributes={a for v in nc.variables.values() for a in v.ncattrs()},
            global_attributes=set(nc.ncattrs()))


def _general(name: str) -> str:
    """A name of the result with a measure's name and a window's length as the
    reference writes them (``measure_<name>_quantile``, ``time_<window>d``)."""
    name = re.sub(r"^measure_(sick|infections)", "measure_<name>", name)
    return re.sub(r"^time_\d+d", "time_<window>d", name)


def test_every_dimension_of_the_result_is_documented(result_file, documented) -> None:
    assert set(documented.names("Dimensions", "dimension")) == result_file.dimensions


def test_every_variable_of_the_result_is_documented(result_file, documented) -> None:
    assert "param_<name>" in result_file.variables and "state" in result_file.variables
    assert set(documented.names("Variables", "variable")) == result_file.variables


def test_every_attribute_of_the_result_is_documented(result_file, documented) -> None:
    assert set(documented.names("Variables", "attribute")) == result_file.variable_attributes
    assert set(documented.names("Global attributes", "attribute")) == \
        result_file.global_attributes


def test_every_status_bit_is_documented(documented) -> None:
    rows = documented.rows("Status bits", "bit")
    assert [(int(row[0]), ticked(row[1])[0]) for row in rows] == list(STATUS_FLAGS)


def test_heading_of_maps_key_paths_to_sections() -> None:
    assert heading_of("solver.check") == "[solver.check]"
    assert heading_of("model.flows[3]") == "[[model.flows]]"
    assert heading_of("variants[1]") == "[[variants]]"
    assert heading_of("parameters.R0") == "[parameters]"
    assert heading_of("variants[0].parameters.R0") == "[parameters]"
    assert heading_of("parameters.admitted[2]") == "[parameters]"
    assert heading_of("parameters.admitted.value[0]") == "[parameters]"


def test_reference_parser_reads_a_key_table() -> None:
    """The parser of the reference, on a small example of its layout."""
    text = textwrap.dedent("""\
        ### `[solver]`

        | key | kind |
        |---|---|
        | `step` | time |

        #### Methods

        | method | order |
        |---|---|
        | `rk4` | 4 |
        """)
    documented = markdown_tables(text)
    assert documented.names("[solver]", "key") == ["step"]
    assert documented.rows("Methods", "method") == [["`rk4`", "4"]]
