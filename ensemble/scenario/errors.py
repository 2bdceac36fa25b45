"""Errors in scenario files: each names the file, the key path and the offending value."""

from __future__ import annotations

import difflib
from collections.abc import Iterable


class ScenarioError(Exception):
    """An invalid scenario: the command line reports it and exits with status 2.

    Parameters
    ----------
    file : path of the scenario file as given.
    key : key path, e.g. ``model.flows[2].rate`` or ``parameters.R0.sd``; ``""`` for the
        file as a whole (a TOML syntax error).
    value : the offending value as written (``repr``-able), or None.
    message : what is wrong, in the modeller's terms.
    hint : an optional suggestion, such as ``did you mean 'latent_days'?``.
    """

    def __init__(self, file: str, key: str, value: object, message: str, hint: str | None = None):
        self.file = file
        self.key = key
        self.value = value
        self.message = message
        self.hint = hint
        super().__init__(str(self))

    def __str__(self) -> str:
        where = f"{self.file}: {self.key}" if self.key else self.file
        text = f"{where}: {self.message}"
        if self.value is not None:
            text += f" (value: {self.value!r})"
        if self.hint:
            text += f"; {self.hint}"
        return text


class ScenarioErrors(ScenarioError):
    """Several independent problems found in one file, reported together."""

    def __init__(self, errors: list[ScenarioError]):
        self.errors = list(errors)
        first = self.errors[0]
        super().__init__(first.file, first.key, first.value, first.message, first.hint)

    def __str__(self) -> str:
        return "\n".join(ScenarioError.__str__(e) for e in self.errors)


def did_you_mean(word: str, choices: Iterable[str]) -> str | None:
    """A "did you mean" hint naming the closest of ``choices``, or None if none is close."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f"did you mean {close[0]!r}?" if close else None
