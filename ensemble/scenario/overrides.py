"""Settings given on the command line: ``--set KEY=VALUE`` changes one key of the
scenario file before it is checked, exactly as editing the file would.

``KEY`` is a key path as errors name it: table and key names joined by dots, with
``[i]`` for the i-th (from 0) table of an array of tables (``scenario.days``,
``parameters.R0.high``, ``model.flows[1].rate``).  Tables on the way that the file
does not have are created; an array of tables must have the entry named.  ``VALUE`` is
read as a TOML value (``240``, ``0.25``, ``true``, ``"text"``, ``[1, 2]``,
``{ dist = "uniform", low = 1, high = 2 }``), with numbers read exactly as the loader
reads the file's, so an override gives the same scenario, and the same result, as the
edited file; a value that is not TOML is taken as a string (``--set
model.flows[0].rate=beta*S*I/N``).  The scenario is then checked as a whole, like any
file.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Sequence
from decimal import Decimal
from typing import Any

from ensemble.errors import ScenarioError

_STEP = re.compile(r"([^.\[\]=]+)((?:\[\d+\])*)")
"""One dotted part of a key path: a name and any ``[i]`` indexes after it."""


def apply_overrides(data: dict[str, Any], overrides: Sequence[str], file: str) -> None:
    """Set each ``KEY=VALUE`` of ``overrides`` in ``data`` (the file as TOML read it),
    in order.

    Raises
    ------
    ScenarioError
        For a setting that is not ``KEY=VALUE``, or a key path that does not lead to a
        key of a table (naming the setting).
    """
    for setting in overrides:
        key, separator, text = setting.partition("=")
        key = key.strip()
        if not separator or not key:
            raise ScenarioError(file, "--set", setting, "must be KEY=VALUE, such as "
                                "scenario.days=240")
        table, last = _parent(data, key, setting, file)
        table[last] = read_value(text.strip())


def read_value(text: str) -> Any:
    """``text`` as a TOML value (decimals as :class:`decimal.Decimal`, as the loader
    reads the file), or as a string when it is not one."""
    try:
        return tomllib.loads(f"value = {text}", parse_float=Decimal)["value"]
    except tomllib.TOMLDecodeError:
        return text


def _parent(data: dict[str, Any], key: str, setting: str, file: str
            ) -> tuple[dict[str, Any], str]:
    """The table that holds the last key of ``key``, and that key."""
    parts = key.split(".")
    steps = [_STEP.fullmatch(part) for part in parts]
    if not all(steps):
        raise ScenarioError(file, "--set", setting, f"{key!r} is not a key path such as "
                            "parameters.R0.high or model.flows[0].rate")
    current: Any = data
    walked = ""
    for n, step in enumerate(steps):
        name, indexes = step.group(1), [int(i) for i in re.findall(r"\d+", step.group(2))]
        last = n == len(steps) - 1 and not indexes
        if not isinstance(current, dict):
            raise ScenarioError(file, walked, None, f"--set {setting}: {walked} is not a "
                                "table, so it has no key " + repr(name))
        if last:
            return current, name
        walked = f"{walked}.{name}" if walked else name
        current = current.setdefault(name, {} if not indexes else [])
        for index in indexes:
            if not isinstance(current, list) or index >= len(current):
                count = len(current) if isinstance(current, list) else 0
                raise ScenarioError(file, walked, None, f"--set {setting}: {walked} has "
                                    f"{count} entries, so no [{index}]")
            current = current[index]
            walked += f"[{index}]"
    raise ScenarioError(file, "--set", setting, f"{key!r} ends with an index: name a key "
                        "of that table, such as model.flows[0].rate")
