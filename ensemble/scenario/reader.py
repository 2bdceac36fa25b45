"""The toolkit every part of the scenario loader reads with: typed getters that raise a
:class:`~ensemble.errors.ScenarioError` naming the file, key path and value, the
collection of independent errors, and the parsing and checking of expressions.

Numbers arrive from :mod:`tomllib` as :class:`decimal.Decimal` (the loader reads with
``parse_float=decimal.Decimal``), so that times become exact :class:`fractions.Fraction`
values (0.7 is 7/10, seven steps of 0.1) while every other number becomes a float.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from datetime import date, datetime
from decimal import Decimal
from fractions import Fraction
from typing import Any, TypeVar

from ensemble.distributions import Problem
from ensemble.errors import ScenarioError, ScenarioErrors, did_you_mean
from ensemble.scenario import expressions
from ensemble.scenario.expressions import ExpressionError, Node
from ensemble.scenario.schema import Expression

MISSING = object()
"""Marks a key or table the file does not have."""

_IDENTIFIER = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_LABEL = re.compile(r"[A-Za-z0-9_-]+")

CONTROL_CHARACTERS = re.compile(r"[\x00-\x1f\x7f-\x9f]")
"""Characters no name or path may hold: the C0 controls (NUL, tab, newline, carriage
return, escape, ...), DEL and the C1 controls, Unicode's category Cc.  A newline in a
path written into a job script would start a command of its own."""

T = TypeVar("T")


def shown(value: object) -> object:
    """``value`` as the modeller wrote it, for error messages (decimals as floats)."""
    if isinstance(value, Decimal):
        return float(value) if value.is_finite() else str(value)
    if isinstance(value, Fraction):
        return int(value) if value.denominator == 1 else float(value)
    if isinstance(value, date):
        return value.isoformat()
    if isinstance(value, list):
        return [shown(v) for v in value]
    if isinstance(value, dict):
        return {k: shown(v) for k, v in value.items()}
    return value


def is_number(value: object) -> bool:
    """An int, float or decimal, not a boolean."""
    return isinstance(value, (int, float, Decimal)) and not isinstance(value, bool)


def _is_finite(value: int | float | Decimal) -> bool:
    return value.is_finite() if isinstance(value, Decimal) else math.isfinite(value)


def key_path(path: str, key: str) -> str:
    """``path.key`` (just ``key`` at the top of the file)."""
    return f"{path}.{key}" if path else key


def time_text(value: Fraction) -> str:
    """A time for messages: ``0.25``, ``7``, or ``1/3`` when no short decimal exists."""
    if value.denominator == 1:
        return str(value.numerator)
    as_float = float(value)
    return repr(as_float) if Fraction(repr(as_float)) == value else str(value)


def hint_for_keys(table: Mapping[str, Any], choices: Iterable[str]) -> str | None:
    """A hint for the first key of ``table`` that is close to one of ``choices``."""
    for key in table:
        hint = did_you_mean(key, choices)
        if hint:
            return f"{key!r}: {hint}"
    return None


@dataclass(frozen=True)
class Text:
    """An expression parsed but not yet checked against the names in scope."""

    text: str
    tree: Node
    path: str

    @property
    def names(self) -> frozenset[str]:
        return expressions.names_in(self.tree)


class Abandoned(Exception):
    """A part of the file is given up; its errors are already recorded."""


class Reader:
    """Reads the values of one scenario file and collects its independent errors.

    Attributes
    ----------
    file : the file as given, named in every error.
    errors : the errors recorded so far.
    unusable : parameters whose definitions failed: expressions using them are not
        checked (their errors would only repeat the first).
    """

    def __init__(self, file: str):
        self.file = file
        self.errors: list[ScenarioError] = []
        self.unusable: frozenset[str] = frozenset()

    # -- errors ---------------------------------------------------------------------------

    def error(self, key: str, value: object, message: str, hint: str | None = None
              ) -> ScenarioError:
        return ScenarioError(self.file, key, shown(value), message, hint)

    def refuse(self, problem: Problem | None, table: Mapping[str, Any], path: str) -> None:
        """Raise ``problem`` of ``table`` (at ``path``), if there is one, showing the
        value as written where it is one of the table's keys."""
        if problem is not None:
            raise self.error(key_path(path, problem.key), table.get(problem.key, problem.value),
                             problem.message)

    def attempt(self, read: Callable[..., T], *args: Any) -> T | None:
        """Run ``read``; record its error and return None if it fails."""
        try:
            return read(*args)
        except ScenarioErrors as exc:
            self.errors.extend(exc.errors)  # type: ignore[arg-type]
        except ScenarioError as exc:
            self.errors.append(exc)
        except Abandoned:
            pass
        return None

    def abandon_if_failed(self, mark: int) -> None:
        """Give up the current part if errors were recorded since ``mark``."""
        if len(self.errors) > mark:
            raise Abandoned

    def raise_collected(self) -> None:
        """Raise the recorded errors, if any."""
        if len(self.errors) == 1:
            raise self.errors[0]
        if self.errors:
            raise ScenarioErrors(self.errors)  # type: ignore[arg-type]

    # -- typed access to tables -----------------------------------------------------------

    def table(self, value: object, path: str, allowed: Iterable[str],
              what: str = "key") -> dict[str, Any]:
        """``value`` as a table whose keys are all in ``allowed`` (``what`` they are)."""
        if not isinstance(value, dict):
            raise self.error(path, value, "must be a table")
        allowed = tuple(allowed)
        for key in value:
            if key not in allowed:
                raise self.error(key_path(path, key), value[key], f"unknown {what} {key!r}",
                                 did_you_mean(key, allowed)
                                 or "expected one of: " + ", ".join(allowed))
        return value

    def get(self, table: Mapping[str, Any], path: str, key: str,
            read: Callable[[object, str], T], default: object = MISSING) -> T:
        """``read`` of ``table[key]``, ``default`` if absent (required without one)."""
        if key not in table:
            if default is MISSING:
                raise self.error(key_path(path, key), None, f"missing required key {key!r}")
            return default  # type: ignore[return-value]
        return read(table[key], key_path(path, key))

    def string(self, value: object, path: str) -> str:
        if not isinstance(value, str):
            raise self.error(path, value, "must be a string")
        return value

    def label(self, value: object, path: str) -> str:
        text = self.string(value, path)
        if not _LABEL.fullmatch(text):
            raise self.error(path, value, "must be a label of letters, digits, '-' and '_'")
        return text

    def identifier(self, value: object, path: str) -> str:
        text = self.string(value, path)
        if not _IDENTIFIER.fullmatch(text):
            raise self.error(path, value, "must be an identifier: a letter or '_' followed "
                                          "by letters, digits and '_'")
        if text.startswith("__"):
            raise self.error(path, value, "names starting with '__' are not allowed")
        if text in expressions.RESERVED:
            raise self.error(path, value, f"{text!r} is a reserved name (built-in names "
                                          "t, N, pi, 'rest', the function names and Python "
                                          "keywords cannot be used)")
        return text

    def boolean(self, value: object, path: str) -> bool:
        if not isinstance(value, bool):
            raise self.error(path, value, "must be true or false")
        return value

    def integer(self, value: object, path: str, minimum: int | None = None,
                maximum: int | None = None) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.error(path, value, "must be a whole number (without a decimal point)")
        if minimum is not None and value < minimum:
            raise self.error(path, value, f"must be >= {minimum}")
        if maximum is not None and value > maximum:
            raise self.error(path, value, f"must be <= {maximum}")
        return value

    def number(self, value: object, path: str) -> float:
        if not is_number(value):
            raise self.error(path, value, "must be a number")
        if not _is_finite(value) or not math.isfinite(float(value)):  # type: ignore[arg-type]
            raise self.error(path, value, "must be a finite number")
        return float(value)  # type: ignore[arg-type]

    def positive(self, value: object, path: str) -> float:
        result = self.number(value, path)
        if result <= 0:
            raise self.error(path, value, "must be positive")
        return result

    def time(self, value: object, path: str) -> Fraction:
        """A time in days, exactly as written."""
        if not is_number(value) or not _is_finite(value):  # type: ignore[arg-type]
            raise self.error(path, value, "must be a finite number of days")
        return Fraction(value)  # type: ignore[arg-type]

    def positive_time(self, value: object, path: str) -> Fraction:
        result = self.time(value, path)
        if result <= 0:
            raise self.error(path, value, "must be positive")
        return result

    def date(self, value: object, path: str) -> date:
        if isinstance(value, datetime) or not isinstance(value, date):
            raise self.error(path, value, "must be a date without a time, such as 2027-01-04")
        return value

    def numbers(self, value: object, path: str, length: int | None = None) -> tuple[float, ...]:
        if not isinstance(value, list):
            raise self.error(path, value, "must be a list of numbers")
        if length is not None and len(value) != length:
            raise self.error(path, value, f"must have one entry per group ({length}), "
                                          f"not {len(value)}")
        return tuple(self.number(v, f"{path}[{i}]") for i, v in enumerate(value))

    def unique(self, items: list[str], path: str, what: str) -> None:
        seen = set()
        for i, item in enumerate(items):
            if item in seen:
                raise self.error(f"{path}[{i}]", item, f"duplicate {what} {item!r}")
            seen.add(item)

    def known(self, name: object, choices: Iterable[str], path: str, what: str) -> str:
        choices = tuple(choices)
        text = self.string(name, path)
        if text not in choices:
            raise self.error(path, name, f"unknown {what} {text!r}", did_you_mean(text, choices)
                             or f"the {what}s are: " + ", ".join(choices))
        return text

    # -- expressions ----------------------------------------------------------------------

    def parse(self, value: object, path: str) -> Text:
        text = self.string(value, path)
        try:
            tree = expressions.parse(text)
        except ExpressionError as exc:
            raise self.error(path, text, f"invalid expression: {exc}") from None
        return Text(text, tree, path)

    def check(self, text: Text, shapes: Mapping[str, str],
              forbidden: Mapping[str, str] | None = None) -> Expression:
        """Check ``text``'s names against ``shapes`` (its scope) and infer its shape.

        ``forbidden`` maps names that exist but may not be used here to the reason.
        """
        forbidden = forbidden or {}
        if text.names & self.unusable:
            raise Abandoned
        for name in sorted(text.names):
            if name in shapes:
                continue
            if name in forbidden:
                raise self.error(text.path, text.text, f"{name!r} {forbidden[name]}")
            if name in expressions.FUNCTIONS:
                raise self.error(text.path, text.text, f"{name!r} is a function; call it "
                                 f"with {expressions.FUNCTIONS[name]} argument(s)")
            raise self.error(text.path, text.text, f"unknown name {name!r}",
                             did_you_mean(name, [*shapes, *self.unusable]))
        try:
            shape = expressions.infer_shape(text.tree, shapes)
        except ExpressionError as exc:
            raise self.error(text.path, text.text, str(exc)) from None
        return Expression(text.text, text.tree, text.path, shape,  # type: ignore[arg-type]
                          text.names)

    def refuse_per_step(self, expression: Expression, where: str) -> None:
        """Refuse a function that is computed once per member (``spectral_radius``) in
        an expression that is evaluated at every step (``where`` says which)."""
        once = sorted(expressions.functions_in(expression.tree) & expressions.ONCE_PER_MEMBER)
        if once:
            raise self.error(expression.key, expression.text,
                             f"{once[0]}() is computed once per member from the parameters, "
                             f"so {where} cannot use it",
                             f"give it its own derived parameter, constant in time "
                             f"(scale = \"{once[0]}(...)\"), and use that name here")
