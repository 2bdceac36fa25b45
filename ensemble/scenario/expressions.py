"""Expressions of the scenario language: a whitelisted subset of Python's syntax.

Text is parsed with :func:`ast.parse` in ``eval`` mode and converted node by node into the
small tree below; any other node, name form or call is rejected with a reason.  User text
is never handed to ``eval`` or ``exec``.

Grammar: numbers, names, ``+ - * / **``, unary minus, parentheses, ``@`` (matrix times
vector or matrix), and calls of :data:`FUNCTIONS`, all in ASCII characters.
"""

from __future__ import annotations

import ast
import keyword
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Literal, Union

FUNCTIONS: dict[str, int] = {
    "exp": 1, "log": 1, "sqrt": 1, "abs": 1, "sin": 1, "cos": 1,
    "min": 2, "max": 2, "sum": 1, "diag": 1, "spectral_radius": 1,
}
"""Callable functions and their number of arguments.  ``sum`` reduces a vector over
groups to a number, ``diag`` makes a vector the diagonal of a matrix, and
``spectral_radius`` reduces a matrix to the largest modulus of its eigenvalues; the others
act elementwise."""

ONCE_PER_MEMBER = frozenset({"spectral_radius"})
"""Functions computed once per member from its parameters, never per step: they may not
be used where the state or the time can reach them (rates, and derived parameters that
vary in time)."""

BUILTIN_NAMES = frozenset({"t", "N", "pi"})
"""Names every expression may use: time in days since start, the current total of the
group's compartments (less ``exclude_from_N``), and pi."""

RESERVED = frozenset(BUILTIN_NAMES | {"rest"} | set(FUNCTIONS) | set(keyword.kwlist)
                     | set(keyword.softkwlist))
"""Identifiers a compartment, parameter or matrix may not take."""


@dataclass(frozen=True)
class Number:
    """A numeric literal."""

    value: float


@dataclass(frozen=True)
class Name:
    """A reference to a compartment, parameter, matrix or built-in name."""

    id: str


@dataclass(frozen=True)
class Negate:
    """Unary minus."""

    operand: "Node"


@dataclass(frozen=True)
class Binary:
    """A binary operation: ``+ - * / **`` elementwise, ``@`` matrix times vector."""

    op: Literal["+", "-", "*", "/", "**", "@"]
    left: "Node"
    right: "Node"


@dataclass(frozen=True)
class Call:
    """A call of one of :data:`FUNCTIONS`."""

    function: str
    args: tuple["Node", ...]


Node = Union[Number, Name, Negate, Binary, Call]


class ExpressionError(ValueError):
    """An expression that is not in the language; the message says why."""


MAX_LENGTH = 2000
"""Longest expression text accepted (characters)."""

MAX_DEPTH = 60
"""Deepest nesting accepted, so that no expression can exhaust the recursion limit."""

MAX_EXPONENT = 64.0
"""Largest absolute value of a literal exponent: ``x ** 1e300`` is refused, not computed."""

_BINARY = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/", ast.Pow: "**",
           ast.MatMult: "@"}


def parse(text: str) -> Node:
    """Parse ``text`` into an expression tree, accepting only the whitelisted forms.

    Raises
    ------
    ExpressionError
        For a syntax error or any construct outside the language, saying which.
    """
    if not isinstance(text, str):
        raise ExpressionError("an expression must be a string")
    if len(text) > MAX_LENGTH:
        raise ExpressionError(f"expression longer than {MAX_LENGTH} characters")
    if not text.strip():
        raise ExpressionError("empty expression")
    _refuse_non_ascii(text)
    try:
        tree = ast.parse(text.strip(), mode="eval")
    except SyntaxError as exc:
        raise ExpressionError(f"syntax error at column {exc.offset}: {exc.msg}") from None
    except (ValueError, RecursionError, MemoryError):
        raise ExpressionError("expression cannot be parsed") from None
    return _convert(tree.body, depth=0)


def _refuse_non_ascii(text: str) -> None:
    """Refuse any character outside ASCII.  Every name, number and operator of the
    language is ASCII; Python's parser would read look-alike letters as the names they
    normalise to (NFKC: fullwidth ``ｂｅｔａ`` is ``beta``, ``ℕ`` is ``N``), so that an
    expression would use a parameter its text does not name."""
    for column, character in enumerate(text, start=1):
        if not character.isascii():
            raise ExpressionError(f"character {character!r} (U+{ord(character):04X}) at "
                                  f"column {column} is not ASCII: names are written in "
                                  "plain ASCII letters, digits and '_', exactly as "
                                  "declared")


def _convert(node: ast.AST, depth: int) -> Node:
    if depth > MAX_DEPTH:
        raise ExpressionError(f"expression nested deeper than {MAX_DEPTH} levels")
    if isinstance(node, ast.Constant):
        if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
            raise ExpressionError(f"only numbers are allowed as literals, not {node.value!r}")
        try:
            value = float(node.value)
        except OverflowError:
            value = math.inf
        if not math.isfinite(value):
            written = repr(node.value)
            written = written if len(written) <= 24 else written[:20] + "..."
            raise ExpressionError(f"literal {written} is not a finite number")
        return Number(value)
    if isinstance(node, ast.Name):
        if node.id.startswith("__"):
            raise ExpressionError(f"name {node.id!r} is not allowed (double underscore)")
        return Name(node.id)
    if isinstance(node, ast.UnaryOp):
        operand = _convert(node.operand, depth + 1)
        if isinstance(node.op, ast.USub):
            return Negate(operand)
        if isinstance(node.op, ast.UAdd):
            return operand
        raise ExpressionError(f"operator {type(node.op).__name__} is not allowed")
    if isinstance(node, ast.BinOp):
        op = _BINARY.get(type(node.op))
        if op is None:
            raise ExpressionError(f"operator {type(node.op).__name__} is not allowed")
        left = _convert(node.left, depth + 1)
        right = _convert(node.right, depth + 1)
        if op == "**" and isinstance(right, Number) and abs(right.value) > MAX_EXPONENT:
            raise ExpressionError(f"exponent {right.value:g} is larger than {MAX_EXPONENT:g}")
        if op == "**" and isinstance(right, Negate) and isinstance(right.operand, Number) \
                and abs(right.operand.value) > MAX_EXPONENT:
            raise ExpressionError(f"exponent -{right.operand.value:g} is larger than {MAX_EXPONENT:g}")
        return Binary(op, left, right)
    if isinstance(node, ast.Call):
        if not isinstance(node.func, ast.Name):
            raise ExpressionError("only calls of the functions "
                                  + ", ".join(FUNCTIONS) + " are allowed")
        name = node.func.id
        if name not in FUNCTIONS:
            raise ExpressionError(f"function {name!r} is not allowed; the functions are "
                                  + ", ".join(FUNCTIONS))
        if node.keywords:
            raise ExpressionError(f"{name}() takes no keyword arguments")
        if any(isinstance(a, ast.Starred) for a in node.args):
            raise ExpressionError(f"{name}() takes no starred arguments")
        if len(node.args) != FUNCTIONS[name]:
            raise ExpressionError(f"{name}() takes {FUNCTIONS[name]} argument(s), "
                                  f"not {len(node.args)}")
        return Call(name, tuple(_convert(a, depth + 1) for a in node.args))
    raise ExpressionError(f"{_describe(node)} is not allowed in an expression")


def _describe(node: ast.AST) -> str:
    names = {
        ast.Attribute: "attribute access", ast.Subscript: "indexing",
        ast.Lambda: "a lambda", ast.Compare: "a comparison", ast.BoolOp: "a boolean operator",
        ast.IfExp: "a conditional expression", ast.ListComp: "a comprehension",
        ast.SetComp: "a comprehension", ast.DictComp: "a comprehension",
        ast.GeneratorExp: "a comprehension", ast.List: "a list", ast.Tuple: "a tuple",
        ast.Dict: "a dict", ast.Set: "a set", ast.JoinedStr: "a string",
        ast.NamedExpr: "an assignment", ast.Await: "await", ast.Yield: "yield",
        ast.YieldFrom: "yield", ast.Starred: "unpacking",
    }
    return names.get(type(node), type(node).__name__)


def names_in(node: Node) -> frozenset[str]:
    """Every name ``node`` uses (built-in names included)."""
    if isinstance(node, Name):
        return frozenset({node.id})
    if isinstance(node, Negate):
        return names_in(node.operand)
    if isinstance(node, Binary):
        return names_in(node.left) | names_in(node.right)
    if isinstance(node, Call):
        return frozenset().union(*(names_in(a) for a in node.args))
    return frozenset()


def proportional_to(node: Node, name: str) -> bool:
    """Whether ``node`` is ``name`` times or divided by factors that do not use ``name``:
    ``name``, ``-e``, ``e * f`` or ``e / f`` with ``e`` proportional and ``f`` free of
    ``name``, ``diag(e)`` and ``e @ f`` with ``e`` proportional (each element of the
    value, each row of a matrix, is then the element's own count times a factor)."""
    if isinstance(node, Name):
        return node.id == name
    if isinstance(node, Negate):
        return proportional_to(node.operand, name)
    if isinstance(node, Call):
        return node.function == "diag" and proportional_to(node.args[0], name)
    if not isinstance(node, Binary):
        return False
    if node.op == "*":
        return ((proportional_to(node.left, name) and name not in names_in(node.right))
                or (proportional_to(node.right, name) and name not in names_in(node.left)))
    if node.op in ("/", "@"):
        return proportional_to(node.left, name) and name not in names_in(node.right)
    return False


def functions_in(node: Node) -> frozenset[str]:
    """Every function ``node`` calls."""
    if isinstance(node, Negate):
        return functions_in(node.operand)
    if isinstance(node, Binary):
        return functions_in(node.left) | functions_in(node.right)
    if isinstance(node, Call):
        return frozenset({node.function}).union(*(functions_in(a) for a in node.args))
    return frozenset()


def infer_shape(node: Node, shapes: Mapping[str, str]) -> str:
    """The kind of value ``node`` evaluates to: ``"scalar"``, ``"vector"`` or ``"matrix"``.

    ``shapes`` maps every name the expression may use to its kind.  Elementwise
    arithmetic broadcasts scalars; matrix +/- matrix and scalar */ matrix give matrices;
    matrix @ vector gives a vector and matrix @ matrix a matrix; ``sum`` takes a vector,
    ``diag`` a vector (giving a matrix), ``spectral_radius`` a matrix; any other mix is an
    error.
    """
    if isinstance(node, Number):
        return "scalar"
    if isinstance(node, Name):
        if node.id not in shapes:
            raise ExpressionError(f"unknown name {node.id!r}")
        return shapes[node.id]
    if isinstance(node, Negate):
        return infer_shape(node.operand, shapes)
    if isinstance(node, Call):
        kinds = [infer_shape(a, shapes) for a in node.args]
        if node.function == "sum":
            if kinds[0] != "vector":
                raise ExpressionError(f"sum() takes a vector over groups, not a {kinds[0]}")
            return "scalar"
        if node.function == "diag":
            if kinds[0] != "vector":
                raise ExpressionError(f"diag() takes a vector over groups, not a {kinds[0]}")
            return "matrix"
        if node.function == "spectral_radius":
            if kinds[0] != "matrix":
                raise ExpressionError(f"spectral_radius() takes a matrix, not a {kinds[0]}")
            return "scalar"
        if "matrix" in kinds:
            raise ExpressionError(f"{node.function}() does not take a matrix")
        return "vector" if "vector" in kinds else "scalar"
    left = infer_shape(node.left, shapes)
    right = infer_shape(node.right, shapes)
    if node.op == "@":
        if left == "matrix" and right in ("vector", "matrix"):
            return right
        raise ExpressionError(f"'@' takes a matrix and a vector or a matrix, not "
                              f"{left} @ {right}")
    if "matrix" not in (left, right):
        return "vector" if "vector" in (left, right) else "scalar"
    if left == right == "matrix" and node.op in "+-":
        return "matrix"
    if {left, right} == {"matrix", "scalar"} and (node.op == "*" or (node.op == "/" and right == "scalar")):
        return "matrix"
    raise ExpressionError(f"cannot combine {left} {node.op} {right}")
